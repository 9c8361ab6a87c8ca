"""Feedback from the decoded neighbours: how far they fell from their predictions moves the
next subpixel's mean and scale, with per-image gains chosen by the encoder.

A network trained on many images is right on average; within one image its misses come in
patches (grain on a textured wall, sensor noise in the shadows, an edge it keeps under- or
over-shooting), and a pixel's channels miss together. Two integer signals carry this:

* the *error* of a coded subpixel, e = 4v - m (quarter pixels), with v its value and m its
  mean after the channel couplings and before any clamp or feedback. A subpixel's mean
  moves by floor((b (e_left + e_up) + 16) / 32), the same plane's errors at the left and
  upper pixels (0 outside the image), for the image's bias gain b of that plane (-8..7);
* the *surprise* q = min(63, floor(|4v - mu4| exp(-l/8) + 1/2)): the distance of the value
  from its final mean mu4 in quarters of its scale, l being the tuned level before this
  feedback. Before channel c of a pixel is coded, S is the sum of the surprises of the same
  channel at the left and at the upper pixel and of the channels already coded in this
  pixel (n = c + 2 terms; a neighbour outside the image counts as NEUTRAL, a miss of one
  scale), and F = floor(8 (log2(1 + S / 4n) - 1) + 1/2), which is 0 when the neighbours
  missed by one scale on average. The level moves by floor((k F + 8) / 16) for the image's
  scale gain k of that channel (0..15): the scale widens after surprises and narrows after
  hits, the more so the larger k.

The surprise tables are integers computed with Python's decimal arithmetic, which is
correctly rounded and the same everywhere; at run time everything is integer arithmetic.
The encoder computes a whole image's feedback in one compiled pass
(`tuningkernel.feedback_arrays`), the decoders pixel by pixel.
"""

from __future__ import annotations

import decimal
import functools

import numpy as np

from rowcast import family as fam

Q_MAX = 63  # surprises saturate at 63 quarter scales (about 16 scales)
NEUTRAL = 4  # the surprise of a neighbour outside the image: one scale
GAINS = np.arange(16)  # a scale gain is one 4-bit nibble (negative ones were no use)
BIASES = np.arange(-8, 8)  # a bias gain is one signed 4-bit nibble
DISTANCES = fam.MU_HI + 1  # |4v - mu4| <= max(4 * 255 - MU_LO, MU_HI) = MU_HI
_CTX = decimal.Context(prec=40)
_LN2 = _CTX.ln(2)


@functools.cache
def surprise_table() -> np.ndarray:
    """q for every level and distance, (LEVELS, DISTANCES) int64: the number of j = 1..63
    with d >= (j - 1/2) exp(l/8), which is the rounding of the module docstring (never a
    tie: (j - 1/2) exp(l/8) is not an integer)."""
    rows = []
    for level in range(fam.LS_LO, fam.LS_HI + 1):
        scale = _CTX.exp(_CTX.divide(decimal.Decimal(level), fam.LS_SCALE))
        steps = [int(_CTX.multiply(decimal.Decimal(j) - decimal.Decimal("0.5"), scale)
                     .to_integral_value(rounding=decimal.ROUND_CEILING))
                 for j in range(1, Q_MAX + 1)]
        rows.append(np.searchsorted(np.array(steps), np.arange(DISTANCES), side="right"))
    return np.array(rows, dtype=np.int64)


@functools.cache
def feedback_table(terms: int) -> np.ndarray:
    """F for every sum S = 0 .. terms * Q_MAX of `terms` surprises, int64: the largest m
    with S >= 4 terms (2**((m + 15/2) / 8) - 1), which is the rounding of the module
    docstring (never a tie: 2**(odd / 16) is irrational)."""
    steps = []
    for m in range(-8, 40):  # past the largest F: floor(8 log2(1 + Q_MAX / 4) - 15/2) = 25
        power = _CTX.exp(_CTX.multiply(_CTX.divide(2 * m + 15, 16), _LN2))  # 8x faster
        bound = _CTX.multiply(fam.MU_SCALE * terms, power - 1)
        steps.append(int(bound.to_integral_value(rounding=decimal.ROUND_CEILING)))
    sums = np.arange(terms * Q_MAX + 1)
    return np.searchsorted(np.array(steps), sums, side="right").astype(np.int64) - 9


def surprises(levels: np.ndarray, means: np.ndarray, values: np.ndarray) -> np.ndarray:
    """q of subpixels from their tuned levels, final means (quarter pixels) and values."""
    return surprise_table()[levels - fam.LS_LO, np.abs(4 * values.astype(np.int64) - means)]


def mean_moves(sums: np.ndarray, biases: np.ndarray | int) -> np.ndarray:
    """How far the error feedback moves means: floor((b (e_left + e_up) + 16) / 32)."""
    return (biases * sums + 16) >> 5


def level_moves(feedback: np.ndarray, gains: np.ndarray | int) -> np.ndarray:
    """How far the surprise feedback F moves levels: floor((k F + 8) / 16)."""
    return (gains * feedback + 8) >> 4


def move(levels: np.ndarray, feedback: np.ndarray, gains: np.ndarray | int) -> np.ndarray:
    """Levels moved by `level_moves`, clamped to the family's range."""
    return np.minimum(np.maximum(levels + level_moves(feedback, gains), fam.LS_LO), fam.LS_HI)
