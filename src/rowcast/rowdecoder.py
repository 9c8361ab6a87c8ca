"""The decoder's compiled loop: a batch of images one row at a time, and inside the row every
pixel's head, parameters, tuning, feedback, frequency table and range decoding without a
return to Python.

It computes exactly what `codec._decode_rows` computes, which stays the reference that the
tests hold it against (same pixels on golden archives and random images). The row stack
still runs once per row on numpy (`Engine.row_features`); the head runs here in integers:
int8 weights times 0..255 activations summed in int32 (every layer's bound is far below
2**31, checked in `Kernel.of`), requantised as the model file defines it. Tables become
the coder's fixed-point distributions with `rangecoder.quantise`; a single component's are
cached per table row, so each is built once per process.

numba compiles the loop on first use and caches the machine code beside the module (or in
NUMBA_CACHE_DIR), so only the first run on a machine pays for compiling.
"""

from __future__ import annotations

import functools
from dataclasses import dataclass

import numpy as np
from numba import njit

from rowcast import entropy, feedback, rangecoder
from rowcast import family as fam
from rowcast.intkernels import requantised
from rowcast.predictor import Engine
from rowcast.tables import LEVELS, MEANS, SPAN, symbol_counts

INT32_SAFE = 1 << 31  # a layer whose bound reaches this is left to the reference decoder


class Stream:
    """A range decoder over one payload's code, for `codec.open_payloads`: it decodes the
    tuning fields ahead of the pixels, then hands its state to the compiled loop."""

    def __init__(self, payload: bytes, trimmed: bool = True) -> None:
        if trimmed:
            payload += bytes(-len(payload) % 4)
        elif len(payload) % 4:
            raise entropy.PayloadError("payload length is not a whole number of 32-bit words")
        order = ">u4" if trimmed else "<u4"
        self.words = np.frombuffer(payload, order).astype(np.uint32)
        self.state = rangecoder.decoder_start(self.words)

    def decode(self, _family, tables: np.ndarray) -> np.ndarray:
        """One symbol for each table (rows, values), as constriction's decoder does."""
        out = np.empty(len(tables), np.int64)
        for i, table in enumerate(np.asarray(tables, np.float32)):
            cdf = np.empty(len(table) + 1, np.uint32)
            rangecoder.quantise(table, cdf)
            out[i] = rangecoder.decode_symbol(self.state, self.words, cdf)
            if out[i] < 0:
                raise entropy.PayloadError("a payload is not what its model codes")
        return out


@dataclass(frozen=True)
class Kernel:
    """A model's head in the integers the loop takes: head 1's weights of the pixels to the
    left (left, 3, hidden) int32, head 2's and the output layer's transposed (cout, cin)
    int16, and each layer's bias, multiplier, shift."""

    left: np.ndarray
    m1: np.ndarray
    s1: int
    w2: np.ndarray
    b2: np.ndarray
    m2: np.ndarray
    s2: int
    w3: np.ndarray
    b3: np.ndarray
    m3: np.ndarray
    s3: int
    stack: tuple  # the row stack's layers: (weights (cout, 2, kw * cin) int16, bias, mult,
    # shift) each
    rows: np.ndarray  # head 1's weights of the row stack's features (width, hidden)
    valid: np.ndarray  # head 1's bias plus the valid planes' terms, (left + 1, hidden) int64
    activity: np.ndarray | None  # head 1's weights of the activity inputs (3, hidden)

    @classmethod
    def of(cls, engine: Engine) -> Kernel | None:
        """The kernel of an engine's model, or None when a bound rules int32 out."""
        model = engine.model
        if any(layer.bound >= INT32_SAFE for layer in model.layers):
            return None
        h1, h2, out = engine.head1, engine.head2, engine.out
        w1 = h1.weight[:, :, 0, 0].T.astype(np.int64)  # (inputs, hidden)
        width, left = model.width, model.left
        by_pixel = w1[width : width + 4 * left].reshape(left, 4, -1)
        valid = np.concatenate([np.zeros((1, w1.shape[1]), np.int64),
                                np.cumsum(255 * by_pixel[:, 3], axis=0)]) + h1.bias
        return cls(np.ascontiguousarray(by_pixel[:, :3], np.int32), h1.mult, h1.shift,
                   np.ascontiguousarray(h2.weight[:, :, 0, 0], np.int16), h2.bias, h2.mult,
                   h2.shift, np.ascontiguousarray(out.weight[:, :, 0, 0], np.int16), out.bias,
                   out.mult, out.shift,
                   tuple((np.ascontiguousarray(layer.weight.transpose(0, 2, 3, 1)
                                               .reshape(len(layer.weight), 2, -1), np.int16),
                          layer.bias, layer.mult, layer.shift) for layer in engine.rows),
                   w1[:width].astype(engine._w1_rows.dtype), valid,
                   w1[len(w1) - 3 :] if model.activity else None)

    def start(self, batch: int, width: int) -> list[np.ndarray]:
        """Each stack layer's input rows before row 0, (B, 2, W + kw - 1, cin) int16: the
        previous and the current row with kw // 2 zero columns either side."""
        return [np.zeros((batch, 2, width + w.shape[2] // cin - 1, cin), np.int16)
                for (w, *_), cin in zip(self.stack, self._inputs(), strict=True)]

    def _inputs(self) -> list[int]:
        return [4] + [len(w) for w, *_ in self.stack[:-1]]

    def row_features(self, state: list[np.ndarray], above: np.ndarray | None) -> np.ndarray:
        """`Engine.row_features` in integers: advance the row stack by one row (`above`:
        the last decoded row (B, 3, W) uint8, or None before row 0) and return its output
        for the new row, (B, W, width) int16."""
        batch, width = state[0].shape[0], state[0].shape[2] - self.stack[0][0].shape[2] // 4 + 1
        a = np.zeros((batch, width, 4), np.int16)
        if above is not None:
            a[..., :3] = above.transpose(0, 2, 1)
            a[..., 3] = 255
        for pair, (w, bias, mult, shift) in zip(state, self.stack, strict=True):
            pad = (pair.shape[2] - width) // 2
            pair[:, 0] = pair[:, 1]
            pair[:, 1, pad : pad + width] = a
            a = np.empty((batch, width, len(w)), np.int16)
            _stack_layer(pair.reshape(batch, 2, -1), pair.shape[3], w, bias, mult, shift, a)
        return a

    def head_rows(self, feats: np.ndarray, activity: np.ndarray) -> np.ndarray:
        """Head 1's accumulators (W, B, hidden) int32 of a row, every term but the RGB of
        the pixels to the left, from the row stack's features (B, W, width). A BLAS
        product in the float type whose exactness the layer's bound proves (`Engine`):
        faster here than the compiled loop's int32 (measured)."""
        acc = (feats.transpose(1, 0, 2).astype(self.rows.dtype) @ self.rows).astype(np.int64)
        acc += self.valid[np.minimum(np.arange(len(acc)), len(self.left))][:, None]
        if self.activity is not None:
            acc += activity.astype(np.int64) @ self.activity
        return acc.astype(np.int32)


@functools.cache
def kernel_of(engine: Engine) -> Kernel | None:
    """The compiled loop's kernel of an engine, made once per engine."""
    return Kernel.of(engine)


@functools.cache
def _lookups() -> tuple[np.ndarray, ...]:
    """(symbol_counts, each symbol's column in it, surprise table, feedback tables of 2, 3
    and 4 terms padded to SUMS, the cache of quantised tables, which rows it holds)."""
    symbols = np.arange(256)
    kind = (symbols > 0).astype(np.int64) + (symbols == 255)
    columns = (kind * LEVELS - fam.LS_LO) * SPAN + fam.MU_HI + 4 * symbols
    sums = 4 * feedback.Q_MAX + 1
    ftab = np.stack([np.pad(feedback.feedback_table(c + 2),
                            (0, sums - len(feedback.feedback_table(c + 2))), mode="edge")
                     for c in range(fam.CHANNELS)])
    cdfs = np.zeros((LEVELS * MEANS, 257), np.uint32)  # pages are touched only as used
    return (symbol_counts(), columns, feedback.surprise_table(), ftab, cdfs,
            np.zeros(LEVELS * MEANS, np.bool_))


def decode_rows(engine: Engine, kernel: Kernel, streams: list[Stream], tune, planes: int,
                height: int, width: int, progress) -> np.ndarray:
    """Decode same-sized images from their streams (tuning fields already read) into
    (B, P, H, W) uint8: `codec._decode_rows` compiled. `tune` is the batch's `codec.Tune`
    or None."""
    batch = len(streams)
    img = np.zeros((batch, 3, height, width), np.uint8)
    state = kernel.start(batch, width)
    misses = np.zeros((batch, 3), np.int64)
    tuned = tune is not None
    zeros = np.zeros((batch, 3), np.int64)
    levels = tune.levels if tuned else np.zeros(1, np.int64)
    origin = tune.origin if tuned else zeros
    couplings = tune.couplings if tuned else zeros
    gains = tune.gains if tuned else zeros
    biases = tune.biases if tuned else zeros
    active = tuned and tune.feedback
    q = np.full((2, width, 3, batch), feedback.NEUTRAL, np.int64)  # above, this row
    e = np.zeros((2, width, 3, batch), np.int64)
    states = np.stack([s.state for s in streams])
    ends = np.cumsum([len(s.words) for s in streams])
    words = np.concatenate([s.words for s in streams] + [np.zeros(0, np.uint32)])
    hidden = kernel.left.shape[2]
    scratch = (np.empty((batch, hidden), np.int16), np.empty((batch, len(kernel.b2)), np.int16),
               np.empty((batch, len(kernel.b3)), np.int64))
    counts, columns, surprise, ftab, cdfs, built = _lookups()
    for y in range(height):
        above = img[:, :, y - 1] if y else None
        feats = kernel.row_features(state, above)
        acc = kernel.head_rows(feats, fam.activity_from_sums(misses, y, width))
        bad = _row(y, acc, img, planes, kernel.left, kernel.m1, kernel.s1, kernel.w2,
                   kernel.b2, kernel.m2, kernel.s2, kernel.w3, kernel.b3, kernel.m3, kernel.s3,
                   tuned, levels, origin, couplings, active, gains, biases, q, e, misses,
                   counts, columns, surprise, ftab, cdfs, built, states, words, ends, *scratch)
        if bad:
            raise entropy.PayloadError("a payload is not what its model codes (damaged data, "
                                       "or another model)")
        q[[0, 1]], e[[0, 1]] = q[[1, 0]], e[[1, 0]]
        progress(batch)
    return img[:, :planes]


@njit(cache=True, nogil=True)
def _dense(a, w, bias, mult, shift, relu, out):
    """out[b] = the requantised a[b] @ w.T + bias: int16 products summed in int32, then a
    separate requantising loop (kept apart, and the sums kept in int32, so that both
    vectorise: 3x faster, measured)."""
    acc = np.empty(w.shape[0], np.int32)
    for b in range(a.shape[0]):
        for j in range(w.shape[0]):
            s = np.int32(0)
            for k in range(w.shape[1]):
                s += np.int32(a[b, k]) * np.int32(w[j, k])
            acc[j] = s
        for j in range(w.shape[0]):
            out[b, j] = requantised(np.int64(acc[j]) + bias[j], mult[j], shift, relu)


@njit(cache=True, nogil=True)
def _stack_layer(pair, cin, w, bias, mult, shift, out):
    """One row of a row-stack layer: out[b, x] (cout,) from the input's previous and current
    rows `pair` (B, 2, (W + kw - 1) * cin) int16, zero columns either side, and the weights
    w (cout, 2, kw * cin). A pixel's window is copied into one contiguous vector first:
    then the dot products vectorise (17x faster than indexing the rows, measured)."""
    span = w.shape[2]
    window = np.empty(2 * span, np.int16)
    flat = w.reshape(w.shape[0], 2 * span)
    acc = np.empty(w.shape[0], np.int32)
    for b in range(out.shape[0]):
        for x in range(out.shape[1]):
            window[:span] = pair[b, 0, x * cin : x * cin + span]
            window[span:] = pair[b, 1, x * cin : x * cin + span]
            for o in range(w.shape[0]):
                s = np.int32(0)
                for k in range(2 * span):
                    s += np.int32(window[k]) * np.int32(flat[o, k])
                acc[o] = s
            for o in range(w.shape[0]):
                out[b, x, o] = requantised(np.int64(acc[o]) + bias[o], mult[o], shift, True)



@njit(cache=True, nogil=True)
def _head(x, y, acc, img, wl, m1, s1, w2, b2, m2, s2, w3, b3, m3, s3, a1, a2, raw):
    """The raw outputs (B, outputs) of column x into `raw`."""
    batch, hidden = acc.shape[1], acc.shape[2]
    n = min(x, wl.shape[0])
    h1 = np.empty(hidden, np.int32)
    for b in range(batch):
        h1[:] = acc[x, b]
        for d in range(1, n + 1):
            for c in range(3):
                v = np.int32(img[b, c, y, x - d])
                if v:
                    for k in range(hidden):
                        h1[k] += v * wl[d - 1, c, k]
        for k in range(hidden):
            a1[b, k] = requantised(np.int64(h1[k]), m1[k], s1, True)
    _dense(a1, w2, b2, m2, s2, True, a2)
    _dense(a2, w3, b3, m3, s3, False, raw)


@njit(cache=True, nogil=True)
def _clamp(v, lo, hi):
    return min(max(v, lo), hi)


@njit(cache=True, nogil=True)
def _single_cdf(row, counts, columns, cdfs, built, table):
    """The quantised table of `all_tables()` row `row`, built on first use."""
    if not built[row]:
        level, mu4 = row // MEANS + fam.LS_LO, row % MEANS + fam.MU_LO
        for s in range(256):
            table[s] = counts[columns[s] + level * SPAN - mu4]
        rangecoder.quantise(table, cdfs[row])
        built[row] = True
    return cdfs[row]


@njit(cache=True, nogil=True)
def _row(y, acc, img, planes, wl, m1, s1, w2, b2, m2, s2, w3, b3, m3, s3, tuned, levels, origin,
         couplings, active, gains, biases, q, e, misses, counts, columns, surprise, ftab,
         cdfs, built, states, words, ends, a1, a2, raw):
    """Decode row y of every image in place; returns 1 when a payload is not decodable."""
    batch, width = img.shape[0], img.shape[3]
    two = raw.shape[1] > fam.OUTPUTS
    table = np.empty(256, np.float32)
    other = np.empty(256, np.float32)
    mixed_cdf = np.empty(257, np.uint32)
    base = np.empty(3, np.int64)
    mean = np.empty(3, np.int64)
    ls8 = np.empty(3, np.int64)
    cp = np.empty(3, np.int64)
    res = np.zeros(3, np.int64)
    for x in range(width):
        _head(x, y, acc, img, wl, m1, s1, w2, b2, m2, s2, w3, b3, m3, s3, a1, a2, raw)
        for b in range(batch):
            for c in range(3):
                if y == 0:
                    base[c] = np.int64(img[b, c, 0, x - 1]) if x else 128
                elif x == 0:
                    base[c] = img[b, c, y - 1, 0]
                else:
                    left, up = np.int64(img[b, c, y, x - 1]), np.int64(img[b, c, y - 1, x])
                    corner = np.int64(img[b, c, y - 1, x - 1])
                    base[c] = _clamp(left + up - corner, min(left, up), max(left, up))
                mean[c] = raw[b, 2 * c] + fam.MU_SCALE * base[c]
                ls8[c] = _clamp(raw[b, 2 * c + 1], fam.LS_LO, fam.LS_HI)
                cp[c] = _clamp(raw[b, 2 * fam.CHANNELS + c], -fam.COUPLE_MAX, fam.COUPLE_MAX)
                if tuned:
                    cp[c] = _clamp(cp[c] + couplings[b, c], -fam.COUPLE_MAX, fam.COUPLE_MAX)
            earlier = 0
            for c in range(planes):
                if c == 0:
                    move = 0
                elif c == 1:
                    move = (cp[0] * res[0] + 8) >> 4
                else:
                    move = (cp[1] * res[0] + cp[2] * res[1] + 8) >> 4
                offset = levels[origin[b, c] + ls8[c]] if tuned else 0
                level = _clamp(ls8[c] + offset, fam.LS_LO, fam.LS_HI)  # tuned
                shift, feedback_f = 0, 0
                if active:
                    near = q[0, x, c, b] + (q[1, x - 1, c, b] if x else feedback.NEUTRAL)
                    feedback_f = ftab[c, near + earlier]
                    errors = e[0, x, c, b] + (e[1, x - 1, c, b] if x else 0)
                    shift = (biases[b, c] * errors + 16) >> 5
                    moved = level + ((gains[b, c] * feedback_f + 8) >> 4)
                else:
                    moved = level
                ahead = mean[c] + move
                mu = _clamp(ahead + shift, fam.MU_LO, fam.MU_HI)
                row = (_clamp(moved, fam.LS_LO, fam.LS_HI) - fam.LS_LO) * MEANS + mu - fam.MU_LO
                if not two:
                    cdf = _single_cdf(row, counts, columns, cdfs, built, table)
                else:
                    k = fam.OUTPUTS + 3 * c
                    weight = _clamp(raw[b, k + 2], 0, fam.WEIGHT_ONE)
                    level_b = _clamp(_clamp(raw[b, k + 1], fam.LS_LO, fam.LS_HI) + offset,
                                     fam.LS_LO, fam.LS_HI)
                    if active:
                        level_b = level_b + ((gains[b, c] * feedback_f + 8) >> 4)
                    mu_b = _clamp(raw[b, k] + fam.MU_SCALE * base[c] + move + shift,
                                  fam.MU_LO, fam.MU_HI)
                    row_b = ((_clamp(level_b, fam.LS_LO, fam.LS_HI) - fam.LS_LO) * MEANS
                             + mu_b - fam.MU_LO)
                    if weight == fam.WEIGHT_ONE:
                        cdf = _single_cdf(row, counts, columns, cdfs, built, table)
                    elif weight == 0:
                        cdf = _single_cdf(row_b, counts, columns, cdfs, built, table)
                    else:
                        la, ma = row // MEANS + fam.LS_LO, row % MEANS + fam.MU_LO
                        lb, mb = row_b // MEANS + fam.LS_LO, row_b % MEANS + fam.MU_LO
                        for s in range(256):
                            table[s] = counts[columns[s] + la * SPAN - ma]
                            other[s] = counts[columns[s] + lb * SPAN - mb]
                            table[s] = (np.float32(weight) * table[s]
                                        + np.float32(fam.WEIGHT_ONE - weight) * other[s])
                        rangecoder.quantise(table, mixed_cdf)
                        cdf = mixed_cdf
                start = ends[b - 1] if b else 0
                value = rangecoder.decode_symbol(states[b], words[start : ends[b]], cdf)
                if value < 0:
                    return 1
                img[b, c, y, x] = value
                res[c] = value - base[c]
                if active:
                    e[1, x, c, b] = 4 * value - ahead
                    qv = surprise[level - fam.LS_LO, abs(4 * value - mu)]
                    q[1, x, c, b] = qv
                    earlier += qv
            if planes == 1:
                img[b, 1, y, x] = img[b, 0, y, x]
                img[b, 2, y, x] = img[b, 0, y, x]
                res[1] = res[0]
                res[2] = res[0]
            for c in range(3):
                misses[b, c] += abs(res[c])
    return 0
