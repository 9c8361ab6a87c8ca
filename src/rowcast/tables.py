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


@functools.cache
def _bin_masses() -> tuple[np.ndarray, np.ndarray]:
    """(CDF table flat, strided view of interior bin masses), both float32 (exact: < 2**24).

    Row s of the view holds the masses, plus one, of the bins j = 1..254 for one (level, mean):
    bins sit four quarter pixels apart, so they are every fourth entry of a level's masses.
    """
    cdf = logistic_cdf()
    mass = (cdf[:, 4:] - cdf[:, :-4] + 1).astype(np.float32).ravel()  # bins centred at D_MIN+2+i
    view = as_strided(mass, shape=(mass.size - 4 * 253, 254), strides=(4, 16), writeable=False)
    return cdf.astype(np.float32).ravel(), view


def logistic_tables(mu4: np.ndarray, ls8: np.ndarray) -> np.ndarray:
    """Integer frequency tables (N, 256), as float32, for N subpixels.

    mu4, ls8: integer arrays (N,) on the family's grid. Each count is the logistic's CDF
    difference over the bin (the end bins take the tails) plus one, so every value stays
    codable; each table sums to exactly 2**CDF_BITS + 256, and every entry is an exact
    integer, so the table is the same on every machine.
    """
    cdf, masses = _bin_masses()
    level = ls8 - fam.LS_LO
    at = level * WIDTH - D_MIN - mu4  # flat CDF index of distance 0 for this (level, mean)
    table = np.empty((len(mu4), 256), np.float32)
    table[:, 1:255] = masses[level * (WIDTH - 4) + 2 - D_MIN - mu4]
    table[:, 0] = cdf[at + 2] + 1
    table[:, 255] = (CDF_ONE + 1) - cdf[at + 4 * 254 + 2]
    return table
