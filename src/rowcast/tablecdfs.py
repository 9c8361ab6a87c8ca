"""The coder's models of the family's tables, shared by the compiled encoder and decoder.

Each row of `tables.all_tables()` (a level and a mean on the family's grid) becomes the
coder's fixed-point distribution (`rangecoder.quantise`) the first time a symbol needs it,
and stays for the process: a batch meets the same few tens of thousands of rows again and
again. Encoding with them (`encode_rows`) writes what constriction writes from the float
tables themselves, without building those tables.
"""

from __future__ import annotations

import functools

import numpy as np

from rowcast import family as fam
from rowcast import native, rangecoder
from rowcast.native import jit
from rowcast.tables import LEVELS, MEANS, SPAN, symbol_columns, symbol_counts


@functools.cache
def cache() -> tuple[np.ndarray, ...]:
    """(symbol_counts, every symbol's column in it, the quantised rows (LEVELS * MEANS,
    257) uint32, which rows are built): its pages are touched only as rows are used."""
    return (symbol_counts(), symbol_columns(np.arange(256)),
            np.zeros((LEVELS * MEANS, 257), np.uint32), np.zeros(LEVELS * MEANS, np.bool_))


@jit(inline="always")
def build_row(row, counts, columns, cdfs, built, table):
    """Quantise `all_tables()` row `row` into cdfs[row] unless it is built (`table`: 256
    float32 of scratch)."""
    if not built[row]:
        level, mu4 = row // MEANS + fam.LS_LO, row % MEANS + fam.MU_LO
        for s in range(256):
            table[s] = counts[columns[s] + level * SPAN - mu4]
        rangecoder.quantise(table, cdfs[row])
        built[row] = True


@jit
def _encode_rows(state, words, symbols, rows, counts, columns, cdfs, built):
    table = np.empty(256, np.float32)
    for i in range(len(symbols)):
        build_row(rows[i], counts, columns, cdfs, built, table)
        words, ok = rangecoder.encode_symbol(state, words, cdfs[rows[i]], symbols[i])
        if not ok:
            return words, i
    return words, -1


def encode_rows(coder: rangecoder.Encoder, symbols: np.ndarray, rows: np.ndarray) -> None:
    """Encode symbols (N,) with the tables of `all_tables()` rows (N,) into `coder`."""
    coder.words, bad = native.kernels().encode_rows(
        coder.state, coder.words, np.ascontiguousarray(symbols, np.int64),
        np.ascontiguousarray(rows, np.int64), *cache())
    if bad >= 0:
        raise ValueError(f"symbol {bad} has no probability under its table")
