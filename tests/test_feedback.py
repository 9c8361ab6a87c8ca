"""Specification of the neighbours' feedback: the surprise tables follow their definitions
(checked against Python's decimal arithmetic and against float formulas), neighbours count
as documented, mean moves round down, and level moves stay on the family's grid."""

import decimal

import numpy as np
import pytest

from rowcast import family as fam
from rowcast.feedback import (
    BIASES,
    DISTANCES,
    NEUTRAL,
    Q_MAX,
    feedback_table,
    mean_moves,
    move,
    surprise_table,
    surprises,
)
from rowcast.tuningkernel import feedback_arrays

CTX = decimal.Context(prec=50)


def exact_surprise(level: int, d4: int) -> int:
    """min(63, floor(d4 exp(-level/8) + 1/2)) with 50-digit decimals."""
    x = CTX.multiply(d4, CTX.exp(CTX.divide(-level, 8))) + decimal.Decimal("0.5")
    return min(Q_MAX, int(x.to_integral_value(rounding=decimal.ROUND_FLOOR)))


def exact_feedback(terms: int, s: int) -> int:
    """floor(8 (log2(1 + s / 4 terms) - 1) + 1/2) with 50-digit decimals."""
    log2 = CTX.divide(CTX.ln(CTX.add(1, CTX.divide(s, 4 * terms))), CTX.ln(2))
    x = CTX.multiply(8, log2 - 1) + decimal.Decimal("0.5")
    return int(x.to_integral_value(rounding=decimal.ROUND_FLOOR))


def test_surprise_table_is_the_rounded_distance_in_quarter_scales():
    """Every level at a spread of distances (both ends included) matches the decimal
    definition; the whole table matches the float formula; it starts at 0, never falls as
    the distance grows, and saturates at 63."""
    table = surprise_table()
    assert table.shape == (fam.LS_HI - fam.LS_LO + 1, DISTANCES)
    for level in range(fam.LS_LO, fam.LS_HI + 1):
        for d in sorted(set(range(0, DISTANCES, 23)) | {1, 2, 3, 4, 5, DISTANCES - 1}):
            assert table[level - fam.LS_LO, d] == exact_surprise(level, d), (level, d)
    levels = np.arange(fam.LS_LO, fam.LS_HI + 1)[:, None]
    floats = np.floor(np.arange(DISTANCES) * np.exp(-levels / 8) + 0.5)
    assert np.array_equal(table, np.minimum(Q_MAX, floats))
    assert (table[:, 0] == 0).all() and (np.diff(table, axis=1) >= 0).all()
    assert table[0 - fam.LS_LO, 4] == NEUTRAL  # a miss of one pixel at scale 1 (level 0)


def test_feedback_is_zero_for_a_miss_of_one_scale_and_follows_its_definition():
    """For 2, 3 and 4 terms, every sum matches the decimal definition; a mean surprise of
    one scale (the neutral value) gives 0, hits give -8, the largest sums +25."""
    for terms in (2, 3, 4):
        table = feedback_table(terms)
        assert len(table) == terms * Q_MAX + 1
        assert [int(f) for f in table] == [exact_feedback(terms, s) for s in range(len(table))]
        assert table[terms * NEUTRAL] == 0 and table[0] == -8 and table[-1] == 25
        assert (np.diff(table) >= 0).all()


def image_feedback(h: int, w: int, planes: int, seed: int) -> tuple:
    """Random inputs of `feedback_arrays` for an h x w image, and its three arrays."""
    rng = np.random.default_rng(seed)
    n = h * w
    inputs = (rng.integers(fam.MU_LO, fam.MU_HI + 1, (n, 3)),  # means
              rng.integers(-fam.COUPLE_MAX, fam.COUPLE_MAX + 1, (n, 3)),  # couplings
              rng.integers(-255, 256, (n, 3)),  # residuals
              rng.integers(0, 256, (n, planes)),  # values
              rng.integers(fam.LS_LO, fam.LS_HI + 1, (n, 3)),  # levels
              rng.integers(-8, 8, 3))  # bias gains
    return inputs, feedback_arrays(*inputs, w)


def coupled_means(means, couplings, residuals, c: int) -> np.ndarray:
    """Plane c's means moved by the channel couplings (floor((k r + 8) / 16))."""
    moves = [0, (couplings[:, 0] * residuals[:, 0] + 8) // 16,
             (couplings[:, 1] * residuals[:, 0] + couplings[:, 2] * residuals[:, 1] + 8) // 16]
    return means[:, c] + moves[c]


@pytest.mark.parametrize(("h", "w", "planes"), [(5, 6, 3), (1, 7, 3), (6, 1, 1), (4, 4, 1)])
def test_a_subpixels_error_sum_is_its_left_and_upper_neighbours_errors(h, w, planes):
    """Against a plain loop: the same plane's errors 4v - m (m: the mean moved by the
    channel couplings) at the left and upper pixels, 0 outside the image; the planes of
    the pixel itself do not count. The bias gain's move is floor((b S + 16) / 32) of it."""
    (means, couplings, residuals, values, _, biases), (sums, moved, _) = image_feedback(
        h, w, planes, h * w)
    for c in range(planes):
        e = (4 * values[:, c] - coupled_means(means, couplings, residuals, c)).reshape(h, w)
        for y in range(h):
            for x in range(w):
                want = (e[y, x - 1] if x else 0) + (e[y - 1, x] if y else 0)
                assert sums[y * w + x, c] == want
                assert moved[y * w + x, c] == (biases[c] * want + 16) // 32


@pytest.mark.parametrize(("h", "w", "planes"), [(5, 6, 3), (1, 7, 3), (6, 1, 1), (4, 4, 1)])
def test_a_subpixels_sum_counts_left_above_and_the_earlier_planes_of_its_pixel(h, w, planes):
    """Against a plain loop: the surprises (measured from the mean moved by the couplings
    and the bias gain) of the same plane left and above (NEUTRAL outside the image), plus
    every plane before it at the same pixel."""
    (means, couplings, residuals, values, levels, _), (_, moved, sums) = image_feedback(
        h, w, planes, h * w + 1)
    q = np.stack([surprises(levels[:, c], np.clip(coupled_means(means, couplings, residuals, c)
                                                  + moved[:, c], fam.MU_LO, fam.MU_HI),
                            values[:, c]).reshape(h, w) for c in range(planes)])
    for c in range(planes):
        for y in range(h):
            for x in range(w):
                left = q[c, y, x - 1] if x else NEUTRAL
                up = q[c, y - 1, x] if y else NEUTRAL
                assert sums[y * w + x, c] == left + up + q[:c, y, x].sum()
    assert sums.max() <= 4 * Q_MAX


def test_moves_widen_after_surprises_narrow_after_hits_and_stay_on_the_grid():
    """A gain raises the level after big surprises and lowers it after hits, a
    zero gain or a neutral neighbourhood moves nothing, and results stay in LS_LO..LS_HI."""
    levels = np.array([0, 0, fam.LS_HI, fam.LS_LO])
    feedback = np.array([25, -8, 25, -8])
    assert move(levels, feedback, 7).tolist() == [11, -3, fam.LS_HI, fam.LS_LO]
    assert move(levels, feedback, 0).tolist() == levels.tolist()
    assert move(levels, np.zeros(4, np.int64), 15).tolist() == levels.tolist()
    assert surprises(np.array([0, 8]), np.array([400, 400]), np.array([101, 110])).tolist() == [
        4, min(Q_MAX, int(np.floor(40 * np.exp(-1) + 0.5)))]


def test_mean_moves_are_the_floor_of_gain_times_errors_over_32():
    """floor((b S + 16) / 32) for every bias gain over a range of signed sums, by Python's
    integer floor division; a zero gain moves nothing."""
    sums = np.arange(-300, 301)
    for b in BIASES:
        assert mean_moves(sums, b).tolist() == [(int(b) * int(s) + 16) // 32 for s in sums]
    assert not mean_moves(sums, 0).any()
    assert BIASES.tolist() == list(range(-8, 8))
