"""The range coder: constriction's, fed with our integer frequency tables.

Tables reach constriction as float32 arrays of exact integers; its categorical model turns
them into fixed-point probabilities with deterministic IEEE arithmetic, so
encoder and decoder on any machine build the same model from the same table.
"""

from __future__ import annotations

import constriction
import numpy as np

FAMILY = constriction.stream.model.Categorical(perfect=False)


class PayloadError(Exception):
    """A payload that cannot be decoded."""


def encoder():
    """A fresh range encoder; feed it with `encode` (any number of calls): the compiled
    one (`rangecoder.Encoder`), which writes constriction's bytes."""
    from rowcast.rangecoder import Encoder  # numba: only when coding

    return Encoder()


def encode(coder, symbols: np.ndarray, tables: np.ndarray) -> None:
    """Append symbols (N,) in 0..255 coded with their tables (N, 256)."""
    coder.encode(symbols.astype(np.int32), FAMILY, tables)


def finish(coder, trimmed: bool = True) -> bytes:
    """The payload: the coder's 32-bit words, little-endian, or `trimmed` (format 6 on):
    big-endian with the last word chosen to end in as many zero bytes as it can, and the
    trailing zero bytes dropped (`ending_word`); the decoder reads zeros past the end."""
    words = coder.get_compressed()
    if not trimmed:
        return words.astype("<u4").tobytes()
    if not coder.is_empty():
        end, (lower, width) = coder.pos()
        last = ending_word(lower, width)
        if last is not None:
            words = np.append(words[:end], np.uint32(last))
    return words.astype(">u4").tobytes().rstrip(b"\0")


def ending_word(lower: int, width: int) -> int | None:
    """The word that ends the code with the most trailing zero bits: the coder's state is
    the interval [lower, lower + width) of 64-bit values, and its top word followed by
    zeros must lie inside it (without a carry into the words before: None if no such word,
    and then the coder's own ending stays). constriction writes the smallest such word."""
    first = -(-lower >> 32)  # ceil(lower / 2**32)
    last = (min(lower + width, 1 << 64) - 1) >> 32
    if first > last:
        return None
    bits = (first ^ last).bit_length()  # first and last share their bits above `bits`
    if not bits or first % (1 << bits) == 0:
        return first  # that prefix then zeros
    return last >> (bits - 1) << (bits - 1)  # the prefix, a one, then zeros


def decoder(payload: bytes, trimmed: bool = True):
    """A range decoder over a payload written by `finish` (as it was `trimmed` or not)."""
    if trimmed:
        payload += bytes(-len(payload) % 4)
    elif len(payload) % 4:
        raise PayloadError("payload length is not a whole number of 32-bit words")
    order = ">u4" if trimmed else "<u4"
    return constriction.stream.queue.RangeDecoder(np.frombuffer(payload, order).astype(np.uint32))


def model_of(table: np.ndarray):
    """The coder's model of one table (256,)."""
    return constriction.stream.model.Categorical(table, perfect=False)


class Models(dict):
    """constriction models of the rows of a table array, each built on first use.

    Decoding one symbol with a built model costs about a tenth of passing its table
    (measured: 0.2 vs 2.4 us), and the same few tens of thousands of tables recur all
    through a batch. The model is what the family builds from the same table row.
    """

    def __init__(self, tables: np.ndarray) -> None:
        super().__init__()
        self.tables = tables

    def __missing__(self, row: int):
        model = model_of(self.tables[row])
        self[row] = model
        return model


def cross_entropy_bits(symbols: np.ndarray, tables: np.ndarray,
                       total: float | None = None) -> float:
    """The model's cross-entropy in bits: the floor that the payload approaches.

    `total` is every table's sum when it is known in advance (it saves a pass).
    """
    counts = tables[np.arange(len(symbols)), symbols].astype(np.float64)
    sums = tables.sum(axis=1, dtype=np.float64) if total is None else total
    return float(-np.log2(counts / sums).sum())
