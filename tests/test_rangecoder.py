"""Specification of `rowcast.rangecoder`, the numba range decoder.

It must read exactly what constriction 0.5.0's `RangeEncoder` writes under
`Categorical(table, perfect=False)` models, and build exactly constriction's models from
the same count tables. constriction, the package that writes rowcast's payloads, is the
independent reference throughout: every check below holds the numba code against it,
except the hard-coded test vector (which docs/FORMAT.md repeats).
"""

from __future__ import annotations

import constriction
import numba
import numpy as np
import pytest

from rowcast import entropy, native, tuning
from rowcast import rangecoder as rc
from rowcast import tables as tab

native.jitted()  # the kernels as numba's JIT compiles them: the helpers below call them

Queue = constriction.stream.queue
FIRST_SCALE = (1 << 40) - 1  # a fresh coder's range (2**64 - 1) >> 24


@numba.njit(cache=True)
def decode_all(words: np.ndarray, tables: np.ndarray) -> np.ndarray:
    """One symbol per row of `tables` through the public njit functions; -1 from the first
    symbol constriction would refuse on."""
    out = np.full(len(tables), -1, np.int64)
    state = rc.decoder_start(words)
    cdf = np.empty(tables.shape[1] + 1, np.uint32)
    for i in range(len(tables)):
        symbol = rc.decode_counts(state, words, tables[i], cdf)
        if symbol < 0:
            break
        out[i] = symbol
    return out


@numba.njit(cache=True)
def decode_guessing(words: np.ndarray, tables: np.ndarray, guesses: np.ndarray) -> np.ndarray:
    """`decode_all`, each symbol searched from its guess."""
    out = np.full(len(tables), -1, np.int64)
    state = rc.decoder_start(words)
    cdf = np.empty(tables.shape[1] + 1, np.uint32)
    for i in range(len(tables)):
        rc.quantise(tables[i], cdf)
        symbol = rc.decode_symbol(state, words, cdf, guesses[i])
        if symbol < 0:
            break
        out[i] = symbol
    return out


def constriction_cdf(table: np.ndarray, family: bool = False) -> np.ndarray:
    """constriction's fixed-point CDF of `table`, read off its encoder: one symbol coded
    from a fresh state moves it to lower = scale * cdf[s], range = scale * p(s) (scale
    2**40 - 1, no renormalisation). `family`: the per-symbol tables path (`entropy.FAMILY`,
    a lazily built model) instead of `Categorical(table)`. A last symbol that constriction
    cannot encode (no probability) ends where the one before it ends: at 2**24."""
    n = len(table)
    cdf = np.zeros(n + 1, np.int64)
    model = entropy.model_of(table)
    for symbol in range(n):
        coder = Queue.RangeEncoder()
        try:
            if family:
                coder.encode(np.array([symbol], np.int32), entropy.FAMILY, table[None])
            else:
                coder.encode(symbol, model)
        except KeyError:  # "Tried to encode symbol that has zero probability ..."
            assert symbol == n - 1 and not family and cdf[symbol] == 1 << 24
            cdf[n] = 1 << 24
            break
        _, (lower, width) = coder.pos()
        assert lower % FIRST_SCALE == 0 and width % FIRST_SCALE == 0
        assert symbol == 0 or lower // FIRST_SCALE == cdf[symbol]
        cdf[symbol] = lower // FIRST_SCALE
        cdf[symbol + 1] = cdf[symbol] + width // FIRST_SCALE
    return cdf


def constriction_decode(words: np.ndarray, tables: np.ndarray) -> np.ndarray:
    """constriction's decoding of one symbol per row; -1 from the first it refuses."""
    decoder = Queue.RangeDecoder(words)
    try:
        return decoder.decode(entropy.FAMILY, tables).astype(np.int64)
    except AssertionError:  # invalid data: find where, symbol by symbol
        pass
    out = np.full(len(tables), -1, np.int64)
    decoder = Queue.RangeDecoder(words)
    for i, table in enumerate(tables):
        try:
            out[i] = decoder.decode(entropy.model_of(table))
        except AssertionError:
            break
    return out


def draw(rng: np.random.Generator, tables: np.ndarray) -> np.ndarray:
    """One symbol per row, drawn with the row's probabilities."""
    cumulative = np.cumsum(tables.astype(np.float64), axis=1)
    u = rng.random(len(tables))[:, None] * cumulative[:, -1:]
    return np.minimum((cumulative <= u).sum(axis=1), tables.shape[1] - 1).astype(np.int32)


def extreme_tables() -> np.ndarray:
    """One huge count and 255 counts of 1 (the huge one at either end or inside), all ones,
    and counts near and above 2**24, where float32 sums round."""
    rows = []
    for at in (0, 1, 128, 254, 255):
        for huge in (tab.TABLE_TOTAL - 255, 64 * tab.TABLE_TOTAL - 255, 16_000_000, 1 << 25):
            row = np.ones(256, np.float32)
            row[at] = huge
            rows.append(row)
    rows.append(np.ones(256, np.float32))
    spiky = np.ones(256, np.float32)
    spiky[::17] = 9_999_991
    rows.append(spiky)
    return np.array(rows)


def mixtures(rng: np.random.Generator, n: int) -> np.ndarray:
    """Two-component tables as the codec builds them (sums up to 64 * 65792 ~ 4.2M)."""
    rows = rng.integers(0, len(tab.all_tables()), (2, n))
    return tab.mixture_tables(rows[0], rows[1], rng.integers(1, 64, n))


def grid_rows(rng: np.random.Generator, n: int) -> np.ndarray:
    """Rows of the real grid of tables, its first and last among them."""
    everything = tab.all_tables()
    rows = np.concatenate([[0, len(everything) - 1], rng.integers(0, len(everything), n - 2)])
    return everything[rows]


def odd_tables(rng: np.random.Generator, dtype: type) -> list[np.ndarray]:
    """Tables rowcast never makes: zeros, fractions, huge and tiny scales, 2 to 300 symbols,
    in float32 or float64 (each computes in its own type)."""
    out = []
    for k in range(24):
        n = (2, 3, 17, 256, 300)[k % 5]
        kind = k % 4
        if kind == 0:
            table = rng.integers(0, 4, n)
        elif kind == 1:
            table = rng.exponential(1.0, n) ** rng.integers(1, 12)
        elif kind == 2:
            table = rng.integers(1, 5_000_000, n)
        else:
            table = rng.random(n) * 10.0 ** rng.integers(-30, 30)
        table = table.astype(dtype)
        if table.sum() > 0:
            out.append(table)
    return out


def quantised(table: np.ndarray) -> np.ndarray:
    cdf = np.zeros(len(table) + 1, np.int64)
    assert rc.quantise(table, cdf)
    return cdf


# --- the model: quantise ------------------------------------------------------------------


def test_quantise_equals_constrictions_models() -> None:
    """Bit-identical CDFs for real, mixture, tuning, extreme and odd tables (reference:
    constriction's own model, read off its encoder)."""
    rng = np.random.default_rng(7)
    tables = [*grid_rows(rng, 40), *mixtures(rng, 40), *extreme_tables(),
              *odd_tables(rng, np.float32), *odd_tables(rng, np.float64)]
    for name in tuning.PRIORS:
        tables.extend(tuning.prior_tables(name))
    for table in tables:
        assert np.array_equal(quantised(table), constriction_cdf(table)), table


def test_quantise_equals_the_per_symbol_tables_path() -> None:
    """The encoder's path (a table per symbol, `entropy.FAMILY`) builds the same model."""
    rng = np.random.default_rng(8)
    for table in [*grid_rows(rng, 6), *mixtures(rng, 6), *extreme_tables()[::5]]:
        assert np.array_equal(quantised(table), constriction_cdf(table, family=True))


def test_quantise_computes_in_the_tables_float_type() -> None:
    """5 x (2**24 - 4) / 16 = 5242878.75 rounds to 5242879 in float32, not in float64."""
    counts = [5, 1, 3, 7]
    for dtype, second in ((np.float32, 5242880), (np.float64, 5242879)):
        table = np.array(counts, dtype)
        assert quantised(table)[1] == second
        assert np.array_equal(quantised(table), constriction_cdf(table))
    cdf = np.zeros(5, np.uint32)  # a uint32 cdf holds the same values
    assert rc.quantise(np.array(counts, np.float32), cdf)
    assert cdf.tolist() == [0, 5242880, 6291456, 9437185, 1 << 24]


def test_a_negligible_last_count_can_get_no_probability_as_in_constriction() -> None:
    """float32 products can round up to the whole free weight: the last symbol then starts
    at 2**24. constriction builds that model too, cannot encode the symbol (KeyError), nor
    can the compiled encoder (ValueError, nothing written), and no decoder ever decodes
    it; quantise accepts the table."""
    table = np.array([8158.5356, 27.385002, 8.5740428e-09], np.float32)
    assert quantised(table).tolist() == [0, 16721089, 1 << 24, 1 << 24]
    assert np.array_equal(quantised(table), constriction_cdf(table))
    with pytest.raises(KeyError):
        Queue.RangeEncoder().encode(2, entropy.model_of(table))
    ours = rc.Encoder()
    with pytest.raises(ValueError):
        ours.encode(np.array([2]), entropy.FAMILY, table[None])
    assert ours.is_empty()
    rng = np.random.default_rng(9)
    words = rng.integers(0, 1 << 32, 40, dtype=np.uint64).astype(np.uint32)
    tables = np.tile(table, (500, 1))
    decoded = decode_all(words, tables)
    assert np.array_equal(decoded, constriction_decode(words, tables))
    assert set(decoded.tolist()) == {0, 1}


@pytest.mark.parametrize("counts", [[5.0], [], [0.0, 0.0], [np.nan, 1.0], [np.inf, 1.0],
                                    [3e38, 3e38],
                                    [1e-39, 0.0], [-1.0, -2.0]])
def test_quantise_refuses_what_constriction_refuses(counts: list[float]) -> None:
    """No model where constriction raises: fewer than 2 symbols, a sum that is not a
    positive normal float32 number (3e38 + 3e38 overflows, 1e-39 is subnormal)."""
    table = np.array(counts, np.float32)
    with pytest.raises(ValueError):
        entropy.model_of(table)
    assert not rc.quantise(table, np.zeros(len(table) + 1, np.int64))


def test_quantise_accepts_negative_counts_as_constriction_does() -> None:
    """constriction's fast models do not check signs: [-1, 2] codes (negative products
    truncate to 0); [1, -1, 1] builds a decreasing cdf, whose middle symbol constriction
    "codes" with a wrapped-around probability: quantise refuses that one."""
    table = np.array([-1, 2], np.float32)
    assert np.array_equal(quantised(table), constriction_cdf(table))
    assert quantised(table).tolist() == [0, 1, 1 << 24]
    assert not rc.quantise(np.array([1, -1, 1], np.float32), np.zeros(4, np.int64))
    assert not rc.quantise(np.ones(3, np.float32), np.zeros(3, np.int64))  # wrong cdf size


# --- the decoder --------------------------------------------------------------------------


def encoded(symbols: np.ndarray, tables: np.ndarray, trimmed: bool) -> np.ndarray:
    """constriction's code of the symbols, ended as rowcast's writer ends it (`finish`),
    as decoder words."""
    coder = Queue.RangeEncoder()
    entropy.encode(coder, symbols, tables)
    return rc.payload_words(entropy.finish(coder, trimmed=trimmed), trimmed=trimmed)


@pytest.mark.parametrize("seed", range(6))
@pytest.mark.parametrize("kind", ["grid", "mixture", "extreme", "priors", "float64"])
def test_decodes_what_constriction_encodes(seed: int, kind: str) -> None:
    """Thousands of symbols, coded by constriction (trimmed and whole-word endings),
    decode to the same symbols; past the end both decoders read zeros alike."""
    rng = np.random.default_rng(1000 * seed + len(kind))
    n = 3000
    if kind == "grid":
        tables = grid_rows(rng, n)
    elif kind == "mixture":
        tables = mixtures(rng, n)
    elif kind == "extreme":  # mostly 1-in-4-million symbols: a word read every few
        tables = extreme_tables()[rng.integers(0, len(extreme_tables()), n)]
    elif kind == "priors":
        tables = tuning.prior_tables("offsets")[rng.integers(0, 8, n)]
    else:
        tables = mixtures(rng, n).astype(np.float64)
    symbols = rng.integers(0, tables.shape[1], n).astype(np.int32)
    drawn = rng.random(n) < 0.7 if kind != "extreme" else rng.random(n) < 0.2
    symbols[drawn] = draw(rng, tables[drawn])
    for trimmed in (True, False):
        words = encoded(symbols, tables, trimmed)
        assert np.array_equal(decode_all(words, tables), symbols)
        beyond = np.concatenate([tables, tables[:200]])  # 200 more symbols from zeros
        assert np.array_equal(decode_all(words, beyond), constriction_decode(words, beyond))


@pytest.mark.parametrize("kind", ["grid", "extreme"])
def test_a_guess_changes_only_where_the_search_starts(kind: str) -> None:
    """The decoder searches each symbol from a guess (the decoder passes its mean): right,
    near, far, at either end or outside the alphabet, the symbols are the same."""
    rng = np.random.default_rng(7)
    n = 3000
    tables = (grid_rows(rng, n) if kind == "grid"
              else extreme_tables()[rng.integers(0, len(extreme_tables()), n)])
    symbols = draw(rng, tables).astype(np.int32)
    words = encoded(symbols, tables, True)
    exact = symbols.astype(np.int64)
    for guesses in (exact, exact + rng.integers(-3, 4, n), rng.integers(-5, 262, n),
                    np.zeros(n, np.int64), np.full(n, tables.shape[1] - 1), np.full(n, -1)):
        assert np.array_equal(decode_guessing(words, tables, guesses), symbols)


@pytest.mark.parametrize("kind", ["grid", "mixture", "extreme", "priors", "float64"])
def test_the_encoder_writes_constrictions_words(kind: str) -> None:
    """rowcast's compiled encoder against constriction's RangeEncoder, for 0 to 3000
    symbols: the same complete code (`get_compressed`), the same position and interval
    (`pos`, which `finish` reads to end the code), the same emptiness. The symbols are
    coded one at a time, so the test sees the encoder hold words back while its interval
    straddles a carry, and that happens."""
    rng = np.random.default_rng(len(kind))
    held = 0
    for n in (0, 1, 2, 7, 300, 3000):
        if kind == "grid":
            tables = grid_rows(rng, max(n, 2))[:n]
        elif kind in ("mixture", "float64"):
            tables = mixtures(rng, max(n, 2))[:n]
            tables = tables.astype(np.float64) if kind == "float64" else tables
        elif kind == "extreme":
            tables = extreme_tables()[rng.integers(0, len(extreme_tables()), n)]
        else:
            tables = tuning.prior_tables("offsets")[rng.integers(0, 8, n)]
        symbols = draw(rng, tables).astype(np.int32) if n else np.zeros(0, np.int32)
        theirs, ours = Queue.RangeEncoder(), rc.Encoder()
        entropy.encode(theirs, symbols, tables)
        for i in range(n):
            ours.encode(symbols[i : i + 1], entropy.FAMILY, tables[i : i + 1])
            held += bool(ours.state[rc.E_HELD])
        assert np.array_equal(ours.get_compressed(), theirs.get_compressed())
        assert ours.pos() == (theirs.pos()[0], tuple(theirs.pos()[1]))
        assert ours.is_empty() == theirs.is_empty()
        for trimmed in (True, False):
            assert entropy.finish(ours, trimmed) == entropy.finish(theirs, trimmed)
    assert held > 0


def test_the_encoder_writes_constrictions_words_in_its_rare_situations() -> None:
    """Two paths random data seldom takes, against constriction: (1) symbols chosen to keep
    the interval straddling a carry, so that the encoder holds many words back, then random
    ones that settle it, cycle after cycle; (2) an interval under 2**33 wide at the end, for
    which the code ends in an extra zero word (4 symbols of 255 equally likely ones)."""
    uniform = np.ones((1, 256), np.float32)
    rng = np.random.default_rng(3)
    ours, theirs, most, sealed_held = rc.Encoder(), Queue.RangeEncoder(), 0, set()
    for step in range(480):
        pick = int(rng.integers(0, 256))
        if step % 40 >= 20:  # hold: the symbol that leaves the most words held (of those,
            trials = []  # alternately the highest and the lowest interval)
            for symbol in range(0, 256, 5):
                trial = rc.Encoder()
                trial.state, trial.words = ours.state.copy(), ours.words.copy()
                trial.encode(np.array([symbol]), entropy.FAMILY, uniform)
                lower = int(trial.state[rc.E_LOWER])
                trials.append((int(trial.state[rc.E_HELD]), lower if step % 80 < 40 else -lower,
                               symbol))
            pick = max(trials)[2]
        ours.encode(np.array([pick]), entropy.FAMILY, uniform)
        entropy.encode(theirs, np.array([pick], np.int32), uniform)
        most = max(most, int(ours.state[rc.E_HELD]))
        if ours.state[rc.E_HELD] and step % 5 == 0:  # ended while words are held
            assert np.array_equal(ours.get_compressed(), theirs.get_compressed())
            lower = int(ours.state[rc.E_LOWER])
            sealed_held.add(lower + (1 << 32) - 1 >= 1 << 64)  # the ending point wraps
    assert most >= 3 and sealed_held == {False, True}
    assert np.array_equal(ours.get_compressed(), theirs.get_compressed())
    narrow = 0
    for symbols in rng.integers(0, 255, (8, 4)):
        ours, theirs = rc.Encoder(), Queue.RangeEncoder()
        tables = np.ones((4, 255), np.float32)
        ours.encode(symbols, entropy.FAMILY, tables)
        entropy.encode(theirs, symbols.astype(np.int32), tables)
        lower, width = ours.pos()[1]
        narrow += (lower + width) % (1 << 64) >> 32 == (lower + (1 << 32) - 1) % (1 << 64) >> 32
        assert np.array_equal(ours.get_compressed(), theirs.get_compressed())
    assert narrow >= 4


def test_shared_row_models_code_as_their_tables_do() -> None:
    """`tablecdfs.encode_rows` (the encoder's models of `all_tables()` rows, built once)
    writes what the tables themselves give the encoder: the same words."""
    from rowcast import tablecdfs

    rng = np.random.default_rng(11)
    rows = rng.integers(0, len(tab.all_tables()), 2000)
    tables = tab.all_tables()[rows]
    symbols = draw(rng, tables).astype(np.int64)
    by_tables, by_rows = rc.Encoder(), rc.Encoder()
    by_tables.encode(symbols, entropy.FAMILY, tables)
    tablecdfs.encode_rows(by_rows, symbols, rows)
    assert np.array_equal(by_rows.get_compressed(), by_tables.get_compressed())


def test_empty_and_zero_payloads() -> None:
    """No words, or zero words: a point of 0, which codes the lowest symbols; as
    constriction decodes them."""
    rng = np.random.default_rng(3)
    tables = np.concatenate([grid_rows(rng, 400), mixtures(rng, 400)])
    for words in (np.zeros(0, np.uint32), np.zeros(1, np.uint32), np.zeros(9, np.uint32)):
        decoded = decode_all(words, tables)
        assert np.array_equal(decoded, constriction_decode(words, tables))
        assert (decoded >= 0).all()
    assert rc.payload_words(b"").size == 0


def test_truncated_payloads_read_zeros_and_nothing_past_the_end() -> None:
    """Every prefix of a trimmed payload decodes as constriction decodes it (zeros past
    the end); the words sit in a larger buffer of 0xFFFFFFFF, so a read past the end
    would show."""
    rng = np.random.default_rng(4)
    tables = np.concatenate([mixtures(rng, 150), extreme_tables()[rng.integers(0, 22, 50)]])
    symbols = draw(rng, tables)
    coder = entropy.encoder()
    entropy.encode(coder, symbols, tables)
    payload = entropy.finish(coder)
    for cut in range(len(payload) + 1):
        words = rc.payload_words(payload[:cut])
        buffer = np.full(len(words) + 64, 0xFFFFFFFF, np.uint32)
        buffer[: len(words)] = words
        view = buffer[: len(words)]
        decoded = decode_all(view, tables)
        assert np.array_equal(decoded, constriction_decode(words, tables)), cut
        if cut == len(payload):
            assert np.array_equal(decoded, symbols)


def test_invalid_data_gives_minus_one_where_constriction_raises() -> None:
    """The first point must lie below 2**64 - 2**24 (quantile < 2**24); after a symbol, a
    point near the top of its interval can exceed the next model's last quantile."""
    table = np.array([1.0, 2.0, 3.0, 4.0], np.float32)
    cdf = quantised(table).astype(np.uint32)
    for words, expected in (([0xFFFFFFFF, 0xFF000000], -1), ([0xFFFFFFFF, 0xFEFFFFFF], 3),
                            ([0xFFFFFFFF], 3)):
        words = np.array(words, np.uint32)
        state = rc.decoder_start(words)
        before = state.copy()
        assert rc.decode_symbol(state, words, cdf) == expected
        assert constriction_decode(words, table[None])[0] == expected
        if expected < 0:
            assert np.array_equal(state, before)  # unchanged
    # [0, 1] gives symbol 1 all but one of the 2**24 slots: a point at the very top of
    # its interval leaves a quantile of exactly 2**24 for the next symbol.
    table = np.array([0.0, 1.0], np.float32)
    cdf = quantised(table)
    point = FIRST_SCALE * int(cdf[1]) + FIRST_SCALE * int(cdf[2] - cdf[1]) - 1
    words = np.array([point >> 32, point & 0xFFFFFFFF], np.uint32)
    expected = [1, -1, -1]
    assert decode_all(words, np.tile(table, (3, 1))).tolist() == expected
    assert constriction_decode(words, np.tile(table, (3, 1))).tolist() == expected
    state = rc.decoder_start(words)
    assert [rc.decode_symbol(state, words, cdf) for _ in range(3)] == expected


def test_garbage_payloads_decode_as_constriction_decodes_them() -> None:
    """Random words (high bits set, so that some are invalid mid-way): the same symbols,
    and -1 at the same symbol where constriction raises."""
    rng = np.random.default_rng(5)
    refused_midway = 0
    for _ in range(400):
        words = rng.integers(0, 1 << 32, rng.integers(0, 9), dtype=np.uint64).astype(np.uint32)
        words[::2] |= np.uint32(0xFFFF0000)
        tables = grid_rows(rng, 60)
        decoded = decode_all(words, tables)
        assert np.array_equal(decoded, constriction_decode(words, tables))
        refused_midway += decoded[0] >= 0 and decoded[-1] < 0
    assert refused_midway >= 1


def test_decode_symbol_refuses_hand_made_cdfs_without_reading_out_of_them() -> None:
    """A cdf that does not start at 0, or that has fewer than 2 entries (never from
    quantise), gives -1, and so does a state of zero range; a table constriction refuses
    gives -1 from decode_counts."""
    words = np.zeros(2, np.uint32)
    state = rc.decoder_start(words)
    assert rc.decode_symbol(state, words, np.array([5, 9, 1 << 24], np.int64)) == -1
    assert rc.decode_symbol(state, words, np.array([0], np.uint32)) == -1
    assert rc.decode_symbol(state, words, np.zeros(0, np.uint32)) == -1
    assert rc.decode_counts(state, words, np.array([5.0], np.float32),
                            np.zeros(2, np.uint32)) == -1
    assert np.array_equal(state, rc.decoder_start(words))
    state[rc.RANGE] = 0  # a broken state: no division by zero
    assert rc.decode_symbol(state, words, np.array([0, 9, 1 << 24], np.int64)) == -1


# --- the test vector of docs/FORMAT.md ------------------------------------------------------

VECTOR_TABLE = [5, 1, 3, 7]
VECTOR_SYMBOLS = [3, 0, 1, 3, 2, 3, 0, 3, 1, 2, 3, 3, 0, 2, 1, 3, 0, 3, 2, 3]
VECTOR_TRIMMED = bytes.fromhex("9ca53379f7")  # format 6 on: big-endian, trimmed
VECTOR_WORDS = bytes.fromhex("7933a59c3c8902f6")  # constriction's own, little-endian


def test_vector() -> None:
    """A fixed table and symbols give exactly these bytes, and decode back."""
    table = np.array(VECTOR_TABLE, np.float32)
    tables = np.tile(table, (len(VECTOR_SYMBOLS), 1))
    symbols = np.array(VECTOR_SYMBOLS, np.int32)
    for trimmed, payload in ((True, VECTOR_TRIMMED), (False, VECTOR_WORDS)):
        coder = entropy.encoder()
        entropy.encode(coder, symbols, tables)
        assert entropy.finish(coder, trimmed=trimmed) == payload
        words = rc.payload_words(payload, trimmed=trimmed)
        assert words.tolist() == [0x9CA53379, 0xF7000000 if trimmed else 0xF602893C]
        state = rc.decoder_start(words)
        cdf = np.zeros(5, np.uint32)
        assert rc.quantise(table, cdf)
        assert [rc.decode_symbol(state, words, cdf) for _ in symbols] == VECTOR_SYMBOLS
        assert int(state[rc.NEXT]) == 3  # one word read past the two of the payload
