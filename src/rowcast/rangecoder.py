"""A numba range decoder, byte-compatible with constriction 0.5.0's range coder.

rowcast encodes with constriction's `RangeEncoder` (32-bit words, 64-bit state) under
`Categorical(table, perfect=False)` models (24-bit fixed point); this module decodes the
same words without Python in the loop, so other njit code can decode symbol by symbol:

    cdf = np.empty(257, np.uint32)
    state = decoder_start(words)
    quantise(table, cdf)                       # False: constriction cannot use the table
    symbol = decode_symbol(state, words, cdf)  # -1: the data is invalid for this model

How a table becomes a distribution (`quantise`), in the table's own float type (float32
tables compute in float32, float64 ones in float64): with n symbols, `free = 2**24 - n`,
`total` the left-to-right sum of the table and `scale = free / total` (one rounding), the
left end of symbol i is `trunc(c_i * scale) + i`, where `c_i` is the left-to-right sum of
the entries before i (rounded after each addition), the product is rounded once and its
truncation saturates to 0..2**32 - 1; the sum with i wraps modulo 2**32. The last right end
is 2**24. The `+ i` is what gives every symbol at least one of the 2**24 slots.

The decoder's state is `lower`, `range`, `point` (64-bit) and the index of the next word;
words past the end of the data read as zeros. See docs/FORMAT.md, "The range coder's
model construction", for the whole algorithm and test vectors.
"""

from __future__ import annotations

import numpy as np

from rowcast import native
from rowcast.native import jit

PRECISION = 24  # bits of the model's fixed-point probabilities
ONE = 1 << PRECISION  # the fixed-point total
LOWER, RANGE, POINT, NEXT = 0, 1, 2, 3  # decoder state entries (uint64)
INVALID = -1  # what decode_symbol returns where constriction raises

_U32_MAX = 0xFFFFFFFF
_SHIFT = np.uint64(32)  # one word
_PRECISION = np.uint64(PRECISION)
_ONE = np.uint64(ONE)
_WORD_ONE = np.uint64(1 << 32)  # range below this: the decoder reads a word

_F32_TINY = float(np.finfo(np.float32).tiny)  # the least positive normal numbers
_F64_TINY = float(np.finfo(np.float64).tiny)

@jit
def quantise(counts: np.ndarray, cdf: np.ndarray) -> bool:
    """Write into `cdf` (n + 1 entries, uint32 or int64) the 24-bit cumulative distribution
    that constriction's `Categorical(counts, perfect=False)` builds from `counts` (n
    entries, float32 or float64, computed in that type).

    Returns False, and leaves `cdf` unspecified, where constriction refuses the table (n <
    2 or n >= 2**24 - 1, a sum that is not a positive normal number), and where some
    symbol other than the last gets no probability (`cdf[:n]` not strictly increasing:
    only negative counts do that; constriction builds such models unchecked and codes
    garbage with them). True otherwise. The last symbol may get no probability (cdf[n - 1]
    == 2**24) when its count is negligible next to the sum and the float products round
    up; so it does in constriction, which then cannot encode it, and neither decoder
    ever decodes it.
    """
    n = counts.size
    if n < 2 or n >= ONE - 1 or cdf.size != n + 1:
        return False
    total = counts[0]
    for i in range(1, n):  # constriction sums left to right, rounding each addition
        total += counts[i]
    tiny = _F32_TINY if counts.itemsize == 4 else _F64_TINY
    if not (total >= tiny and np.isfinite(total)):  # a positive normal number
        return False
    scale = counts.dtype.type(ONE - n) / total  # exact free weight, one rounding
    cumulative = counts[0] - counts[0]  # zero of the table's type (total is finite)
    ok = True
    previous = -1
    for i in range(n):
        product = cumulative * scale
        if not (product > 0):  # saturating float-to-int cast: NaN and negatives to 0
            whole = np.int64(0)
        elif product >= 4294967296.0:
            whole = np.int64(_U32_MAX)
        else:
            whole = np.int64(product)  # truncation
        left = (whole + i) & _U32_MAX  # u32 addition wraps
        cdf[i] = left
        ok = ok and left > previous
        previous = left
        cumulative += counts[i]
    cdf[n] = ONE
    return ok


@jit
def decoder_start(words: np.ndarray) -> np.ndarray:
    """A decoder state (uint64 [lower, range, point, next word]) at the start of `words`
    (uint32): `point` holds the first two words, zeros standing in for missing ones."""
    state = np.empty(4, np.uint64)
    point = np.uint64(0)
    for i in range(2):
        point <<= _SHIFT
        if i < words.size:
            point |= np.uint64(words[i])
    state[LOWER] = np.uint64(0)
    state[RANGE] = np.uint64(0xFFFFFFFFFFFFFFFF)
    state[POINT] = point
    state[NEXT] = np.uint64(2)
    return state


@jit
def _last_at_most(cdfs: np.ndarray, row: int, q: int, guess: int) -> int:
    """The last index i < n with cdfs[row, i] <= q (0 if none), for a non-decreasing cdf
    of n + 1 entries: a search that gallops out from `guess` when it lies inside, so it
    reads the few entries near a likely symbol instead of halving the whole table."""
    low, high = 0, cdfs.shape[1] - 1
    if 0 < guess < high:
        if cdfs[row, guess] <= q:
            low, step = guess, 1
            while low + step < high and cdfs[row, low + step] <= q:
                low += step
                step *= 2
            high = min(high, low + step)
        else:
            high, step = guess, 1
            while high - step > 0 and cdfs[row, high - step] > q:
                high -= step
                step *= 2
            low = max(0, high - step)
    while high - low > 1:
        mid = (low + high) >> 1
        if cdfs[row, mid] <= q:
            low = mid
        else:
            high = mid
    return low


@jit
def decode_symbol(state: np.ndarray, words: np.ndarray, cdf: np.ndarray,
                  guess: int = -1) -> int:
    """Decode one symbol with the model `cdf` (from `quantise`, n + 1 entries), advancing
    `state` (from `decoder_start`) over `words`; past their end it reads zero words.
    `guess`, a likely symbol, only speeds the search: the result is the same.

    Returns the symbol (0..n-1), or INVALID (-1), with `state` unchanged, where
    constriction raises: the point lies beyond what the model can code (invalid data);
    also for a hand-made `cdf` that does not start at 0 or has fewer than 2 entries, and
    a hand-made `state` whose range is below 2**24.
    """
    return decode_at(state.reshape(1, -1), 0, words, 0, words.size, cdf.reshape(1, -1), 0,
                     guess)


@jit(inline="always")
def decode_at(states: np.ndarray, b: int, words: np.ndarray, start: int, end: int,
              cdfs: np.ndarray, row: int, guess: int) -> int:
    """`decode_symbol` with state states[b], the words words[start:end] and the model
    cdfs[row], named by index: the decoder's loop makes no array view per subpixel."""
    lower = states[b, LOWER]
    range_ = states[b, RANGE]
    point = states[b, POINT]
    scale = range_ >> _PRECISION
    if scale == 0 or cdfs.shape[1] < 2:  # never from decoder_start and quantise
        return INVALID
    quantile = (point - lower) // scale  # wrapping subtraction
    if quantile >= _ONE:
        return INVALID
    q = np.int64(quantile)
    low = _last_at_most(cdfs, row, q, guess)
    left = np.int64(cdfs[row, low])
    if left > q:
        return INVALID
    width = np.int64(cdfs[row, low + 1]) - left  # > 0: the search keeps cdf[low + 1] > q
    lower += scale * np.uint64(left)
    range_ = scale * np.uint64(width)
    if range_ < _WORD_ONE:
        lower <<= _SHIFT
        range_ <<= _SHIFT
        point <<= _SHIFT
        at = np.int64(states[b, NEXT])
        if start + at < end:
            point |= np.uint64(words[start + at])
        states[b, NEXT] = np.uint64(at + 1)
    states[b, LOWER] = lower
    states[b, RANGE] = range_
    states[b, POINT] = point
    return low


@jit
def decode_counts(state: np.ndarray, words: np.ndarray, counts: np.ndarray,
                  scratch_cdf: np.ndarray) -> int:
    """Decode one symbol under the table `counts` (n entries), building its model in
    `scratch_cdf` (n + 1 entries); INVALID (-1) where the table or the data is invalid."""
    if not quantise(counts, scratch_cdf):
        return INVALID
    return decode_symbol(state, words, scratch_cdf)


# The encoder: the same coder's writing side, byte for byte. Its state (uint64): `lower`,
# `range`, the words written, and while the interval straddles a carry ("inverted": lower
# + range wraps past 2**64) how many words are held back and the first of them.
E_LOWER, E_RANGE, E_WRITTEN, E_HELD, E_FIRST = 0, 1, 2, 3, 4
_STATE_ONE = np.uint64(0xFFFFFFFFFFFFFFFF)
_WORD_MASK = np.uint64(_U32_MAX)


@jit
def encoder_start() -> np.ndarray:
    """A fresh encoder state: the whole 64-bit interval, nothing written."""
    state = np.zeros(5, np.uint64)
    state[E_RANGE] = _STATE_ONE
    return state


@jit
def _put(words: np.ndarray, n: int, word) -> np.ndarray:
    """words with words[n] = word, grown (doubled) when full."""
    if n >= words.size:
        grown = np.empty(max(64, 2 * words.size), np.uint32)
        grown[: words.size] = words
        words = grown
    words[n] = np.uint32(word)
    return words


@jit(inline="always")
def encode_symbol(state: np.ndarray, words: np.ndarray, cdf: np.ndarray, symbol: int):
    """Encode `symbol` with the model `cdf` (from `quantise`) as constriction's range
    encoder does; returns (the words, perhaps grown, True), or (words, False) with the
    state unchanged where constriction refuses (the symbol has no probability)."""
    left = np.uint64(cdf[symbol])
    if np.uint64(cdf[symbol + 1]) <= left:
        return words, False
    lower, range_ = state[E_LOWER], state[E_RANGE]
    n, held = np.int64(state[E_WRITTEN]), np.int64(state[E_HELD])
    scale = range_ >> _PRECISION
    range_ = scale * (np.uint64(cdf[symbol + 1]) - left)
    moved = lower + scale * left  # wraps modulo 2**64
    if held and moved + range_ > moved:  # the carry is settled: release the held words
        if moved < lower:
            first, rest = (state[E_FIRST] + np.uint64(1)) & _WORD_MASK, np.uint64(0)
        else:
            first, rest = state[E_FIRST], _WORD_MASK
        words = _put(words, n, first)
        n += 1
        for _ in range(1, held):
            words = _put(words, n, rest)
            n += 1
        held = 0
    lower = moved
    if range_ < _WORD_ONE:
        range_ <<= _SHIFT
        top = lower >> _SHIFT
        lower <<= _SHIFT
        if held:
            held += 1
        elif lower + range_ > lower:
            words = _put(words, n, top)
            n += 1
        else:
            held = 1
            state[E_FIRST] = top
    state[E_LOWER], state[E_RANGE] = lower, range_
    state[E_WRITTEN], state[E_HELD] = np.uint64(n), np.uint64(held)
    return words, True


@jit
def encode_tables(state: np.ndarray, words: np.ndarray, symbols: np.ndarray,
                  tables: np.ndarray):
    """Encode symbols (N,) each with its count table (N, n) as `quantise` models it;
    returns (the words, the index of the first symbol refused, or -1)."""
    cdf = np.empty(tables.shape[1] + 1, np.uint32)
    for i in range(len(symbols)):
        if not quantise(tables[i], cdf):
            return words, i
        words, ok = encode_symbol(state, words, cdf, symbols[i])
        if not ok:
            return words, i
    return words, -1


def sealed(state: np.ndarray, words: np.ndarray) -> np.ndarray:
    """The complete code of an encoder (constriction's `get_compressed`): the words
    written, the held ones, then a word inside the interval (and a zero word when the
    interval's top has the same first word); nothing at all before the first symbol."""
    lower, range_, n, held, first = (int(v) for v in state)
    if range_ == (1 << 64) - 1:
        return words[:n].copy()
    point = (lower + (1 << 32) - 1) & ((1 << 64) - 1)
    tail = []
    if held:
        tail = ([(first + 1) & _U32_MAX] + [0] * (held - 1) if point < lower
                else [first] + [_U32_MAX] * (held - 1))
    tail.append(point >> 32)
    if ((lower + range_) & ((1 << 64) - 1)) >> 32 == point >> 32:
        tail.append(0)
    return np.concatenate([words[:n], np.array(tail, np.uint32)])


class Encoder:
    """A range encoder with constriction's `RangeEncoder` interface as `entropy` uses it
    (`encode`, `get_compressed`, `pos`, `is_empty`), compiled; `tablecdfs.encode_rows`
    codes into it with models built once and shared."""

    def __init__(self) -> None:
        self.state = native.kernels().encoder_start()
        self.words = np.empty(64, np.uint32)

    def encode(self, symbols: np.ndarray, _family, tables: np.ndarray) -> None:
        """Symbols (N,) each coded with its count table (N, n), float32 or float64 (each
        computes its model in its own type, as constriction does)."""
        k = native.kernels()
        single = np.asarray(tables).dtype == np.float32
        self.words, bad = (k.encode_tables if single else k.encode_tables_wide)(
            self.state, self.words, np.ascontiguousarray(symbols, np.int64),
            np.ascontiguousarray(tables, np.float32 if single else np.float64))
        if bad >= 0:
            raise ValueError(f"symbol {bad} has no probability under its table")

    def get_compressed(self) -> np.ndarray:
        return sealed(self.state, self.words)

    def pos(self) -> tuple[int, tuple[int, int]]:
        """(words written and held, (lower, range)), as constriction's `pos`."""
        return (int(self.state[E_WRITTEN] + self.state[E_HELD]),
                (int(self.state[E_LOWER]), int(self.state[E_RANGE])))

    def is_empty(self) -> bool:
        return int(self.state[E_RANGE]) == (1 << 64) - 1 and not self.state[E_WRITTEN]


def payload_words(payload: bytes, trimmed: bool = True) -> np.ndarray:
    """The uint32 words of a payload written by `rowcast.entropy.finish`: big-endian with
    its zero bytes trimmed (`trimmed`, padded back here) or whole little-endian words."""
    if trimmed:
        payload = payload + bytes(-len(payload) % 4)
    elif len(payload) % 4:
        raise ValueError("payload length is not a whole number of 32-bit words")
    return np.frombuffer(payload, ">u4" if trimmed else "<u4").astype(np.uint32)
