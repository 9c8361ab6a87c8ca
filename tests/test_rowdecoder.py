"""Specification of the compiled decoder: it gives the pixels of the reference decoder in
Python (`codec._decode_rows`, which the trace tests hold against the encoder's tables) for
every kind of payload, model and shape, and refuses what the reference refuses."""


import numpy as np
import pytest
from conftest import GOLDEN, TINY
from test_codec import EDGE_SHAPES, forced_adaptive, small_model
from test_golden import FORMAT7, LEGACY

import rowcast
from rowcast import codec, entrycodec, rowdecoder
from rowcast.codec import decode_batch, encode_batch
from rowcast.entropy import PayloadError


def both_ways(engine, payloads, planes, shape, methods):
    """(compiled, reference) decodings of the same payloads."""
    return tuple(decode_batch(engine, payloads, planes, *shape, methods=methods,
                              compiled=compiled) for compiled in (True, False))


@pytest.mark.parametrize("method", ["model", "tuned", "adaptive"])
@pytest.mark.parametrize("planes", [1, 3])
def test_compiled_decoder_gives_the_reference_pixels_on_photos(default_engine, rgb64, method,
                                                               planes):
    """Held-out photo thumbnails, each coding method: both decoders restore every pixel."""
    images = [im[:planes, :24, :32].copy() for im in rgb64[:3]]
    coded = encode_batch(default_engine, images, method)
    fast, reference = both_ways(default_engine, [c.payload for c in coded], planes, (24, 32),
                                [c.method for c in coded])
    assert np.array_equal(fast, reference) and np.array_equal(fast, np.stack(images))


@pytest.mark.parametrize("components", [1, 2])
@pytest.mark.parametrize("planes", [1, 3])
@pytest.mark.parametrize("shape", EDGE_SHAPES)
def test_compiled_decoder_matches_the_reference_at_edge_sizes_with_any_gains(
        planes, shape, components):
    """Single rows and columns, 1x1, odd sizes; extreme feedback gains; one or two
    components (mixed, pure first and pure second weights): the same pixels."""
    engine = small_model(left=5, activity=True, components=components)
    rng = np.random.default_rng(shape[0] * 31 + shape[1])
    images = [rng.integers(0, 256, (planes, *shape), dtype=np.uint8) for _ in range(3)]
    gains = [(np.array([15, 0, 15]), np.array([-8, 7, 0])),
             (np.array([0, 15, 3]), np.array([7, -8, -1])),
             (np.array([1, 2, 3]), np.array([0, 0, 1]))]
    payloads = [forced_adaptive(engine, im, g, b) for im, (g, b) in zip(images, gains,
                                                                         strict=True)]
    fast, reference = both_ways(engine, payloads, planes, shape, "adaptive")
    assert np.array_equal(fast, reference) and np.array_equal(fast, np.stack(images))


def test_a_damaged_payload_is_refused_by_the_compiled_decoder(default_engine, rgb64):
    """A payload cut short decodes to other pixels or is refused; it never crashes, and the
    compiled decoder agrees with the reference on what it gives."""
    image = rgb64[0][:, :16, :16].copy()
    payload = encode_batch(default_engine, [image])[0].payload
    for cut in (payload[: len(payload) // 2], b"", b"\xff" * 64):
        outcomes = []
        for compiled in (True, False):
            try:
                outcomes.append(decode_batch(default_engine, [cut], 3, 16, 16,
                                             methods="adaptive", compiled=compiled))
            except PayloadError:
                outcomes.append(None)
        assert (outcomes[0] is None) == (outcomes[1] is None)
        if outcomes[0] is not None:
            assert np.array_equal(outcomes[0], outcomes[1])
            assert not np.array_equal(outcomes[0][0], image)


def test_every_bundled_model_has_a_compiled_kernel(default_engine):
    """The int32 accumulators hold every layer of the bundled model (bounds < 2**31)."""
    assert rowdecoder.kernel_of(default_engine) is not None


@pytest.mark.parametrize(("archive", "model"), [(case[0], case[1]) for case in LEGACY]
                         + [(FORMAT7.name, TINY)])
def test_every_golden_archive_decodes_alike_in_both_decoders(archive, model, monkeypatch):
    """Each committed golden archive (formats 1 to 7, every method and layout, one and two
    components): the compiled decoder restores what the reference restores."""
    monkeypatch.setattr(entrycodec, "REFERENCE_PIXELS", -1)  # compiled, however small
    compiled = [(e.path, c) for e, c in rowcast.decode_entries(GOLDEN / archive, model=model)]
    decode_batch = codec.decode_batch
    monkeypatch.setattr(codec, "decode_batch",
                        lambda *args, **kw: decode_batch(*args, **{**kw, "compiled": False}))
    reference = [(e.path, c) for e, c in rowcast.decode_entries(GOLDEN / archive, model=model)]
    assert [p for p, _ in compiled] == [p for p, _ in reference]
    for (path, mine), (_, theirs) in zip(compiled, reference, strict=True):
        same = (np.array_equal(mine.values, theirs.values) if hasattr(mine, "values")
                else mine == theirs)
        assert same, path
