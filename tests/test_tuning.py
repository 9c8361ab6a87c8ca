"""Specification of per-image scale tuning: the 12-byte header, the bands, the exact choice."""

import itertools

import numpy as np

from rowcast import family as fam
from rowcast.tuning import (
    BANDS,
    HEADER_BYTES,
    OFFSETS,
    apply,
    band_of,
    choose,
    offset_map,
    pack,
    unpack,
)


def test_header_holds_every_offset_of_every_band_in_12_bytes():
    """Offsets -8..7 for 3 channels x 8 bands pack into 12 bytes and come back unchanged."""
    rng = np.random.default_rng(1)
    for offsets in [rng.integers(-8, 8, (3, 8)) for _ in range(50)] + [np.full((3, 8), -8)]:
        header = pack(offsets)
        assert len(header) == HEADER_BYTES == 12
        assert np.array_equal(unpack(header), offsets)
    assert pack(np.zeros((3, 8), np.int64)) == bytes(12)


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
