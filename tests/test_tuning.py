"""Specification of per-image tuning: the 16- and 18-byte headers, the bands, the choices."""

import itertools

import numpy as np
import pytest

from rowcast import family as fam
from rowcast.tuning import (
    BANDS,
    HEADER_BYTES,
    OFFSETS,
    apply,
    band_of,
    choose,
    choose_couplings,
    choose_gains,
    offset_map,
    pack,
    unpack,
)


def test_header_holds_every_offset_in_16_bytes_and_the_gains_in_two_more():
    """Scale offsets -8..7 for 3 channels x 8 bands and coupling offsets -128..127 pack into
    16 bytes (method "tuned": the last byte zero and checked); with the feedback's scale
    gains 0..15 and bias gains -8..7 for R, G, B into 18 (method "adaptive"); all come back
    unchanged, and a tuned header reads as zero gains."""
    rng = np.random.default_rng(1)
    cases = [(rng.integers(-8, 8, (3, 8)), rng.integers(-128, 128, 3), rng.integers(0, 16, 3),
              rng.integers(-8, 8, 3)) for _ in range(50)]
    extremes = (np.full((3, 8), -8), np.array([-128, 127, 0]), np.array([15, 0, 8]),
                np.array([-8, 7, -1]))
    zero = np.zeros(3)
    for offsets, couplings, gains, biases in cases + [extremes]:
        tuned, adaptive = pack(offsets, couplings), pack(offsets, couplings, (gains, biases))
        assert len(tuned) == HEADER_BYTES["tuned"] == 16 and tuned[-1] == 0
        assert len(adaptive) == HEADER_BYTES["adaptive"] == 18 and adaptive[:15] == tuned[:15]
        for header, want in ((tuned, (zero, zero)), (adaptive, (gains, biases))):
            back = unpack(header)
            assert np.array_equal(back[0], offsets) and np.array_equal(back[1], couplings)
            assert np.array_equal(back[2], want[0]) and np.array_equal(back[3], want[1])
    assert pack(np.zeros((3, 8), np.int64), np.zeros(3, np.int64)) == bytes(16)
    with pytest.raises(ValueError, match="reserved byte"):
        unpack(bytes(15) + b"\1")


def test_gain_choice_is_exact_per_plane_and_prefers_zero_on_ties():
    """Each plane's gain minimises its own cost (planted optima), the bits reported saved
    are the true difference, a flat cost keeps 0, and planes not coded keep 0."""
    best = {0: 5, 1: 15, 2: 7}

    def cost(c, gains):  # (K, 1) candidates -> (K,) bits
        return (gains[:, 0] - best[c]) ** 2 + 10.0

    gains, saved = choose_gains(cost, 3)
    assert gains.tolist() == [5, 15, 7]
    assert saved == sum(best[c] ** 2 for c in range(3))
    flat, none = choose_gains(lambda c, g: np.full(len(g), 4.0), 3)
    assert flat.tolist() == [0, 0, 0] and none == 0
    gray, _ = choose_gains(cost, 1)
    assert gray.tolist() == [5, 0, 0]


def test_coupling_choice_never_costs_more_and_finds_a_planted_optimum():
    """Coordinate search over the candidates: on a separable made-up cost it lands on the
    planted best offsets, and the bits it reports saved are the true difference."""
    best = np.array([8, -12, 20])

    def cost(k, offsets):  # plane G depends on coupling 0, plane B on couplings 1 and 2
        if k == 0:
            return float((offsets[0] - best[0]) ** 2)
        return float((offsets[1] - best[1]) ** 2 + (offsets[2] - best[2]) ** 2)

    chosen, saved = choose_couplings(cost)
    assert chosen.tolist() == best.tolist()
    assert saved == cost(0, np.zeros(3)) + cost(1, np.zeros(3))


def test_bands_split_the_levels_at_the_documented_thresholds():
    """Band k holds levels in [BANDS[k-1], BANDS[k]); the lowest and highest levels of the
    family fall in the first and last bands."""
    assert band_of(np.array([fam.LS_LO, -9, -8, -1, 0, 3, 4, 23, 24, fam.LS_HI])).tolist() == [
        0, 0, 1, 1, 2, 2, 3, 6, 7, 7]
    offsets = np.arange(24).reshape(3, 8) - 8
    table = offset_map(offsets)
    assert table.shape == (3, fam.LS_HI - fam.LS_LO + 1)
    assert table[1, 0 - fam.LS_LO] == offsets[1, 2]
    assert apply(np.array([fam.LS_HI, fam.LS_LO]), np.array([3, -3])).tolist() == [
        fam.LS_HI, fam.LS_LO]


def test_choice_is_the_best_offset_of_each_band_by_brute_force():
    """Against trying every offset for each band separately on a made-up cost."""
    rng = np.random.default_rng(2)
    levels = rng.integers(fam.LS_LO, fam.LS_HI + 1, (500, 3))
    target = rng.integers(-8, 8, (3, 8))

    def cost(c, d):  # bits grow with the distance from a per-band best offset
        best = target[c, band_of(levels[:, c])]
        return (d - best) ** 2 + 1.0

    chosen, saved = choose(cost, levels)
    zero = sum(cost(c, 0).sum() for c in range(3))
    assert saved == zero - sum(cost(c, chosen[c, band_of(levels[:, c])]).sum() for c in range(3))
    present = [set(band_of(levels[:, c])) for c in range(3)]
    for c, k in itertools.product(range(3), range(len(BANDS) + 1)):
        assert chosen[c, k] == (target[c, k] if k in present[c] else 0)
    assert set(OFFSETS) == set(range(-8, 8))
