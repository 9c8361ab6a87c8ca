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


def encoder() -> constriction.stream.queue.RangeEncoder:
    """A fresh range encoder; feed it with `encode` (any number of calls)."""
    return constriction.stream.queue.RangeEncoder()


def encode(coder, symbols: np.ndarray, tables: np.ndarray) -> None:
    """Append symbols (N,) in 0..255 coded with their tables (N, 256)."""
    coder.encode(symbols.astype(np.int32), FAMILY, tables)


def finish(coder) -> bytes:
    """The payload: the coder's 32-bit words, little-endian."""
    return coder.get_compressed().astype("<u4").tobytes()


def decoder(payload: bytes):
    """A range decoder over a payload written by `finish`."""
    if len(payload) % 4:
        raise PayloadError("payload length is not a whole number of 32-bit words")
    return constriction.stream.queue.RangeDecoder(np.frombuffer(payload, "<u4").astype(np.uint32))


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
