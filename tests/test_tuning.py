"""Specification of per-image tuning: the 16- and 18-byte headers, format 6's range-coded
fields and their priors, the bands, the choices."""

import itertools

import numpy as np
import pytest

from rowcast import family as fam
from rowcast.tuning import (
    BANDS,
    COUPLING_OFFSETS,
    HEADER_BYTES,
    OFFSETS,
    PRIOR_SHAPES,
    apply,
    band_of,
    choose,
    choose_couplings,
    choose_gains,
    field_rows,
    fields,
    fields_length,
    from_fields,
    offset_map,
    pack,
    prior_tables,
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

    def cost(k, offsets, candidates):  # plane G depends on coupling 0, B on 1 and 2
        trial = np.repeat(offsets[:, None], len(candidates), 1)
        trial[k] = candidates
        if k == 0:
            return (trial[0] - best[0]) ** 2
        return (trial[1] - best[1]) ** 2 + (trial[2] - best[2]) ** 2

    chosen, saved = choose_couplings(cost)
    assert chosen.tolist() == best.tolist()
    zero, nothing = np.zeros(1, np.int64), np.zeros(3, np.int64)
    assert saved == cost(0, nothing, zero)[0] + cost(1, nothing, zero)[0]


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


def test_format_6_codes_every_field_the_header_held_and_gives_it_back():
    """The fields of `fields` (offsets band by band for the coded planes, RGB's three
    couplings in steps of 4, an adaptive image's gains) come back from their symbols
    through `from_fields`; each symbol indexes its prior's row; a gray image codes R's
    fields only, a tuned one no gains; couplings off the encoder's grid are refused."""
    rng = np.random.default_rng(3)
    for planes, adaptive in itertools.product((1, 3), (False, True)):
        offsets = rng.integers(-8, 8, (3, 8))
        couplings = rng.choice(COUPLING_OFFSETS, 3) if planes == 3 else np.zeros(3, np.int64)
        gains, biases = rng.integers(0, 16, 3), rng.integers(-8, 8, 3)
        coded = fields(offsets, couplings, (gains, biases) if adaptive else None, planes)
        assert [(n, r.tolist()) for n, r, _ in coded] == [
            (n, r.tolist()) for n, r in field_rows(planes, adaptive)]
        for name, rows, symbols in coded:
            assert len(rows) == len(symbols)
            assert ((0 <= symbols) & (symbols < prior_tables(name).shape[1])).all()
        back = from_fields({n: s for n, _, s in coded}, planes)
        assert np.array_equal(back[0][:planes], offsets[:planes])
        assert not back[0][planes:].any()
        assert np.array_equal(back[1], couplings)
        want = (gains, biases) if adaptive else (np.zeros(3), np.zeros(3))
        for got, expected in zip(back[2:], want, strict=True):
            assert np.array_equal(got[:planes], expected[:planes]) and not got[planes:].any()
    with pytest.raises(ValueError, match="steps of 4"):
        fields(np.zeros((3, 8), np.int64), np.array([0, 5, 0]), None, 3)


def test_the_priors_give_every_value_a_count_and_price_fields_by_them():
    """Every value of every prior has a count of at least one (no field value is
    uncodable); the code length of fields is the sum of log2(total / count) of their
    symbols, in 1/65536 bit, and no prior's exact length lies near a rounding boundary
    (so every machine prices alike). Zero offsets, the most chosen, cost less than 4 bits
    each in the middle bands, the nibble they took in a header."""
    for name, shape in PRIOR_SHAPES.items():
        table = prior_tables(name)
        assert table.shape == shape and (table >= 1).all()
        exact = np.log2(table.sum(axis=1, keepdims=True) / table.astype(np.float64)) * 2**16
        assert (np.abs(exact - np.floor(exact) - 0.5) > 1e-6).all()
    coded = fields(np.zeros((3, 8), np.int64), np.zeros(3, np.int64), None, 3)
    offsets = prior_tables("offsets").astype(np.float64)
    couplings = prior_tables("couplings").astype(np.float64)
    want = 3 * np.log2(offsets.sum(axis=1) / offsets[:, 8]).sum()
    want += np.log2(couplings.sum(axis=1) / couplings[:, 8]).sum()
    assert abs(fields_length(coded) / 2**16 - want) < 1e-3
    assert (np.log2(offsets.sum(axis=1) / offsets[:, 8])[1:6] < 4).all()


def test_compiled_plane_lengths_are_the_table_lookup() -> None:
    """The tuning search's compiled lengths equal `symbol_lengths()` at `count_index` of
    the moved and clamped levels and means, for every shape of move the search uses
    (none, one per subpixel, one per candidate, one per candidate and subpixel), with
    moves far past both ends of the family's grid, and with a second move of the clamped
    levels (clamped again)."""
    from rowcast.tables import count_index, symbol_columns, symbol_lengths
    from rowcast.tuningkernel import plane_lengths

    rng = np.random.default_rng(2)
    n, k = 500, 7
    symbols = rng.integers(0, 256, n)
    columns = symbol_columns(symbols)
    levels = rng.integers(fam.LS_LO, fam.LS_HI + 1, n)
    means = 4 * symbols + rng.integers(-30, 31, n)
    moves = [0, rng.integers(-40, 41, n), rng.integers(-40, 41, (k, 1)),
             rng.integers(-60, 61, (k, n))]
    after = rng.integers(-20, 21, n)
    for d in moves:
        for m in moves:
            moved = np.clip(levels + np.asarray(d), fam.LS_LO, fam.LS_HI)
            mu = np.clip(means + np.asarray(m), fam.MU_LO, fam.MU_HI)
            want = symbol_lengths()[count_index(mu, moved, columns)]
            got = plane_lengths(symbol_lengths(), columns, levels, means, d, m)
            assert got.shape == np.broadcast_shapes(np.shape(d), np.shape(m), (n,))
            assert np.array_equal(got, want)
            again = np.clip(moved + after, fam.LS_LO, fam.LS_HI)  # then a feedback move
            got = plane_lengths(symbol_lengths(), columns, levels, means, d, m, after)
            assert np.array_equal(got, symbol_lengths()[count_index(mu, again, columns)])


def test_compiled_coupled_sums_are_the_plane_code_lengths() -> None:
    """For each pair of coupling offsets, the compiled sum equals the plane's code length
    with its means moved by the channel masks as the coder moves them (couplings clamped
    to the family's range, (a ra + b rb + 8) >> 4, the mean clamped to the grid)."""
    from rowcast.tables import count_index, symbol_columns, symbol_lengths
    from rowcast.tuningkernel import coupled_sums

    rng = np.random.default_rng(4)
    n = 400
    symbols = rng.integers(0, 256, n)
    columns = symbol_columns(symbols)
    levels = rng.integers(fam.LS_LO, fam.LS_HI + 1, n)
    means = 4 * symbols + rng.integers(-30, 31, n)
    ca, cb = (rng.integers(-fam.COUPLE_MAX, fam.COUPLE_MAX + 1, n) for _ in range(2))
    ra, rb = (rng.integers(-255, 256, n) for _ in range(2))
    da, db = rng.integers(-60, 61, 9), rng.integers(-60, 61, 9)
    got = coupled_sums(symbol_lengths(), columns, levels, means, (ca, cb), (ra, rb), da, db)
    for k in range(9):
        a = np.clip(ca + da[k], -fam.COUPLE_MAX, fam.COUPLE_MAX)
        b = np.clip(cb + db[k], -fam.COUPLE_MAX, fam.COUPLE_MAX)
        mu = np.clip(means + ((a * ra + b * rb + 8) >> 4), fam.MU_LO, fam.MU_HI)
        assert got[k] == symbol_lengths()[count_index(mu, levels, columns)].sum()


@pytest.mark.parametrize("shape", [(1, 1), (1, 9), (7, 1), (9, 13)])
def test_compiled_colour_costs_are_the_planes_code_lengths_on_both_bases(shape) -> None:
    """G's and B's untuned code lengths, from the network's means and couplings on the
    plain base and from neither on the colour-difference base, equal the table lookups of
    those means (`codec.pixel_params`, `family.difference_base`), at edge shapes too."""
    from rowcast.codec import coupling_move, pixel_params
    from rowcast.tables import count_index, symbol_columns, symbol_lengths
    from rowcast.tuningkernel import colour_costs

    rng = np.random.default_rng(shape[0] * 3 + shape[1])
    img = rng.integers(0, 256, (3, *shape), dtype=np.uint8)
    img[1] = np.clip(img[0].astype(int) + rng.integers(-9, 10, shape), 0, 255)
    n = shape[0] * shape[1]
    out = np.concatenate([rng.integers(-300, 300, (n, 6)), rng.integers(-200, 200, (n, 3))],
                         axis=1)
    out[:, 1:6:2] = rng.integers(fam.LS_LO - 5, fam.LS_HI + 5, (n, 3))
    known = img.reshape(3, -1).T.astype(np.int64)
    want = []
    for raw, base in ((out, fam.base_prediction(img)), (fam.ignoring_colour(out),
                                                        fam.difference_base(img))):
        flat = base.reshape(3, -1).T
        p = pixel_params(raw, flat)
        want.append(sum(int(symbol_lengths()[count_index(
            np.clip(p.means[:, c] + coupling_move(p.couplings, c, known - flat), fam.MU_LO,
                    fam.MU_HI), p.ls8[:, c], symbol_columns(known[:, c]))].sum())
            for c in (1, 2)))
    got = colour_costs(symbol_lengths(), out, known, fam.base_prediction(img).reshape(3, -1).T,
                       shape[1])
    assert got == tuple(want)
