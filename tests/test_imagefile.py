"""Specification tests for image files as rowcast keeps them (src/rowcast/imagefile.py).

Every input file is sniffed by content: an image rowcast codes, bytes kept as they are, or a
refusal with the reason. An image reads as a Picture with every value at full depth and its
palette, transparency and metadata as extras; writing it back and reading again gives the same
Picture. Values are checked against independent decoders (Pillow, imagecodecs, tifffile) and
chunk layouts against the PNG specification.
"""

from __future__ import annotations

import io
import struct
import zlib
from pathlib import Path

import imagecodecs
import numpy as np
import pytest
import tifffile
from hypothesis import given, settings
from hypothesis import strategies as st
from PIL import Image

from rowcast.imagefile import (
    ImageError,
    Sniffed,
    can_write,
    describe,
    read_picture,
    restored,
    sniff,
    write_picture,
)
from rowcast.picture import PALETTE, TRANSPARENCY, Picture
from rowcast.pixelformats import FORMATS, pixel_format

SIGNATURE = b"\x89PNG\r\n\x1a\n"


def random_picture(name: str, h: int, w: int, seed: int = 0, container: str = "png") -> Picture:
    """Random values of a format; a palette image gets a 7-entry palette and a tRNS, an alpha
    image a fully transparent first row."""
    rng = np.random.default_rng(seed)
    fmt = pixel_format(name)
    if fmt.palette:
        values = rng.integers(0, 7, (1, h, w)).astype(np.uint8)
        extras = ((PALETTE, rng.bytes(21)), (TRANSPARENCY, rng.bytes(4)))
        return Picture(values, name, extras, container)
    values = rng.integers(0, fmt.maximum + 1, (fmt.planes, h, w)).astype(fmt.dtype)
    if fmt.alpha:
        values[-1, 0] = 0  # a fully transparent first row, whose colour must be kept
    return Picture(values, name, (), container)


def chunk(name: bytes, data: bytes) -> bytes:
    """A PNG chunk as the PNG specification lays it out: length, type, data, CRC."""
    return struct.pack(">I", len(data)) + name + data + struct.pack(">I", zlib.crc32(name + data))


def chunks_of(data: bytes) -> list[tuple[bytes, bytes]]:
    """(type, data) of every chunk of a PNG file, CRCs checked."""
    assert data[:8] == SIGNATURE
    out, pos = [], 8
    while pos < len(data):
        (length,) = struct.unpack(">I", data[pos : pos + 4])
        name, body = data[pos + 4 : pos + 8], data[pos + 8 : pos + 8 + length]
        assert struct.unpack(">I", data[pos + 8 + length : pos + 12 + length])[0] == zlib.crc32(
            name + body)
        out.append((name, body))
        pos += 12 + length
    return out


def png_with(pixels: np.ndarray, before: list[tuple[bytes, bytes]],
             after: list[tuple[bytes, bytes]] = ()) -> bytes:
    """imagecodecs' PNG of `pixels` with extra chunks spliced before and after IDAT."""
    parts = chunks_of(imagecodecs.png_encode(pixels))
    ihdr, idat = parts[0], [c for c in parts if c[0] == b"IDAT"]
    body = [ihdr, *before, *idat, *after, (b"IEND", b"")]
    return SIGNATURE + b"".join(chunk(n, d) for n, d in body)


def stored(tmp_path: Path, name: str, data: bytes) -> Path:
    path = tmp_path / name
    path.write_bytes(data)
    return path


def same(a: Picture, b: Picture) -> bool:
    return (a.format == b.format and a.extras == b.extras and a.values.dtype == b.values.dtype
            and np.array_equal(a.values, b.values))


def round_trip(picture: Picture, tmp_path: Path, name: str = "out") -> tuple[Path, Picture]:
    path = tmp_path / name
    write_picture(picture, path)
    return path, read_picture(path)


# --------------------------------------------------------------------------- PNG


@pytest.mark.parametrize("name", [f.name for f in FORMATS])
def test_every_format_round_trips_through_png_as_an_independent_decoder_sees_it(
        tmp_path: Path, name: str) -> None:
    """Each format written as PNG reads back identically, and Pillow (8 bits and less) or
    imagecodecs (16 bits) decodes the file to the same values."""
    picture = random_picture(name, 9, 13)
    path, back = round_trip(picture, tmp_path)
    assert same(back, picture)
    fmt = pixel_format(name)
    hwc = picture.values.transpose(1, 2, 0)
    if fmt.bits == 16:
        decoded = imagecodecs.png_decode(path.read_bytes())
        assert np.array_equal(decoded.reshape(hwc.shape), hwc)
        return
    with Image.open(path) as im:
        assert im.mode == name
        decoded = np.asarray(im).astype(np.uint8)
        if fmt.palette:
            assert bytes(im.getpalette("RGB")) == picture.extra(PALETTE)
            assert im.info["transparency"] == picture.extra(TRANSPARENCY)
    assert np.array_equal(decoded.reshape(hwc.shape), hwc)


def test_16_bit_rgb_png_keeps_the_low_bytes_that_pillow_drops(tmp_path: Path) -> None:
    """Pillow reads 16-bit RGB PNG as 8-bit (the high bytes); rowcast keeps all 16 bits."""
    pixels = np.full((4, 5, 3), 0x1234, np.uint16)
    pixels[0, 0] = (0xABCD, 0x00FF, 0xFF00)
    path = stored(tmp_path, "deep.png", imagecodecs.png_encode(pixels))

    picture = read_picture(path)

    assert picture.format == "RGB16"
    assert np.array_equal(picture.values.transpose(1, 2, 0), pixels)
    with Image.open(path) as im:
        assert im.mode == "RGB"
        assert tuple(np.asarray(im)[0, 0]) == (0xAB, 0x00, 0xFF)  # low bytes gone


def test_palette_and_its_trns_are_kept_exactly_as_the_file_holds_them(tmp_path: Path) -> None:
    """A 5-entry palette stays 5 entries, and tRNS (one alpha per leading entry, PNG
    specification) keeps its 3 bytes; the rewritten file holds the same PLTE and tRNS."""
    palette = bytes(range(100, 115))
    trns = b"\x00\x80\xff"
    indices = np.array([[0, 1, 2, 3, 4, 0]], np.uint8)
    parts = chunks_of(imagecodecs.png_encode(indices))
    ihdr = bytearray(parts[0][1])
    ihdr[9] = 3  # colour type 3: the same 8-bit samples are palette indices
    body = [(b"IHDR", bytes(ihdr)), (b"PLTE", palette), (b"tRNS", trns),
            *[c for c in parts if c[0] == b"IDAT"], (b"IEND", b"")]
    path = stored(tmp_path, "pal.png", SIGNATURE + b"".join(chunk(n, d) for n, d in body))

    picture = read_picture(path)

    assert picture.format == "P"
    assert picture.extras == ((PALETTE, palette), (TRANSPARENCY, trns))
    assert np.array_equal(picture.values[0], indices)
    out, back = round_trip(picture, tmp_path)
    assert same(back, picture)
    written = dict(chunks_of(out.read_bytes()))
    assert written[b"PLTE"] == palette and written[b"tRNS"] == trns


@pytest.mark.parametrize(("pixels", "trns", "name"), [
    (np.arange(12, dtype=np.uint8).reshape(3, 4), struct.pack(">H", 7), "L"),
    (np.arange(36, dtype=np.uint8).reshape(3, 4, 3), struct.pack(">HHH", 3, 4, 5), "RGB"),
    (np.arange(12, dtype=np.uint16).reshape(3, 4) * 4000, struct.pack(">H", 40000), "L16"),
])
def test_a_transparency_key_is_the_trns_chunk_as_the_specification_defines_it(
        tmp_path: Path, pixels: np.ndarray, trns: bytes, name: str) -> None:
    """Gray keys are 2 bytes, RGB keys 6 (big-endian samples); Pillow sees the same key in
    the rewritten file."""
    path = stored(tmp_path, "key.png", png_with(pixels, [(b"tRNS", trns)]))

    picture = read_picture(path)

    assert picture.format == name
    assert picture.extra(TRANSPARENCY) == trns
    out, back = round_trip(picture, tmp_path)
    assert same(back, picture)
    assert dict(chunks_of(out.read_bytes()))[b"tRNS"] == trns
    with Image.open(out) as im:
        key = im.info["transparency"]
    assert (key if isinstance(key, tuple) else (key,)) == struct.unpack(f">{len(trns) // 2}H",
                                                                         trns)


def test_1_bit_png_reads_as_values_0_and_1_white_being_1(tmp_path: Path) -> None:
    """Pillow's mode 1 (True is white) and ours agree pixel for pixel; it stays 1-bit."""
    bits = np.random.default_rng(3).integers(0, 2, (6, 11)).astype(bool)
    path = tmp_path / "bw.png"
    Image.fromarray(bits).save(path)

    picture = read_picture(path)

    assert picture.format == "1"
    assert np.array_equal(picture.values[0], bits.astype(np.uint8))
    out, back = round_trip(picture, tmp_path)
    assert same(back, picture)
    assert chunks_of(out.read_bytes())[0][1][8] == 1  # IHDR bit depth


def test_low_bit_depths_are_kept_and_gray_is_scaled_by_bit_replication(tmp_path: Path) -> None:
    """A 2-bit gray PNG reads as 8-bit gray 0, 85, 170, 255 (PNG specification's scaling) and
    is written back 2-bit; a 4-bit palette PNG is written back 4-bit."""
    raw = b"\x00" + bytes([0b00011011])
    ihdr = struct.pack(">IIBBBBB", 4, 1, 2, 0, 0, 0, 0)
    path = stored(tmp_path, "two.png", SIGNATURE + chunk(b"IHDR", ihdr)
                  + chunk(b"IDAT", zlib.compress(raw)) + chunk(b"IEND", b""))

    gray = read_picture(path)

    assert gray.format == "L" and gray.values.tolist() == [[[0, 85, 170, 255]]]
    out, back = round_trip(gray, tmp_path, "gray")
    assert same(back, gray)
    assert chunks_of(out.read_bytes())[0][1][8] == 2
    image = Image.fromarray(np.array([[0, 5, 15]], np.uint8), "L").convert("P")
    image.putpalette(bytes(range(48)))
    image.save(tmp_path / "four.png", bits=4)
    palette = read_picture(tmp_path / "four.png")
    out, back = round_trip(palette, tmp_path, "pal")
    assert same(back, palette)
    assert chunks_of(out.read_bytes())[0][1][8] == 4


def test_metadata_chunks_come_back_byte_identical_in_file_order(tmp_path: Path) -> None:
    """iCCP, eXIf, tEXt, iTXt, pHYs, gAMA before the image data and a tEXt after it are kept
    as extras in file order and rewritten at their places with valid CRCs."""
    iccp = b"profile\x00\x00" + zlib.compress(b"not really an ICC profile")
    before = [(b"gAMA", struct.pack(">I", 45455)), (b"iCCP", iccp),
              (b"pHYs", struct.pack(">IIB", 2835, 2835, 1)), (b"eXIf", b"MM\x00*\x00\x00\x00\x08"),
              (b"tEXt", b"Title\x00a cat"), (b"iTXt", b"Author\x00\x00\x00en\x00\x00K\xc3\xa4the")]
    after = [(b"tEXt", b"Comment\x00written after the pixels")]
    pixels = np.arange(48, dtype=np.uint8).reshape(4, 4, 3)
    path = stored(tmp_path, "meta.png", png_with(pixels, before, after))

    picture = read_picture(path)

    assert picture.metadata == (*((f"png:{n.decode()}", d) for n, d in before),
                                ("png:tEXt@end", after[0][1]))
    out, back = round_trip(picture, tmp_path)
    assert same(back, picture)
    names = [n for n, _ in chunks_of(out.read_bytes())]
    written = [c for c in chunks_of(out.read_bytes()) if c[0] not in (b"IHDR", b"IDAT", b"IEND")]
    assert written == before + after
    assert names.index(b"tEXt", names.index(b"IDAT")) > names.index(b"IDAT")
    with Image.open(out) as im:  # Pillow checks every CRC and reads the text
        im.load()
        assert im.text["Title"] == "a cat" and im.info["gamma"] == pytest.approx(0.45455)


def test_truncated_png_is_refused_with_the_reason(tmp_path: Path) -> None:
    data = imagecodecs.png_encode(np.zeros((20, 20), np.uint8))
    path = stored(tmp_path, "cut.png", data[: len(data) - 20])

    verdict = sniff(path)

    assert verdict.action == "refused" and verdict.container == "png"
    assert "truncated PNG" in verdict.reason
    with pytest.raises(ImageError, match=rf"^{path}: truncated PNG"):
        read_picture(path)


def test_damaged_crc_and_animation_are_refused(tmp_path: Path) -> None:
    data = bytearray(png_with(np.zeros((2, 2), np.uint8), [(b"tEXt", b"a\x00b")]))
    data[data.index(b"tEXt") + 5] ^= 1
    assert "bad CRC" in sniff(stored(tmp_path, "crc.png", bytes(data))).reason
    frames = [Image.new("L", (4, 4), v) for v in (0, 99, 200)]
    frames[0].save(tmp_path / "anim.png", save_all=True, append_images=frames[1:])
    assert sniff(tmp_path / "anim.png") == Sniffed(
        "refused", "png", "has 3 frames")


# --------------------------------------------------------------------------- TIFF


@pytest.mark.parametrize(("shape", "dtype", "name", "extra"), [
    ((5, 7), np.uint8, "L", {}), ((5, 7), np.uint16, "L16", {}),
    ((5, 7, 3), np.uint8, "RGB", {}), ((5, 7, 3), np.uint16, "RGB16", {}),
    ((5, 7, 4), np.uint8, "RGBA", {"extrasamples": (2,)}),
    ((5, 7, 4), np.uint16, "RGBA16", {"extrasamples": (2,)}),
    ((5, 7, 2), np.uint16, "LA16", {"extrasamples": (2,), "photometric": "minisblack"}),
])
def test_tiff_keeps_values_icc_and_tags_and_rewrites_them(
        tmp_path: Path, shape, dtype, name: str, extra: dict) -> None:
    """Values equal tifffile's; the ICC profile, description, resolution and compression
    are extras that the rewritten TIFF holds again (tifffile reads them back)."""
    rng = np.random.default_rng(5)
    pixels = rng.integers(0, np.iinfo(dtype).max + 1, shape).astype(dtype)
    icc = b"ICC profile bytes " * 5
    path = tmp_path / "in.tif"
    tifffile.imwrite(path, pixels, iccprofile=icc, description="a scan", software=False,
                     metadata=None, compression="zlib", resolution=((7200, 100), (3, 1)),
                     resolutionunit=3, **extra)

    picture = read_picture(path)

    assert picture.format == name and picture.container == "tiff"
    hwc = picture.values.transpose(1, 2, 0)
    assert np.array_equal(hwc.reshape(pixels.shape), tifffile.imread(path))
    assert picture.extra("tiff:34675") == b"\x07" + icc
    assert picture.extra("tiff:270") == b"\x02a scan\x00"
    assert picture.extra("tiff:282") == b"\x05" + struct.pack("<II", 72, 1)  # tifffile reduced
    assert picture.extra("tiff:259") == b"\x03" + struct.pack("<H", 8)
    assert can_write(picture)
    out, back = round_trip(picture, tmp_path, "out.tif")
    assert same(back, picture)
    with tifffile.TiffFile(out) as tif:
        assert tif.pages[0].iccprofile == icc
        assert tif.pages[0].compression == 8
        assert np.array_equal(tif.asarray(), pixels)


def test_tiff_palette_and_1_bit_pictures(tmp_path: Path) -> None:
    """A 256-entry colour map of 8-bit colours (scaled by 257) is a palette; 1-bit white-is-
    zero reads with 1 for white."""
    cmap = (np.arange(768, dtype=np.uint16).reshape(3, 256) % 256) * 257
    indices = np.arange(40, dtype=np.uint8).reshape(5, 8)
    tifffile.imwrite(tmp_path / "p.tif", indices, photometric="palette", colormap=cmap,
                     software=False, metadata=None)
    palette = read_picture(tmp_path / "p.tif")
    assert palette.format == "P"
    assert palette.extra(PALETTE) == (cmap // 257).T.astype(np.uint8).tobytes()
    assert same(round_trip(palette, tmp_path, "p2.tif")[1], palette)

    bits = np.random.default_rng(2).integers(0, 2, (6, 10)).astype(bool)
    tifffile.imwrite(tmp_path / "w.tif", bits, photometric="miniswhite", software=False,
                     metadata=None)
    bilevel = read_picture(tmp_path / "w.tif")
    assert bilevel.format == "1"
    assert np.array_equal(bilevel.values[0], 1 - bits.astype(np.uint8))
    assert same(round_trip(bilevel, tmp_path, "b2.tif")[1], bilevel)


def test_tiff_resolution_keeps_an_unreduced_fraction(tmp_path: Path) -> None:
    """7200/100 dots per centimetre stays 7200/100 (tifffile alone would write 72/1)."""
    extras = (("tiff:282", b"\x05" + struct.pack("<II", 7200, 100)),
              ("tiff:283", b"\x05" + struct.pack("<II", 300, 7)),
              ("tiff:296", b"\x03" + struct.pack("<H", 3)))
    picture = Picture(np.zeros((1, 2, 3), np.uint8), "L", extras, "tiff")
    out, back = round_trip(picture, tmp_path, "r.tif")
    assert same(back, picture)
    with tifffile.TiffFile(out) as tif:
        assert tif.pages[0].tags["XResolution"].value == (7200, 100)


def test_tiff_refusals_and_tags_that_would_be_lost(tmp_path: Path) -> None:
    """CMYK, floating point and several pages are refused; an EXIF sub-directory, which
    tifffile cannot rewrite, sends the file to bytes rather than losing it."""
    tifffile.imwrite(tmp_path / "cmyk.tif", np.zeros((4, 4, 4), np.uint8), photometric="separated")
    tifffile.imwrite(tmp_path / "float.tif", np.zeros((4, 4), np.float32))
    tifffile.imwrite(tmp_path / "pages.tif", np.zeros((3, 8, 9), np.uint8), metadata=None,
                     photometric="minisblack")
    # an EXIF directory pointer (at the first directory itself, a valid one); tifffile will
    # not write that tag, so a private tag's number is changed to it
    buffer = io.BytesIO()
    tifffile.imwrite(buffer, np.zeros((4, 4), np.uint8), extratags=[(65000, 4, 1, 8, True)])
    stored(tmp_path, "exif.tif", buffer.getvalue().replace(struct.pack("<HH", 65000, 4),
                                                           struct.pack("<HH", 34665, 4)))

    assert sniff(tmp_path / "cmyk.tif").reason == "CMYK images are not supported"
    assert sniff(tmp_path / "float.tif").reason == "floating-point images are not supported"
    assert (sniff(tmp_path / "pages.tif").action, sniff(tmp_path / "pages.tif").reason) == (
        "refused", "has 3 pages")
    verdict = sniff(tmp_path / "exif.tif")
    assert verdict.action == "bytes" and "ExifIFD" in verdict.reason


# --------------------------------------------------------------------------- BMP, PNM, WebP


@pytest.mark.parametrize("mode", ["RGB", "L", "P", "1"])
def test_bmp_reads_as_pillow_does_and_rewrites_exactly(tmp_path: Path, mode: str) -> None:
    rng = np.random.default_rng(7)
    if mode == "RGB":
        image = Image.fromarray(rng.integers(0, 256, (5, 9, 3), dtype=np.uint8))
    else:
        image = Image.fromarray(rng.integers(0, 2 if mode == "1" else 256, (5, 9),
                                             dtype=np.uint8) * (255 if mode == "1" else 1))
        image = image.convert(mode)
        if mode == "P":
            image.putpalette(rng.bytes(768))
    image.save(tmp_path / "in.bmp", dpi=(300, 300))

    picture = read_picture(tmp_path / "in.bmp")

    assert picture.format == mode and picture.container == "bmp"
    with Image.open(tmp_path / "in.bmp") as im:
        expected = np.asarray(im).astype(np.uint8)
    assert np.array_equal(picture.values.transpose(1, 2, 0).reshape(expected.shape), expected)
    assert picture.extra("bmp:resolution") == struct.pack("<II", 11811, 11811)
    assert can_write(picture)
    out, back = round_trip(picture, tmp_path, "out.bmp")
    assert same(back, picture)


def test_pnm_8_and_16_bit_comments_and_odd_maxval(tmp_path: Path) -> None:
    """Raw PGM/PPM values (16-bit big-endian), PBM (1 is black there, so 0 here), plain PNM
    with comments and a maxval of 1000: all kept, and rewritten to the same picture."""
    rgb16 = np.array([[[1, 2, 3], [65535, 256, 0]]], np.uint16)
    path = stored(tmp_path, "deep.ppm", b"P6\n2 1\n65535\n" + rgb16.astype(">u2").tobytes())
    picture = read_picture(path)
    assert picture.format == "RGB16"
    assert np.array_equal(picture.values.transpose(1, 2, 0), rgb16)
    assert same(round_trip(picture, tmp_path, "deep2")[1], picture)

    gray = stored(tmp_path, "g.pgm", b"P5 3 1 255\n\x00\x7f\xff")
    assert read_picture(gray).values.tolist() == [[[0, 127, 255]]]
    bw = stored(tmp_path, "bw.pbm", b"P4\n3 1\n\xa0")
    assert read_picture(bw).values.tolist() == [[[0, 1, 0]]]

    plain = stored(tmp_path, "plain.pgm", b"P2\n# made by hand\n3 2\n# second\n1000\n"
                   b"0 500 1000\n1 2 3\n")
    picture = read_picture(plain)
    assert picture.format == "L16"
    assert picture.values.tolist() == [[[0, 500, 1000], [1, 2, 3]]]
    assert picture.extras == (("pnm:comment", b" made by hand"), ("pnm:comment", b" second"),
                              ("pnm:maxval", b"1000"))
    out, back = round_trip(picture, tmp_path, "plain2")
    assert same(back, picture)
    assert out.read_bytes().startswith(b"P5\n# made by hand\n# second\n3 2\n1000\n")


def test_lossless_webp_keeps_colour_under_alpha_0_and_its_metadata(tmp_path: Path) -> None:
    """Colour under fully transparent pixels survives (exact=True), and ICC, EXIF and XMP
    chunks come back byte for byte; Pillow decodes the rewritten file to the same pixels."""
    rng = np.random.default_rng(11)
    pixels = rng.integers(0, 256, (6, 7, 4), dtype=np.uint8)
    pixels[..., 3] = np.where(pixels[..., 3] < 128, 0, pixels[..., 3])
    Image.fromarray(pixels, "RGBA").save(tmp_path / "in.webp", lossless=True, exact=True,
                                         icc_profile=b"icc!" * 9, exif=b"Exif\x00\x00MM",
                                         xmp=b"<x:xmpmeta/>")

    picture = read_picture(tmp_path / "in.webp")

    assert picture.format == "RGBA"
    assert np.array_equal(picture.values.transpose(1, 2, 0), pixels)
    assert [k for k, _ in picture.extras] == ["webp:ICCP", "webp:EXIF", "webp:XMP"]
    assert picture.extra("webp:ICCP") == b"icc!" * 9
    out, back = round_trip(picture, tmp_path, "out.webp")
    assert same(back, picture)
    with Image.open(out) as im:
        assert np.array_equal(np.asarray(im), pixels)
        assert im.info["icc_profile"] == b"icc!" * 9


def test_opaque_rgba_webp_stays_rgba(tmp_path: Path) -> None:
    """An RGBA picture whose alpha is all 255 is written with the alpha flag set, so it reads
    back as RGBA rather than RGB."""
    picture = random_picture("RGBA", 4, 4, container="webp")
    picture.values[3] = 255
    assert same(round_trip(picture, tmp_path, "o.webp")[1], picture)


# --------------------------------------------------------------------------- sniffing


def test_sniff_goes_by_content_not_by_name(tmp_path: Path) -> None:
    """A PNG called frame.dat, a TIFF called noext and a BMP called b.dib are images; a PNG
    name on text is not."""
    stored(tmp_path, "frame.dat", imagecodecs.png_encode(np.zeros((3, 5), np.uint16)))
    tifffile.imwrite(tmp_path / "noext", np.zeros((4, 6, 3), np.uint8))
    Image.new("RGB", (2, 3)).save(tmp_path / "b.dib", format="BMP")
    stored(tmp_path, "fake.png", b"just some words\n")

    assert sniff(tmp_path / "frame.dat") == Sniffed(
        "image", "png", "", "L16", 5, 3)
    assert (sniff(tmp_path / "noext").container, sniff(tmp_path / "noext").format) == (
        "tiff", "RGB")
    assert (sniff(tmp_path / "b.dib").action, sniff(tmp_path / "b.dib").format) == (
        "image", "RGB")
    assert (sniff(tmp_path / "fake.png").action, sniff(tmp_path / "fake.png").reason) == (
        "bytes", "not an image")


def test_containers_rowcast_does_not_code_are_kept_as_bytes(tmp_path: Path) -> None:
    image = Image.new("RGB", (8, 8), (10, 200, 30))
    image.save(tmp_path / "photo.jpg")
    image.save(tmp_path / "lossy.webp", lossless=False)
    image.save(tmp_path / "anim.gif")

    assert (sniff(tmp_path / "photo.jpg").action, sniff(tmp_path / "photo.jpg").reason) == (
        "bytes", "JPEG: already lossy-coded")
    assert sniff(tmp_path / "lossy.webp").action == "bytes"
    assert "lossy" in sniff(tmp_path / "lossy.webp").reason
    assert (sniff(tmp_path / "anim.gif").action, sniff(tmp_path / "anim.gif").container) == (
        "bytes", "gif")
    with pytest.raises(ImageError, match="JPEG: already lossy-coded"):
        read_picture(tmp_path / "photo.jpg")


def test_data_after_the_image_is_never_dropped(tmp_path: Path) -> None:
    data = imagecodecs.png_encode(np.zeros((2, 2), np.uint8)) + b"appended"
    verdict = sniff(stored(tmp_path, "tail.png", data))
    assert (verdict.action, verdict.reason) == ("bytes", "8 bytes after the PNG's end")


# --------------------------------------------------------------------------- writing


def test_can_write_is_honest_and_restored_falls_back_to_png_or_to_nothing() -> None:
    """A 7-entry palette does not fit a TIFF colour map (256 entries), 16-bit gray does not
    fit a BMP: both restore as PNG under an unambiguous name; a PNM stays a PNM; a BMP with a
    TIFF tag that PNG cannot hold has nowhere to go (its file is kept as bytes)."""
    small_palette = random_picture("P", 3, 3, container="tiff")
    deep_bmp = random_picture("L16", 3, 3, container="bmp")
    plain = random_picture("RGB", 3, 3, container="pnm")
    tagged = Picture(np.zeros((1, 2, 2), np.uint16), "L16", (("tiff:270", b"\x02x\x00"),), "bmp")

    assert not can_write(small_palette) and not can_write(deep_bmp)
    name, picture = restored("scan.tif", small_palette)
    assert (name, picture.container) == ("scan.tif.png", "png")
    assert picture.extras == small_palette.extras
    assert restored("a/b.bmp", deep_bmp)[0] == "a/b.bmp.png"
    assert restored("scan.pnm", plain) == ("scan.pnm", plain)
    assert restored("odd.bmp", tagged) is None


def test_write_picture_refuses_what_the_container_cannot_hold(tmp_path: Path) -> None:
    picture = Picture(np.zeros((1, 2, 2), np.uint8), "L", (("tiff:270", b"\x02x\x00"),), "png")
    with pytest.raises(ImageError, match=rf"^{tmp_path / 'x.png'}: PNG cannot hold a tiff:270"):
        write_picture(picture, tmp_path / "x.png")
    assert not (tmp_path / "x.png").exists()


def test_describe_names_extras_for_people() -> None:
    assert [describe(k) for k in ("png:iCCP", "png:tEXt@end", "tiff:34675", "webp:XMP",
                                  "png:pHYs", "png:zzZz", PALETTE)] == [
        "icc", "text", "icc", "xmp", "physical size", "png chunk zzZz", "palette"]


@settings(max_examples=30, deadline=None)
@given(name=st.sampled_from([f.name for f in FORMATS]), h=st.integers(1, 80),
       w=st.integers(1, 80), seed=st.integers(0, 2**32 - 1))
def test_any_picture_round_trips_through_png_exactly(tmp_path_factory, name: str, h: int,
                                                     w: int, seed: int) -> None:
    picture = random_picture(name, h, w, seed)
    path = tmp_path_factory.mktemp("png") / "p.png"
    write_picture(picture, path)
    assert same(read_picture(path), picture)
