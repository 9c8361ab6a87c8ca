"""Specification of the integer tables that feed the range coder."""

import decimal

import numpy as np

from rowcast import entropy
from rowcast import family as fam
from rowcast.entropy import ending_word
from rowcast.tables import (
    CDF_ONE,
    D_MIN,
    LENGTH_ONE,
    LEVELS,
    TABLE_TOTAL,
    WIDTH,
    all_tables,
    code_lengths,
    count_index,
    exact_logistic_cdf,
    logistic_cdf,
    logistic_tables,
    mixture_tables,
    symbol_columns,
    symbol_counts,
    symbol_lengths,
    table_rows,
)


def test_committed_cdf_table_is_the_exact_decimal_logistic():
    """The shipped table equals a correctly rounded recomputation (Python's decimal module),
    checked on every level at a deterministic spread of distances including both ends."""
    table = logistic_cdf()
    assert table.shape == (LEVELS, WIDTH)
    columns = sorted(set(range(0, WIDTH, 37)) | {0, WIDTH // 2, WIDTH - 1})
    for level in range(LEVELS):
        for col in columns:
            assert table[level, col] == exact_logistic_cdf(level, col + D_MIN), (level, col)


def test_every_table_sums_to_the_same_total_and_keeps_every_value_codable():
    """Counts are >= 1 for all 256 values and sum to exactly 2**16 + 256, over the whole grid."""
    mu = np.repeat(np.arange(fam.MU_LO, fam.MU_HI + 1), LEVELS)
    ls = np.tile(np.arange(fam.LS_LO, fam.LS_HI + 1), fam.MU_HI - fam.MU_LO + 1)
    tables = logistic_tables(mu, ls)
    assert tables.min() >= 1
    assert TABLE_TOTAL == CDF_ONE + 256
    assert np.all(tables.sum(axis=1, dtype=np.float64) == TABLE_TOTAL)
    assert np.all(tables == np.round(tables))


def test_a_sharp_logistic_puts_almost_all_mass_on_its_mean():
    """With the smallest scale and the mean on value 100, value 100 gets > 99% of the mass."""
    table = logistic_tables(np.array([400]), np.array([fam.LS_LO]))[0]
    assert table[100] / table.sum() > 0.99
    assert table.argmax() == 100


def test_a_uniform_model_costs_exactly_eight_bits_per_subpixel():
    """Information theory: 256 equiprobable values cost log2(256) = 8 bits each; the coder's
    output is within one 32-bit word of that."""
    rng = np.random.default_rng(5)
    symbols = rng.integers(0, 256, 4000)
    tables = np.ones((4000, 256), np.float32)
    assert entropy.cross_entropy_bits(symbols, tables) == 8 * 4000
    coder = entropy.encoder()
    entropy.encode(coder, symbols, tables)
    assert abs(len(entropy.finish(coder)) - 4000) <= 8


def test_code_length_is_bounded_below_by_cross_entropy():
    """Shannon's bound: no payload is shorter than the model's cross-entropy (less a word of
    rounding), and a range coder gets within 0.5% of it."""
    rng = np.random.default_rng(6)
    mu = rng.integers(fam.MU_LO, fam.MU_HI + 1, 5000)
    ls = rng.integers(fam.LS_LO, fam.LS_HI + 1, 5000)
    tables = logistic_tables(mu, ls)
    p = tables.astype(np.float64)
    p /= p.sum(axis=1, keepdims=True)
    symbols = np.array([rng.choice(256, p=row) for row in p])
    bits = entropy.cross_entropy_bits(symbols, tables)
    coder = entropy.encoder()
    entropy.encode(coder, symbols, tables)
    payload = entropy.finish(coder)
    decoder = entropy.decoder(payload)
    decoded = [decoder.decode(entropy.FAMILY, tables[i : i + 1])[0] for i in range(len(symbols))]
    assert decoded == list(symbols)
    assert bits - 32 <= 8 * len(payload) <= 1.005 * bits + 64


def test_every_table_row_matches_its_definition():
    """The precomputed table of each (level, mean) is the count formula of docs/FORMAT.md,
    computed here independently from the CDF table, at both ends of the grid and inside."""
    cdf = logistic_cdf().astype(np.int64)
    rng = np.random.default_rng(11)
    mu4 = np.concatenate([[fam.MU_LO, fam.MU_HI, 0, 511], rng.integers(fam.MU_LO, fam.MU_HI, 60)])
    ls8 = np.concatenate([[fam.LS_LO, fam.LS_HI, 0, 7], rng.integers(fam.LS_LO, fam.LS_HI, 60)])
    tables = logistic_tables(mu4, ls8)
    for table, m, lv in zip(tables, mu4, ls8 - fam.LS_LO, strict=True):
        c = [cdf[lv, 4 * j + 2 - m - D_MIN] for j in range(255)]  # C at the bin boundaries
        want = [c[0] + 1] + [c[j] - c[j - 1] + 1 for j in range(1, 255)] + [CDF_ONE + 1 - c[254]]
        assert table.tolist() == want


def test_a_model_built_from_a_table_decodes_what_the_family_encoded():
    """The decoder builds one constriction model per distinct table and reuses it; that model
    must be the one the encoder's family builds from the same table, on tables from all over
    the grid (any difference would turn the decoded symbols into garbage)."""
    rng = np.random.default_rng(5)
    n = 20_000
    mu4 = rng.integers(fam.MU_LO, fam.MU_HI + 1, n)
    ls8 = rng.integers(fam.LS_LO, fam.LS_HI + 1, n)
    tables = logistic_tables(mu4, ls8)
    symbols = np.array([rng.choice(256, p=t / t.sum()) for t in tables[:n]])
    coder = entropy.encoder()
    entropy.encode(coder, symbols, tables)
    decoder = entropy.decoder(entropy.finish(coder))
    models = entropy.Models(all_tables())
    rows = table_rows(mu4, ls8).tolist()
    assert [decoder.decode(models[r]) for r in rows] == symbols.tolist()


def test_two_component_tables_are_the_weighted_sum_or_a_pure_table():
    """weight x table a + (64 - weight) x table b, in exact integers (sum 64 x 65792); a weight
    of 64 or 0 gives the pure table, which the decoder already holds a model for."""
    rng = np.random.default_rng(8)
    n = 300
    rows_a, rows_b = rng.integers(0, len(all_tables()), (2, n))
    weight = rng.integers(0, fam.WEIGHT_ONE + 1, n)
    weight[:5], weight[5:10] = 0, fam.WEIGHT_ONE
    tables = mixture_tables(rows_a, rows_b, weight)
    a, b = all_tables()[rows_a].astype(np.int64), all_tables()[rows_b].astype(np.int64)
    want = weight[:, None] * a + (fam.WEIGHT_ONE - weight[:, None]) * b
    want[weight == 0], want[weight == fam.WEIGHT_ONE] = b[weight == 0], a[weight == fam.WEIGHT_ONE]
    assert np.array_equal(tables.astype(np.int64), want) and tables.dtype == np.float32
    mixed = (weight > 0) & (weight < fam.WEIGHT_ONE)
    assert np.all(tables[mixed].sum(1, dtype=np.float64) == fam.WEIGHT_ONE * TABLE_TOTAL)


def test_the_searchs_count_lookup_is_every_table_entry():
    """The tuning search reads counts from the compact `symbol_counts` layout: at every
    (level, mean) of the grid and for all 256 values it gives the entry of `all_tables()`,
    and `symbol_lengths` gives that entry's code length."""
    mu4 = np.repeat(np.arange(fam.MU_LO, fam.MU_HI + 1), LEVELS)
    ls8 = np.tile(np.arange(fam.LS_LO, fam.LS_HI + 1), fam.MU_HI - fam.MU_LO + 1)
    rows = all_tables()[table_rows(mu4, ls8)].astype(np.int64)  # float32 counts, exact
    for x in range(256):
        at = count_index(mu4, ls8, symbol_columns(np.full(mu4.shape, x)))
        assert np.array_equal(symbol_counts()[at], rows[:, x]), x
        assert np.array_equal(symbol_lengths()[at], code_lengths()[rows[:, x]]), x


def test_the_searchs_code_lengths_are_the_rounded_logarithms_on_every_platform():
    """code_lengths(w)[n] = round(2**16 log2(w * TABLE_TOTAL / n)), as Python's decimal
    module (correctly rounded) gives it, at both ends and a spread of counts; one
    component's table is the two-component one at multiples of 64; and no exact value sits
    within 4e-7 of a rounding boundary, so a log2 off by a few ulps (about 1e-9 here) on
    another machine rounds every entry the same way."""
    ctx = decimal.Context(prec=40)
    mixed = code_lengths(fam.WEIGHT_ONE)
    total = fam.WEIGHT_ONE * TABLE_TOTAL
    for n in sorted({1, 2, 3, 64, 255, 65536, total - 1, total, *range(1, total, 99_991)}):
        exact = ctx.multiply(ctx.divide(ctx.ln(ctx.divide(total, n)), ctx.ln(2)), LENGTH_ONE)
        assert mixed[n] == int(exact.quantize(decimal.Decimal(1), decimal.ROUND_HALF_UP)), n
    assert np.array_equal(code_lengths()[1:], mixed[fam.WEIGHT_ONE :: fam.WEIGHT_ONE])
    n = np.arange(1, total + 1, dtype=np.float64)
    scaled = np.log2(total / n) * LENGTH_ONE
    assert np.abs(scaled - np.floor(scaled) - 0.5).min() > 4e-7


def test_summed_code_lengths_are_the_cross_entropy_to_within_rounding():
    """Summed over an image's subpixels, the integer code lengths are the model's
    cross-entropy (the source-coding floor) to within half a unit per subpixel."""
    rng = np.random.default_rng(5)
    mu4 = rng.integers(fam.MU_LO, fam.MU_HI + 1, 4096)
    ls8 = rng.integers(fam.LS_LO, fam.LS_HI + 1, 4096)
    tables = logistic_tables(mu4, ls8)
    symbols = np.clip(mu4 // 4 + rng.integers(-20, 21, 4096), 0, 255)
    counts = tables[np.arange(4096), symbols].astype(np.int64)
    bits = entropy.cross_entropy_bits(symbols, tables, total=TABLE_TOTAL)
    assert abs(code_lengths()[counts].sum() / LENGTH_ONE - bits) <= 4096 * 0.5 / LENGTH_ONE


def test_a_trimmed_code_decodes_the_same_and_is_never_longer():
    """Format 6 ends a code with the last word that has the most trailing zero bits inside
    the coder's final interval, written big-endian with its trailing zero bytes dropped; the
    decoder reads zeros past the end, so every symbol comes back (random tables, lengths and
    skews, with constriction's own little-endian words as the reference). On average the
    ending saves more than a byte, and a trimmed code never ends in a zero byte."""
    rng = np.random.default_rng(12)
    saved = []
    for trial in range(400):
        n = int(rng.integers(1, 200))
        tables = rng.integers(1, 3000, (n, 256)).astype(np.float32)
        if trial % 2:
            tables[:, 0] = 1e6  # near-certain symbols: a short code, most of it the ending
        p = tables.astype(np.float64) / tables.sum(axis=1, keepdims=True)
        symbols = np.array([rng.choice(256, p=row) for row in p])
        coder = entropy.encoder()
        entropy.encode(coder, symbols, tables)
        full, trimmed = entropy.finish(coder, trimmed=False), entropy.finish(coder)
        assert not trimmed.endswith(b"\0")
        assert len(trimmed) <= len(full)
        for payload, flag in ((full, False), (trimmed, True)):
            decoded = entropy.decoder(payload, trimmed=flag).decode(entropy.FAMILY, tables)
            assert decoded.tolist() == symbols.tolist()
        saved.append(len(full) - len(trimmed))
    assert np.mean(saved) > 1


def test_theending_word_has_the_most_trailing_zeros_in_the_interval():
    """`ending_word` picks, among the words w with w * 2**32 in [lower, lower + width) and
    below 2**64, one with the most trailing zero bits (checked by search over small
    intervals); None when no word fits without a carry."""
    rng = np.random.default_rng(13)

    def zeros(w: int) -> int:
        return 64 if w == 0 else (w & -w).bit_length() - 1

    for _ in range(3000):
        lower = int(rng.integers(0, 2**63)) * 2 + int(rng.integers(0, 2))
        width = int(rng.integers(2**32, 2**32 * 3000))
        first, last = -(-lower >> 32), (min(lower + width, 2**64) - 1) >> 32
        word = ending_word(lower, width)
        if first > last:
            assert word is None
            continue
        assert first <= word <= last
        assert zeros(word) == max(zeros(w) for w in range(first, last + 1))
    assert ending_word(2**64 - 2**31, 2**32) is None  # only 2**64 itself: a carry
    assert ending_word(0, 2**64 - 1) == 0
