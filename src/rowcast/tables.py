"""Integer frequency tables for the range coder, from the network's integer parameters.

No platform maths at run time: the logistic CDF on the family's grid is a committed integer
table (`data/logistic_cdf.npy`), computed once with Python's decimal arithmetic, which is
correctly rounded and identical everywhere; `exact_logistic_cdf` recomputes any entry so the
tests can check the committed file. Everything after that is integer numpy.
"""

from __future__ import annotations

import decimal
import functools
from importlib import resources

import numpy as np
from numpy.lib.stride_tricks import as_strided

from rowcast import family as fam

LEVELS = fam.LS_HI - fam.LS_LO + 1  # log-scale levels
# Distance, in quarter pixels, from a mean to a bin boundary j + 1/2 (j = 0..254).
D_MAX = 4 * 254 + 2 - fam.MU_LO
D_MIN = 2 - fam.MU_HI
WIDTH = D_MAX - D_MIN + 1  # CDF table columns per level
MEANS = fam.MU_HI - fam.MU_LO + 1  # means on the grid
CDF_ONE = 1 << fam.CDF_BITS
TABLE_TOTAL = CDF_ONE + 256  # what every table sums to
_CTX = decimal.Context(prec=40, rounding=decimal.ROUND_HALF_UP)


def exact_logistic_cdf(level: int, d4: int) -> int:
    """round(2**CDF_BITS * sigmoid((d4/4) * exp(-ls))) for ls = (level + LS_LO)/8, exactly."""
    inv_scale = _CTX.exp(_CTX.divide(decimal.Decimal(-(level + fam.LS_LO)), fam.LS_SCALE))
    z = _CTX.multiply(_CTX.divide(decimal.Decimal(d4), fam.MU_SCALE), inv_scale)
    p = _CTX.divide(1, _CTX.add(1, _CTX.exp(-z)))
    return int(_CTX.multiply(p, CDF_ONE).quantize(decimal.Decimal(1)))


def build_logistic_cdf() -> np.ndarray:
    """The whole (LEVELS, D_MAX - D_MIN + 1) CDF table; slow (seconds), used to make the file."""
    return np.array([[exact_logistic_cdf(lv, d) for d in range(D_MIN, D_MAX + 1)]
                     for lv in range(LEVELS)], dtype=np.int32)


@functools.cache
def logistic_cdf() -> np.ndarray:
    """The committed CDF table, checked for shape and monotonicity on load."""
    with resources.files("rowcast").joinpath("data/logistic_cdf.npy").open("rb") as fh:
        table = np.load(fh)  # plain arrays only: numpy refuses object arrays by default
    if table.shape != (LEVELS, WIDTH) or table.dtype != np.int32:
        raise RuntimeError("rowcast/data/logistic_cdf.npy does not match the family grid")
    if (np.diff(table, axis=1) < 0).any() or table.min() < 0 or table.max() > CDF_ONE:
        raise RuntimeError("rowcast/data/logistic_cdf.npy is not a CDF table")
    return table


LENGTH_ONE = 1 << 16  # the encoder's search counts code lengths in 1/65536 bit


@functools.cache
def code_lengths(weight_one: int = 1) -> np.ndarray:
    """L[n] = round(2**16 log2(weight_one * TABLE_TOTAL / n)) for n = 1 .. weight_one *
    TABLE_TOTAL (L[0] unused), int64: the code length of a count n of a table that sums to
    weight_one * TABLE_TOTAL (1 for one component, WEIGHT_ONE for two), in 1/LENGTH_ONE bit.

    The encoder's search sums these integers, so it chooses alike on every machine and for
    any summation order. float64 log2 errs by a few ulps at most, about 1e-9 here, and no
    exact value lies within 4e-7 of a rounding boundary (tested over the whole range), so
    every platform builds the same table."""
    n = np.arange(weight_one * TABLE_TOTAL + 1, dtype=np.float64)
    n[0] = 1.0
    return np.floor(np.log2(weight_one * TABLE_TOTAL / n) * LENGTH_ONE + 0.5).astype(np.int64)


@functools.cache
def all_tables() -> np.ndarray:
    """Every table of the grid, (LEVELS * MEANS, 256) float32 (exact: counts < 2**24).

    Row level * MEANS + (mu4 - MU_LO) holds the counts for one (level, mean): each interior
    bin's CDF difference plus one, the end bins the tails plus one. Column k of a level's CDF
    is distance k + D_MIN; bin j's upper boundary sits at distance 4j + 2 - mu4. 60 MB, built
    once, so that a table costs one row copy.
    """
    cdf = logistic_cdf()
    mass = (cdf[:, 4:] - cdf[:, :-4] + 1).astype(np.float32)  # (LEVELS, WIDTH - 4)
    # interior[level, MU_HI - mu4, j - 1] = mass of bin j: mass[level, MU_HI - mu4 + 4(j-1)]
    interior = as_strided(mass, shape=(LEVELS, MEANS, 254), strides=(mass.strides[0], 4, 16),
                          writeable=False)
    tables = np.empty((LEVELS, MEANS, 256), np.float32)
    tables[:, :, 0] = cdf[:, MEANS - 1 :: -1] + 1
    tables[:, :, 1:255] = interior[:, ::-1]
    last = 4 * 254  # column of bin 254's upper boundary for mean MU_HI
    tables[:, :, 255] = (CDF_ONE + 1) - cdf[:, last + MEANS - 1 : last - 1 : -1]
    tables.flags.writeable = False
    return tables.reshape(LEVELS * MEANS, 256)


# A count depends on the level, on 4 x symbol - mean and on whether the symbol is an end bin:
# `symbol_counts` lays them out by (kind: 0, interior, 255; level; MU_HI - mu4 + 4 x symbol).
SPAN = WIDTH + 4


@functools.cache
def symbol_counts() -> np.ndarray:
    """Every count of `all_tables()` in 1.4 MB instead of 60, (3 * LEVELS * SPAN,) int64:
    `all_tables()[table_rows(mu4, ls8), x]` is at `count_index(mu4, ls8, symbol_columns(x))`.

    Bin x's boundaries sit at distances 4x - 2 - mu4 and 4x + 2 - mu4, CDF columns k and
    k + 4 for k = MU_HI - mu4 + 4x - 4: interior bins count cdf[k + 4] - cdf[k] + 1, bin 0
    cdf[k + 4] + 1 and bin 255 CDF_ONE + 1 - cdf[k]. Columns no symbol reaches hold 1.
    """
    cdf = logistic_cdf().astype(np.int64)
    counts = np.ones((3, LEVELS, SPAN), np.int64)
    counts[0, :, :-4] = cdf + 1
    counts[1, :, 4:-4] = cdf[:, 4:] - cdf[:, :-4] + 1
    counts[2, :, 4:] = (CDF_ONE + 1) - cdf
    counts.flags.writeable = False
    return counts.reshape(-1)


@functools.cache
def symbol_lengths() -> np.ndarray:
    """`code_lengths()` of every entry of `symbol_counts()`: one lookup per code length."""
    lengths = code_lengths()[symbol_counts()]
    lengths.flags.writeable = False
    return lengths


def symbol_columns(symbols: np.ndarray) -> np.ndarray:
    """The part of `count_index` that the symbols (0..255) fix: their kind and 4 x symbol."""
    kind = (symbols > 0).astype(np.int64) + (symbols == 255)
    return (kind * LEVELS - fam.LS_LO) * SPAN + fam.MU_HI + 4 * symbols.astype(np.int64)


def count_index(mu4: np.ndarray, ls8: np.ndarray, columns: np.ndarray) -> np.ndarray:
    """Where `symbol_counts()` holds the count of each symbol (by its `symbol_columns`) in
    the table of mean mu4 and level ls8."""
    return columns + ls8 * SPAN - mu4


def table_rows(mu4: np.ndarray, ls8: np.ndarray) -> np.ndarray:
    """The row of `all_tables()` that holds each subpixel's table."""
    return (ls8 - fam.LS_LO) * MEANS + (mu4 - fam.MU_LO)


def logistic_tables(mu4: np.ndarray, ls8: np.ndarray) -> np.ndarray:
    """Integer frequency tables (N, 256), as float32, for N subpixels.

    mu4, ls8: integer arrays (N,) on the family's grid. Each count is the logistic's CDF
    difference over the bin (the end bins take the tails) plus one, so every value stays
    codable; each table sums to exactly 2**CDF_BITS + 256, and every entry is an exact
    integer, so the table is the same on every machine.
    """
    return np.take(all_tables(), table_rows(mu4, ls8), axis=0, mode="clip")  # rows in range


def mixture_tables(rows_a: np.ndarray, rows_b: np.ndarray, weight: np.ndarray) -> np.ndarray:
    """Tables (N, 256) of two-component subpixels: weight x table a + (64 - weight) x table b
    for rows of `all_tables()` and weights 0..64; a weight of 64 (or 0) gives table a (or b)
    itself, so the decoder can use its prebuilt model. Exact: sums are at most 64 x 65792."""
    tables = all_tables()
    w = weight.astype(np.float32)[:, None]
    mixed = np.take(tables, rows_a, axis=0)
    mixed *= w
    other = np.take(tables, rows_b, axis=0)
    other *= fam.WEIGHT_ONE - w
    mixed += other
    if (weight % fam.WEIGHT_ONE == 0).any():  # rare: keep the decoder's code path lean
        pure_a, pure_b = weight == fam.WEIGHT_ONE, weight == 0
        mixed[pure_a] = tables[rows_a[pure_a]]
        mixed[pure_b] = tables[rows_b[pure_b]]
    return mixed
