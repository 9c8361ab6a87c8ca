"""The encoder's tuning search, compiled: the code lengths of one plane's subpixels under
candidate moves of their levels and means, in one pass over them.

`codec.tuning_of` asks for these lengths about a hundred times an image (every candidate
offset, coupling and gain). numpy computed each from half a dozen temporary arrays of the
candidates' shape; this loop reads each subpixel once per candidate. The lengths are the
same integers (`tables.symbol_lengths` looked up at `tables.count_index`).
"""

from __future__ import annotations

import numpy as np

from rowcast import family as fam
from rowcast import feedback, native
from rowcast.native import jit
from rowcast.rowdecoder import channel_move, edge_median
from rowcast.tables import SPAN, symbol_columns


@jit
def _lengths(lengths, columns, levels, means, d, m, after, out):
    """out[k, i] for d (1 or K, 1 or N) and m (1 or K, 1 or N): each row or column of one
    stands for all."""
    dk, dn, mk, mn = d.shape[0] > 1, d.shape[1] > 1, m.shape[0] > 1, m.shape[1] > 1
    for k in range(out.shape[0]):
        for i in range(out.shape[1]):
            level = min(max(levels[i] + d[k if dk else 0, i if dn else 0], fam.LS_LO),
                        fam.LS_HI) + after[i]
            mu = means[i] + m[k if mk else 0, i if mn else 0]
            level = min(max(level, fam.LS_LO), fam.LS_HI)
            mu = min(max(mu, fam.MU_LO), fam.MU_HI)
            out[k, i] = lengths[columns[i] + level * SPAN - mu]


def _matrix(v: np.ndarray | int) -> np.ndarray:
    """A move as (rows, columns) int64: a scalar (1, 1), (N,) (1, N), (K, 1) or (K, N)."""
    a = np.ascontiguousarray(v, np.int64)
    return a.reshape(1, -1) if a.ndim < 2 else a


def _flat(*arrays: np.ndarray) -> list[np.ndarray]:
    """Each as contiguous int64, as the compiled kernels take them."""
    return [np.ascontiguousarray(a, np.int64) for a in arrays]


def plane_lengths(lengths: np.ndarray, columns: np.ndarray, levels: np.ndarray,
                  means: np.ndarray, d: np.ndarray | int, m: np.ndarray | int,
                  after: np.ndarray | None = None) -> np.ndarray:
    """`symbol_lengths()` at the count index of each subpixel (its `symbol_columns`, level
    and mean (N,)) with the level moved by d and the mean by m, each clamped to the
    family's grid; d and m are scalars, (N,), (K, 1) or (K, N): (N,) or (K, N) out. With
    `after` (N,), the clamped levels move again by it and are clamped again (a tuned
    level's feedback move)."""
    n = len(columns)
    d2, m2 = _matrix(d), _matrix(m)
    rows = max(d2.shape[0], m2.shape[0])
    out = np.empty((rows, n), np.int64)
    after = np.zeros(n, np.int64) if after is None else after
    native.kernels().lengths(*_flat(lengths, columns, levels, means), d2, m2, *_flat(after), out)
    return out if np.ndim(d) == 2 or np.ndim(m) == 2 else out[0]


@jit
def _coupled_sums(lengths, columns, levels, means, ca, cb, ra, rb, da, db, out):
    for k in range(len(out)):
        total = np.int64(0)
        for i in range(len(columns)):
            a = min(max(ca[i] + da[k], -fam.COUPLE_MAX), fam.COUPLE_MAX)
            b = min(max(cb[i] + db[k], -fam.COUPLE_MAX), fam.COUPLE_MAX)
            mu = min(max(means[i] + ((a * ra[i] + b * rb[i] + 8) >> 4), fam.MU_LO), fam.MU_HI)
            total += lengths[columns[i] + levels[i] * SPAN - mu]
        out[k] = total


def coupled_sums(lengths: np.ndarray, columns: np.ndarray, levels: np.ndarray,
                 means: np.ndarray, couplings: tuple, residuals: tuple, da: np.ndarray,
                 db: np.ndarray) -> np.ndarray:
    """The plane's code length (K,) when the channel masks move its means by
    (a ra + b rb + 8) >> 4, with the couplings a = ca + da[k], b = cb + db[k] clamped to
    the family's range, for K pairs of offsets: `couplings` (ca, cb) and `residuals` (ra,
    rb) are (N,) each (zeros for a plane that one coupling moves); levels are as they are."""
    out = np.empty(len(da), np.int64)
    native.kernels().coupled_sums(*_flat(lengths, columns, levels, means, *couplings,
                                         *residuals, da, db), out)
    return out


@jit
def _colour_costs(lengths, out, known, columns, plain, width, totals):
    """totals[0], totals[1]: G's and B's untuned code length on the plain base (the
    network's means and couplings) and on the colour-difference base (neither)."""
    for i in range(len(known)):
        x, y = i % width, i // width
        r0, r1 = known[i, 0] - plain[i, 0], known[i, 1] - plain[i, 1]
        k0 = min(max(out[i, 2 * fam.CHANNELS], -fam.COUPLE_MAX), fam.COUPLE_MAX)
        k1 = min(max(out[i, 2 * fam.CHANNELS + 1], -fam.COUPLE_MAX), fam.COUPLE_MAX)
        k2 = min(max(out[i, 2 * fam.CHANNELS + 2], -fam.COUPLE_MAX), fam.COUPLE_MAX)
        for c in range(1, 3):
            column = columns[i, c]
            level = min(max(out[i, 2 * c + 1], fam.LS_LO), fam.LS_HI) * SPAN
            mean = out[i, 2 * c] + fam.MU_SCALE * plain[i, c] + channel_move(c, k0, k1, k2,
                                                                             r0, r1)
            totals[0] += lengths[column + level - min(max(mean, fam.MU_LO), fam.MU_HI)]
            step = edge_median(known[i - 1, c] - known[i - 1, c - 1] if x else 0,
                               known[i - width, c] - known[i - width, c - 1] if y else 0,
                               (known[i - width - 1, c] - known[i - width - 1, c - 1]
                                if x and y else 0), x, y, 0)
            mean = fam.MU_SCALE * min(max(known[i, c - 1] + step, 0), 255)
            totals[1] += lengths[column + level - min(max(mean, fam.MU_LO), fam.MU_HI)]


def colour_costs(lengths: np.ndarray, out: np.ndarray, known: np.ndarray, plain: np.ndarray,
                 width: int) -> tuple[int, int]:
    """(G's and B's untuned code length on the plain base, on the colour-difference base)
    of an image's pixels in raster order, in one pass: raw outputs (N, outputs), values
    and plain base (N, 3). The lengths are `symbol_lengths()` at `count_index`, as
    `plane_lengths` looks them up; the difference base is `family.difference_base`."""
    totals = np.zeros(2, np.int64)
    native.kernels().colour_costs(*_flat(lengths, out, known, symbol_columns(known), plain),
                                  width, totals)
    return int(totals[0]), int(totals[1])


@jit
def _feedback(means, couplings, residuals, known, ls8, biases, width, surprise, errors, moved,
              sums):
    n, planes = known.shape
    raw = np.empty((n, planes), np.int64)  # each subpixel's own error 4v - m
    q = np.empty((n, planes), np.int64)  # and surprise
    for i in range(n):
        x = i % width
        for c in range(planes):
            mean = means[i, c] + channel_move(c, couplings[i, 0], couplings[i, 1],
                                              couplings[i, 2], residuals[i, 0],
                                              residuals[i, 1])
            raw[i, c] = 4 * known[i, c] - mean
            e = (raw[i - 1, c] if x else 0) + (raw[i - width, c] if i >= width else 0)
            errors[i, c] = e
            moved[i, c] = (biases[c] * e + 16) >> 5
            mu = min(max(mean + moved[i, c], fam.MU_LO), fam.MU_HI)
            q[i, c] = surprise[ls8[i, c] - fam.LS_LO, abs(4 * known[i, c] - mu)]
            total = ((q[i - 1, c] if x else feedback.NEUTRAL)
                     + (q[i - width, c] if i >= width else feedback.NEUTRAL))
            for earlier in range(c):
                total += q[i, earlier]
            sums[i, c] = total


def feedback_arrays(means: np.ndarray, couplings: np.ndarray, residuals: np.ndarray,
                    known: np.ndarray, ls8: np.ndarray, biases: np.ndarray,
                    width: int) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """An image's feedback in one pass over its subpixels, in raster order (`feedback`'s
    definitions): (e_left + e_up, the mean moves of the bias gains, the surprises' sums S),
    each (N, P) int64. means, couplings, residuals and ls8 are (N, 3); known, the values,
    (N, P); biases (3,). A subpixel's error is 4v - m, m its mean moved by the channel
    couplings; its surprise is measured from that mean moved by the bias gain."""
    shape = known.shape
    errors, moved, sums = (np.empty(shape, np.int64) for _ in range(3))
    native.kernels().feedback(*_flat(means, couplings, residuals, known, ls8, biases), width,
                              feedback.surprise_table(), errors, moved, sums)
    return errors, moved, sums
