"""Specification tests for pictures of every pixel format to payloads and back
(src/rowcast/entrycodec.py), with the committed tiny model so they stay fast."""

import io

import numpy as np
import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st
from PIL import Image

from rowcast import entrycodec
from rowcast.entrycodec import CodingError, Wanted, decode_values, encode_pictures
from rowcast.picture import PALETTE, TRANSPARENCY, Picture
from rowcast.pixelformats import BY_NAME, FORMATS

EIGHT_BIT = [f.name for f in FORMATS if f.bits != 16]


def smooth(planes: int, h: int, w: int, top: int, seed: int) -> np.ndarray:
    """A smooth gradient with a little noise, like a sensor's image, within 0..top."""
    rng = np.random.default_rng(seed)
    y, x = np.mgrid[0:h, 0:w]
    base = np.stack([(x * (c + 2) + y * 3) % (top + 1) for c in range(planes)])
    noise = rng.integers(0, max(1, top // 64) + 1, base.shape)
    return np.minimum(base + noise, top)


def picture_of(name: str, h: int = 12, w: int = 16, seed: int = 0) -> Picture:
    fmt = BY_NAME[name]
    if fmt.palette:
        values = smooth(1, h, w, 11, seed).astype(np.uint8)
        return Picture(values, name, ((PALETTE, bytes(range(36))), (TRANSPARENCY, b"\x00\x80")))
    top = 1 if fmt.bits == 1 else fmt.maximum
    return Picture(smooth(fmt.planes, h, w, top, seed).astype(fmt.dtype), name)


def round_trip(engine, pictures):
    coded = encode_pictures(engine, pictures)
    wanted = [Wanted(p.pixel_format, p.width, p.height, c.method, c.payload)
              for p, c in zip(pictures, coded, strict=True)]
    return coded, decode_values(engine, wanted)


@settings(max_examples=25, deadline=None,
          suppress_health_check=[HealthCheck.function_scoped_fixture])
@given(name=st.sampled_from([f.name for f in FORMATS]), h=st.integers(1, 80),
       w=st.integers(1, 80), seed=st.integers(0, 2**32 - 1), noisy=st.booleans())
def test_any_picture_of_any_format_and_size_round_trips_exactly(tiny_engine, name, h, w, seed,
                                                                 noisy):
    """Property: smooth or uniformly random values of every format, 1 to 80 px a side,
    decode to the same values and dtype, whichever method the encoder picks."""
    fmt = BY_NAME[name]
    if noisy and not fmt.palette:
        top = 1 if fmt.bits == 1 else fmt.maximum
        values = np.random.default_rng(seed).integers(0, top + 1, (fmt.planes, h, w))
        picture = Picture(values.astype(fmt.dtype), name)
    else:
        picture = picture_of(name, h, w, seed)
    ((coded,), (values,)) = round_trip(tiny_engine, [picture])
    assert coded.method in ("coded", "png", "literal")
    assert values.dtype == picture.values.dtype and np.array_equal(values, picture.values)


@pytest.mark.parametrize("name", EIGHT_BIT)
def test_every_eight_bit_and_one_bit_format_round_trips_exactly(tiny_engine, name):
    pictures = [picture_of(name, seed=s) for s in range(3)]
    _, decoded = round_trip(tiny_engine, pictures)
    for picture, values in zip(pictures, decoded, strict=True):
        assert values.dtype == picture.values.dtype
        assert np.array_equal(values, picture.values)


def test_colour_under_fully_transparent_pixels_is_kept(tiny_engine):
    """RGBA: alpha 0 does not make the colour beneath it free to change."""
    values = smooth(4, 10, 10, 255, 1).astype(np.uint8)
    values[3, :5] = 0
    (decoded,) = round_trip(tiny_engine, [Picture(values, "RGBA")])[1]
    assert np.array_equal(decoded, values)


def test_a_picture_is_never_coded_larger_than_its_raw_values(tiny_engine):
    """The shortest of coded, PNG and literal: noise costs at most its raw size."""
    rng = np.random.default_rng(2)
    noise = Picture(rng.integers(0, 256, (4, 9, 11), dtype=np.uint8), "RGBA")
    (coded,), (decoded,) = round_trip(tiny_engine, [noise])
    assert len(coded.payload) <= noise.values.size
    assert np.array_equal(decoded, noise.values)


def test_an_opaque_alpha_plane_costs_almost_nothing(tiny_engine):
    """A constant alpha plane beside the colour adds only a few bytes."""
    rgb = smooth(3, 24, 24, 255, 3).astype(np.uint8)
    alpha = np.full((1, 24, 24), 255, np.uint8)
    (with_alpha, without) = encode_pictures(
        tiny_engine, [Picture(np.concatenate([rgb, alpha]), "RGBA"), Picture(rgb, "RGB")])
    assert len(with_alpha.payload) - len(without.payload) <= 24


def test_a_coded_payload_names_a_piece_method_per_predictor_plane_group(tiny_engine):
    (coded,) = encode_pictures(tiny_engine, [picture_of("RGBA", 32, 32)])
    assert coded.method == "coded"
    assert len(coded.parts) == 2  # colour, then alpha
    assert set(coded.parts) <= set(entrycodec.PIECES)


def test_the_png_fallback_is_a_png_that_pillow_reads_as_the_same_palette_image():
    """Pillow, an independent reader, decodes the palette fallback to the same indices."""
    picture = picture_of("P", 20, 20)
    image = Image.open(io.BytesIO(entrycodec.png_of(picture)))
    assert image.mode == "P"
    assert np.array_equal(np.asarray(image), picture.values[0])
    assert bytes(image.getpalette()[:36]) == bytes(range(36))


@pytest.mark.parametrize("name", ["RGB", "LA", "1", "P"])
def test_png_and_literal_fallbacks_decode_exactly(name):
    picture = picture_of(name, 7, 5)
    for method, payload in (("png", entrycodec.png_of(picture)),
                            ("literal", entrycodec.literal_of(picture))):
        (values,) = decode_values(None, [Wanted(picture.pixel_format, 5, 7, method, payload)])
        assert np.array_equal(values, picture.values)


def test_a_damaged_payload_fails_alone(tiny_engine):
    """Damage to one payload costs that picture only; the others in its batch decode."""
    pictures = [picture_of("RGB", 16, 16, seed=s) for s in range(4)]
    coded = encode_pictures(tiny_engine, pictures)
    wanted = [Wanted(p.pixel_format, 16, 16, c.method, c.payload)
              for p, c in zip(pictures, coded, strict=True)]
    payload = bytearray(wanted[1].payload)
    payload[:2] = b"\x05\x07"  # a group that claims five pieces
    wanted[1] = Wanted(wanted[1].format, 16, 16, "coded", bytes(payload))
    decoded = decode_values(tiny_engine, wanted)
    assert isinstance(decoded[1], CodingError)
    for i in (0, 2, 3):
        assert np.array_equal(decoded[i], pictures[i].values)


@pytest.mark.parametrize("cut", [0, 1, 2, 5])
def test_truncated_coded_payloads_raise_coding_error(tiny_engine, cut):
    picture = picture_of("LA", 8, 8)
    (coded,) = encode_pictures(tiny_engine, [picture])
    assert coded.method == "coded"
    (result,) = decode_values(tiny_engine, [Wanted(picture.pixel_format, 8, 8, "coded",
                                                   coded.payload[:cut])])
    assert isinstance(result, CodingError)


def test_a_literal_payload_of_the_wrong_length_is_refused():
    (result,) = decode_values(None, [Wanted(BY_NAME["RGB"], 4, 4, "literal", bytes(47))])
    assert isinstance(result, CodingError)


def pieces_of(payload: bytes) -> list[str]:
    """The piece methods of a coded payload's groups, in order (tiles not opened)."""
    reader, names = entrycodec._Reader(payload), []
    while reader.pos < len(payload):
        for _ in range(reader.number()):
            names.append(reader.piece()[0])
    return names


@pytest.mark.parametrize(("name", "h", "w"), [("RGB", 20, 300), ("RGBA", 270, 12),
                                              ("L16", 257, 257), ("P", 30, 513)])
def test_a_picture_larger_than_a_thumbnail_is_coded_in_tiles_and_round_trips(tiny_engine,
                                                                             name, h, w):
    """A side over TILE: every predicted plane set becomes a tiles piece (edge tiles
    smaller, down to a 1 x 1 corner), and the picture comes back exactly. (Sensor-like
    noise of 1/16 of the range on the gradients: on the plain ones the tiny model codes
    near PNG's size, and PNG may win.)"""
    picture = picture_of(name, h, w, seed=h + w)
    fmt = BY_NAME[name]
    if not fmt.palette:
        noise = np.random.default_rng(h * w).integers(0, fmt.maximum // 16 + 1, (fmt.planes, h, w))
        picture = Picture(np.minimum(picture.values + noise, fmt.maximum).astype(fmt.dtype), name)
    (coded,), (values,) = round_trip(tiny_engine, [picture])
    assert coded.method == "coded" and "tiles" in pieces_of(coded.payload)
    assert np.array_equal(values, picture.values)


def test_thumbnails_are_not_tiled(tiny_engine):
    """A side of TILE or less: one piece for the plane set, as before tiles existed."""
    noise = np.random.default_rng(4).integers(0, 64, (3, 256, 40), dtype=np.uint8)
    (coded,), _ = round_trip(tiny_engine, [Picture(noise, "RGB")])
    assert coded.method == "coded" and pieces_of(coded.payload) in (["zlib"], ["adaptive"])


def test_tiles_of_different_pictures_decode_together_in_picture_rows(tiny_engine):
    """Same-sized tiles of several pictures share batches; progress, reported in picture
    rows, adds up to the pictures' heights however their planes are split."""
    pictures = [picture_of("RGBA", 20, 300, seed=1), picture_of("RGB", 20, 260, seed=2),
                picture_of("L", 9, 9, seed=3)]
    coded = encode_pictures(tiny_engine, pictures)
    wanted = [Wanted(p.pixel_format, p.width, p.height, c.method, c.payload)
              for p, c in zip(pictures, coded, strict=True)]
    rows = []
    decoded = decode_values(tiny_engine, wanted, progress=rows.append)
    for got, picture in zip(decoded, pictures, strict=True):
        assert np.array_equal(got, picture.values)
    coded_rows = sum(p.height for p, c in zip(pictures, coded, strict=True)
                     if c.method == "coded")
    assert sum(rows) == pytest.approx(coded_rows)


def tiles_payload(side: int, tiles: list[bytes], trailing: bytes = b"") -> bytes:
    """A one-group coded payload whose piece is a tiles piece of the given tile pieces."""
    body = entrycodec.varint.pack(side) + b"".join(tiles) + trailing
    return b"\x01" + entrycodec._piece("tiles", body)


@pytest.mark.parametrize(("side", "count", "trailing", "reason"), [
    (8, 24, b"", "side"), (300, 1, b"", "side"), (256, 2, b"\x00", "trailing"),
    (256, 1, b"", "truncated"), (16, 1000, b"", "bytes")])
def test_a_malformed_tiles_piece_is_refused(side, count, trailing, reason):
    """Tiles smaller than 16, one tile for the whole plane, bytes after the last tile, too
    few tiles, or a tile count the bytes cannot hold: a CodingError, nothing allocated."""
    h, w = 20, 300
    tile = entrycodec._piece("literal", bytes(20 * 16))
    payload = tiles_payload(side, [tile] * min(count, 2) if reason != "bytes" else [],
                            trailing)
    (result,) = decode_values(None, [Wanted(BY_NAME["L"], w, h, "coded", payload)])
    assert isinstance(result, CodingError)


def test_a_tiles_piece_inside_a_tiles_piece_is_refused():
    inner = entrycodec._piece("tiles", entrycodec.varint.pack(16))
    payload = tiles_payload(256, [inner, inner])
    (result,) = decode_values(None, [Wanted(BY_NAME["L"], 300, 20, "coded", payload)])
    assert isinstance(result, CodingError) and "inside" in str(result)
