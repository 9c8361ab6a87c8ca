"""Every input file, by content: an image rowcast codes, bytes it keeps, or a refusal; and back.

`sniff` looks at a file's header only (never its suffix) and says what happens to it;
`read_picture` gives a `Picture` with every value at full depth and everything else the file
holds as extras; `write_picture` writes a picture back in its container; `can_write` says
whether that gives back exactly the same picture (else `restored` names a PNG to restore
instead, or none). Anything that would be lost sends the file to "bytes" (kept byte for byte)
or "refused", never a silent conversion.

Containers coded: PNG, TIFF (single page), BMP (uncompressed, 40- or 12-byte header), PNM
(PBM, PGM, PPM; plain or raw) and lossless WebP. Extras beside `PALETTE` and `TRANSPARENCY`
(see `rowcast.picture`), in the order a reader gives them:

- ``png:<chunk>``: an ancillary PNG chunk's data (or ``png:PLTE``, a suggested palette of a
  colour image) before the image data, in file order; ``png:<chunk>@end``: one after it.
  ``png:depth``: one byte, the file's bit depth where it is below 8 and the format does not
  say it (palette 1/2/4, gray 2/4; gray values and key are then scaled to 8 bits by bit
  replication, as the PNG specification does). A gray transparency key is the tRNS chunk.
- ``tiff:<tag number>``: one TIFF tag: its type (one byte), then its value bytes in
  little-endian order. Compression (259) and predictor (317) are kept only where not the
  plainest (1); resolution (282, 283, 296) only where not 1/1, 1/1, no unit.
- ``webp:ICCP``, ``webp:EXIF``, ``webp:XMP``: the WebP chunk's data.
- ``bmp:resolution``: the header's pixels per metre, x and y, 4 bytes each little-endian,
  where not both zero.
- ``pnm:comment``: one header comment, the bytes after ``#`` up to the line's end;
  ``pnm:maxval``: the maximum value in ASCII digits where not 1 (PBM), 255 or 65535.

What a restored file may differ in without a picture differing (interlacing, compression
effort, plain PNM written raw, strip layout) is said in `Picture.notes`.
"""

from __future__ import annotations

import functools
import io
import struct
import zlib
from collections.abc import Callable
from dataclasses import dataclass
from pathlib import Path
from typing import BinaryIO

import imagecodecs
import numpy as np
from PIL import Image

from rowcast.picture import PALETTE, TRANSPARENCY, Picture, interleaved, validate
from rowcast.pixelformats import pixel_format


@functools.cache
def _tifffile():
    """tifffile, imported when a TIFF file is first met: 13 ms of every command's start-up
    that only TIFF files need."""
    import tifffile

    return tifffile

MAX_BYTES = 1 << 31  # the largest picture, in bytes of values, that a reader allocates


class ImageError(Exception):
    """An image that cannot be read or written exactly; "<path>: <reason>"."""


@dataclass(frozen=True)
class Sniffed:
    """What happens to one input file, from its header."""

    action: str  # "image" (coded), "bytes" (kept byte for byte), "refused"
    container: str  # "png", "tiff", "bmp", "pnm", "webp", "jpeg", "gif", ... or ""
    reason: str  # for "bytes" and "refused": why
    format: str = ""  # for "image": the pixel format it is read as
    width: int = 0
    height: int = 0


class _Bad(Exception):
    """A refusal's reason, raised inside the readers and writers."""


def _kept(container: str, reason: str) -> Sniffed:
    return Sniffed("bytes", container, reason)


def _refused(container: str, reason: str) -> Sniffed:
    return Sniffed("refused", container, reason)


def _size(f: BinaryIO) -> int:
    f.seek(0, io.SEEK_END)
    size = f.tell()
    f.seek(0)
    return size


def _read(f: BinaryIO, count: int, what: str) -> bytes:
    """Exactly `count` bytes, or _Bad naming what was truncated."""
    data = f.read(count)
    if len(data) != count:
        raise _Bad(f"truncated {what}")
    return data


# --------------------------------------------------------------------------- PNG

PNG_SIGNATURE = b"\x89PNG\r\n\x1a\n"
_PNG_FORMATS = {(0, 1): "1", (0, 2): "L", (0, 4): "L", (0, 8): "L", (0, 16): "L16",
                (2, 8): "RGB", (2, 16): "RGB16", (4, 8): "LA", (4, 16): "LA16",
                (6, 8): "RGBA", (6, 16): "RGBA16",
                **{(3, d): "P" for d in (1, 2, 4, 8)}}
_PNG_TYPES = {"1": 0, "L": 0, "L16": 0, "RGB": 2, "RGB16": 2, "P": 3, "LA": 4, "LA16": 4,
              "RGBA": 6, "RGBA16": 6}


@dataclass(frozen=True)
class _Chunk:
    name: str
    length: int
    data: bytes | None  # None for image data that was skipped


def _png_chunks(f: BinaryIO, all_data: bool) -> tuple[list[_Chunk], int]:
    """The chunks up to IEND, CRCs checked (image data's only if `all_data`), and how many
    bytes follow IEND."""
    size = _size(f)
    f.seek(len(PNG_SIGNATURE))
    chunks: list[_Chunk] = []
    while True:
        length, raw = struct.unpack(">I4s", _read(f, 8, "PNG (no IEND chunk)"))
        name = raw.decode("latin-1")
        if not raw.isalpha():
            raise _Bad(f"damaged PNG (chunk name {name!r})")
        offset = f.tell()
        if offset + length + 4 > size:
            raise _Bad(f"truncated PNG ({name} chunk runs past the end)")
        if name == "IDAT" and not all_data:
            f.seek(length + 4, io.SEEK_CUR)
            chunks.append(_Chunk(name, length, None))
        else:
            data = f.read(length)
            (crc,) = struct.unpack(">I", f.read(4))
            if zlib.crc32(raw + data) != crc:
                raise _Bad(f"damaged PNG (bad CRC in the {name} chunk)")
            chunks.append(_Chunk(name, length, data))
        if name == "IEND":
            return chunks, size - f.tell()


def _png_header(chunks: list[_Chunk]) -> tuple[int, int, int, int, int]:
    """(width, height, depth, colour type, interlace) from a valid IHDR."""
    if not chunks or chunks[0].name != "IHDR" or chunks[0].length != 13:
        raise _Bad("damaged PNG (no IHDR chunk first)")
    w, h, depth, ctype, comp, filt, interlace = struct.unpack(">IIBBBBB", chunks[0].data)
    if (not 0 < w < 2**31 or not 0 < h < 2**31 or (ctype, depth) not in _PNG_FORMATS
            or comp or filt or interlace > 1):
        raise _Bad("damaged PNG (invalid IHDR)")
    return w, h, depth, ctype, interlace


def _sniff_png(f: BinaryIO) -> Sniffed:
    chunks, after = _png_chunks(f, all_data=False)
    w, h, depth, ctype, _ = _png_header(chunks)
    names = [c.name for c in chunks]
    idat = [i for i, n in enumerate(names) if n == "IDAT"]
    if not idat or idat != list(range(idat[0], idat[-1] + 1)):
        raise _Bad("damaged PNG (missing or scattered IDAT chunks)")
    for name in ("IHDR", "PLTE", "tRNS"):
        if names.count(name) > 1:
            raise _Bad(f"damaged PNG (two {name} chunks)")
    unknown = [n for n in names if n[0].isupper() and n not in ("IHDR", "PLTE", "IDAT", "IEND")]
    if unknown:
        return _kept("png", f"unknown critical PNG chunk {unknown[0]}")
    for c in chunks:
        if c.name == "acTL" and c.length >= 4:
            frames = struct.unpack(">I", c.data[:4])[0]
            if frames > 1:
                return _refused("png", f"has {frames} frames")
        if c.name == "PLTE" and (c.length % 3 or not 3 <= c.length <= 768):
            raise _Bad("damaged PNG (invalid PLTE)")
        if c.name == "tRNS":
            _check_trns(c.data, ctype, names)
            if ctype == 0 and depth in (2, 4) and struct.unpack(">H", c.data)[0] >> depth:
                return _kept("png", f"transparency key outside {depth}-bit gray")
    if ctype == 3 and "PLTE" not in names:
        raise _Bad("damaged PNG (palette image without PLTE)")
    if after:
        return _kept("png", f"{after} bytes after the PNG's end")
    return Sniffed("image", "png", "", _PNG_FORMATS[ctype, depth], w, h)


def _check_trns(data: bytes, ctype: int, names: list[str]) -> None:
    """_Bad unless the tRNS chunk is valid for this colour type, as the specification says."""
    if ctype == 3:
        plte = names.index("PLTE") if "PLTE" in names else len(names)
        valid = names.index("tRNS") > plte and len(data) >= 1
    elif ctype == 0:
        valid = len(data) == 2
    else:
        valid = ctype == 2 and len(data) == 6
    if not valid:
        raise _Bad("damaged PNG (invalid tRNS)")


def _bit_scale(depth: int) -> int:
    """What a gray value of this depth is multiplied by to become 8-bit (bit replication)."""
    return 255 // ((1 << depth) - 1)


def _decode_png(data: bytes) -> Picture:
    chunks, _ = _png_chunks(io.BytesIO(data), all_data=True)
    w, h, depth, ctype, interlace = _png_header(chunks)
    fmt = pixel_format(_PNG_FORMATS[ctype, depth])
    gray_low = ctype == 0 and depth in (2, 4)
    extras: list[tuple[str, bytes]] = []
    if (ctype == 3 and depth < 8) or gray_low:
        extras.append(("png:depth", bytes([depth])))
    seen_idat = False
    for c in chunks:
        if c.name in ("IHDR", "IEND"):
            continue
        if c.name == "IDAT":
            seen_idat = True
        elif c.name == "PLTE":
            extras.append((PALETTE, c.data) if ctype == 3 else ("png:PLTE", c.data))
        elif c.name == "tRNS":
            key = c.data
            if gray_low:
                key = struct.pack(">H", struct.unpack(">H", key)[0] * _bit_scale(depth))
            extras.append((TRANSPARENCY, key))
        else:
            extras.append((f"png:{c.name}" + ("@end" if seen_idat else ""), c.data))
    bare = [c for c in chunks if c.name in ("IHDR", "PLTE", "IDAT", "IEND")]
    minimal = PNG_SIGNATURE + b"".join(_chunk(c.name, c.data) for c in bare)
    if fmt.bits == 16 or (depth == 8 and ctype != 3):
        pixels = np.asarray(imagecodecs.png_decode(minimal))
    else:
        with Image.open(io.BytesIO(minimal)) as im:
            pixels = np.asarray(im).astype(np.uint8)
    values = _planes(pixels, fmt.planes, h, w, fmt.dtype)
    notes = ("interlaced PNG: restored without interlacing",) if interlace else ()
    return Picture(values, fmt.name, tuple(extras), "png", notes)


def _planes(pixels: np.ndarray, planes: int, h: int, w: int, dtype: str) -> np.ndarray:
    """(planes, h, w) values from a decoder's (h, w) or (h, w, planes) array, checked."""
    if pixels.shape not in ((h, w, planes), (h, w) if planes == 1 else (h, w, planes)):
        raise _Bad(f"decoded to shape {pixels.shape}, expected {(h, w, planes)}")
    arr = pixels.reshape(h, w, planes).transpose(2, 0, 1)
    return np.ascontiguousarray(arr, dtype=dtype)


def _chunk(name: str, data: bytes) -> bytes:
    """One PNG chunk: length, type, data, CRC of type and data (the specification's layout)."""
    raw = name.encode("latin-1")
    return struct.pack(">I", len(data)) + raw + data + struct.pack(">I", zlib.crc32(raw + data))


def _pack_rows(values: np.ndarray, depth: int) -> bytes:
    """Rows of (h, w) values below 8 bits packed high bits first, each after filter byte 0."""
    h, w = values.shape
    per = 8 // depth
    padded = np.zeros((h, -(-w // per) * per), np.uint8)
    padded[:, :w] = values
    shifts = (8 - depth * (np.arange(per) + 1)).astype(np.uint8)
    packed = np.bitwise_or.reduce(padded.reshape(h, -1, per) << shifts, axis=2).astype(np.uint8)
    return np.concatenate([np.zeros((h, 1), np.uint8), packed], axis=1).tobytes()


def _png_depth(picture: Picture) -> int:
    fmt = picture.pixel_format
    stored = picture.extra("png:depth")
    if stored is None:
        return 1 if fmt.bits == 1 else fmt.bits
    depth = stored[0] if len(stored) == 1 else 0
    if not ((fmt.name == "P" and depth in (1, 2, 4, 8)) or (fmt.name == "L" and depth in (2, 4))):
        raise _Bad(f"png:depth {stored.hex()} does not fit a {fmt.name} picture")
    return depth


def _encode_png(picture: Picture) -> bytes:
    fmt = picture.pixel_format
    depth, ctype = _png_depth(picture), _PNG_TYPES[fmt.name]
    h, w = picture.height, picture.width
    v = picture.values
    gray_low = fmt.name == "L" and depth < 8
    if depth < 8:
        plane = v[0]
        if gray_low:
            scale = _bit_scale(depth)
            if np.any(plane % scale):
                raise _Bad(f"gray values are not {depth}-bit values scaled to 8 bits")
            plane = plane // scale
        if plane.size and int(plane.max()) >= 1 << depth:
            raise _Bad(f"values do not fit {depth} bits")
        head = [_chunk("IHDR", struct.pack(">IIBBBBB", w, h, depth, ctype, 0, 0, 0))]
        image = [_chunk("IDAT", zlib.compress(_pack_rows(plane, depth), 9))]
    else:
        coded = imagecodecs.png_encode(interleaved(v))
        parts, _ = _png_chunks(io.BytesIO(coded), all_data=True)
        ihdr = struct.pack(">IIBBBBB", w, h, depth, ctype, 0, 0, 0)
        made = bytearray(parts[0].data)
        made[9] = ctype  # 8-bit indices are laid out as 8-bit gray
        if bytes(made) != ihdr:
            raise _Bad(f"the PNG encoder wrote header {parts[0].data.hex()}, not {ihdr.hex()}")
        head = [_chunk("IHDR", ihdr)]
        image = [_chunk("IDAT", c.data) for c in parts if c.name == "IDAT"]
    before, after = [], []
    for kind, data in picture.extras:
        if kind == "png:depth":
            continue
        if kind == PALETTE:
            name = "PLTE"
        elif kind == TRANSPARENCY:
            name = "tRNS"
            if gray_low:
                value = struct.unpack(">H", data)[0] if len(data) == 2 else -1
                if value < 0 or value % _bit_scale(depth):
                    raise _Bad("transparency key does not fit the bit depth")
                data = struct.pack(">H", value // _bit_scale(depth))
        elif kind.startswith("png:"):
            name = kind[4:].removesuffix("@end")
            if len(name) != 4 or not name.isascii() or not name.isalpha() or (
                    name[0].isupper() and name != "PLTE"):
                raise _Bad(f"{kind} is not an ancillary PNG chunk")
        else:
            raise _Bad(f"PNG cannot hold a {kind} extra")
        (after if kind.endswith("@end") else before).append(_chunk(name, data))
    if fmt.palette and picture.extra(PALETTE) is None:
        raise _Bad("a palette picture without a palette")
    return b"".join([PNG_SIGNATURE, *head, *before, *image, *after, _chunk("IEND", b"")])


# --------------------------------------------------------------------------- TIFF

_TIFF_STRUCTURE = {254, 256, 257, 258, 259, 262, 266, 273, 277, 278, 279, 284, 317, 320,
                   322, 323, 324, 325, 338, 339}
_TIFF_RESOLUTION = (282, 283, 296)
_TIFF_PLAIN_RESOLUTION = (b"\x05" + struct.pack("<II", 1, 1), b"\x05" + struct.pack("<II", 1, 1),
                          b"\x03" + struct.pack("<H", 1))  # what tifffile writes when none
_TIFF_ITEM = {1: 1, 2: 1, 3: 2, 4: 4, 5: 4, 6: 1, 7: 1, 8: 2, 9: 4, 10: 4, 11: 4, 12: 8,
              16: 8, 17: 8}  # type -> bytes of one number (rationals are two)
_TIFF_POINTERS = {330: "SubIFDs", 34665: "ExifIFD", 34853: "GPSIFD", 40965: "InteropIFD"}
_TIFF_WRITABLE_COMPRESSION = {1, 5, 8, 32773, 32946, 34925, 50000}
_TIFF_JPEG = {6, 7, 34892}


def _tiff_tag_name(code: int) -> str:
    try:
        return _tifffile().TIFF.TAGS[code]
    except KeyError:
        return str(code)


def _sniff_tiff(f: BinaryIO) -> Sniffed:
    try:
        with _tifffile().TiffFile(f) as tif:
            pages = len(tif.pages)
            if pages > 1:
                return _refused("tiff", f"has {pages} pages")
            return _tiff_verdict(tif.pages[0])
    except (_tifffile().TiffFileError, ValueError, IndexError, struct.error, OSError) as exc:
        raise _Bad(f"unreadable TIFF ({exc})") from None


def _tiff_verdict(page) -> Sniffed:
    """What to do with a TIFF's single page: refused, bytes or an image of some format."""
    photometric, spp = int(page.photometric), int(page.samplesperpixel)
    bits, sformat = int(page.bitspersample), int(page.sampleformat)
    compression, extra = int(page.compression), tuple(int(e) for e in page.extrasamples)
    if photometric == 5:
        return _refused("tiff", "CMYK images are not supported")
    if sformat == 3:
        return _refused("tiff", "floating-point images are not supported")
    if sformat != 1:
        return _refused("tiff", "signed or complex integer images are not supported")
    if compression in _TIFF_JPEG:
        return _kept("tiff", "JPEG-compressed TIFF: already lossy-coded")
    if bits not in (1, 8, 16):
        return _refused("tiff", f"{bits}-bit samples are not supported")
    if extra and extra != (2,):
        kind = "premultiplied alpha" if extra == (1,) else f"extra samples {extra}"
        return _kept("tiff", f"TIFF with {kind} cannot be rewritten exactly")
    shapes = {(1, 1, 1): "1", (0, 1, 1): "1", (1, 1, 8): "L", (1, 1, 16): "L16",
              (1, 2, 8): "LA", (1, 2, 16): "LA16", (2, 3, 8): "RGB", (2, 3, 16): "RGB16",
              (2, 4, 8): "RGBA", (2, 4, 16): "RGBA16", (3, 1, 8): "P"}
    name = shapes.get((photometric, spp, bits))
    if name is None or (spp - len(extra)) not in (1, 3):
        kind = _enum_name(_tifffile().PHOTOMETRIC, photometric)
        if photometric in (0, 3):
            return _kept("tiff", f"{kind} TIFF with {spp} x {bits} bits cannot be rewritten")
        return _refused("tiff", f"{kind} images with {spp} x {bits}-bit samples are not "
                        "supported")
    if compression not in _TIFF_WRITABLE_COMPRESSION:
        name = _enum_name(_tifffile().COMPRESSION, compression)
        return _kept("tiff", f"TIFF compression {name} cannot be rewritten")
    lost = _tiff_unwritable(page)
    if lost:
        return _kept("tiff", f"TIFF tags that cannot be rewritten: {', '.join(lost)}")
    if name == "P" and np.any(np.asarray(page.colormap, np.uint32) % 257):
        return _kept("tiff", "TIFF colour map finer than 8 bits cannot be kept as a palette")
    return Sniffed("image", "tiff", "", name, int(page.imagewidth), int(page.imagelength))


def _enum_name(enum, code: int) -> str:
    """The name tifffile gives a TIFF code, or the number."""
    try:
        return enum(code).name
    except ValueError:
        return str(code)


def _tiff_unwritable(page) -> list[str]:
    """Names of the page's tags that tifffile cannot write back exactly."""
    lost = []
    tags = {t.code: t for t in page.tags.values()}
    for code, tag in tags.items():
        dtype = int(tag.dtype)
        if code in _TIFF_STRUCTURE:
            value = tag.value
            bad = ((code == 254 and value != 0) or (code == 266 and value != 1)
                   or (code == 317 and int(value) not in (1, 2)))
        elif code in _TIFF_POINTERS:
            bad = True
        elif code in _TIFF_RESOLUTION:
            bad = dtype != (3 if code == 296 else 5) or tag.count != 1
        else:
            bad = dtype not in _TIFF_ITEM or (dtype == 2 and not _ascii_ends_with_nul(tag))
        if bad:
            lost.append(_TIFF_POINTERS.get(code, _tiff_tag_name(code)))
    if (282 in tags) != (283 in tags):
        lost.append("one resolution without the other")
    return lost


def _ascii_ends_with_nul(tag) -> bool:
    return tag.count > 0 and _tag_bytes(tag)[-1:] == b"\x00"


def _tag_bytes(tag) -> bytes:
    """A tag's value bytes as stored in the file (its byte order)."""
    fh = tag.parent.filehandle
    size = _TIFF_ITEM[int(tag.dtype)] * (2 if int(tag.dtype) in (5, 10) else 1) * tag.count
    fh.seek(tag.valueoffset)
    return fh.read(size)


def _little_endian(tag, byteorder: str) -> bytes:
    raw = _tag_bytes(tag)
    item = _TIFF_ITEM[int(tag.dtype)]
    if byteorder == ">" and item > 1:
        raw = np.frombuffer(raw, f">u{item}").astype(f"<u{item}").tobytes()
    return raw


def _decode_tiff(data: bytes) -> Picture:
    with _tifffile().TiffFile(io.BytesIO(data)) as tif:
        page = tif.pages[0]
        verdict = _tiff_verdict(page)
        if verdict.action != "image":
            raise _Bad(verdict.reason)
        fmt = pixel_format(verdict.format)
        pixels = np.asarray(page.asarray())
        if page.axes.startswith("S"):
            pixels = np.moveaxis(pixels, 0, -1)
        extras: list[tuple[str, bytes]] = []
        if fmt.palette:
            cmap = np.asarray(page.colormap, np.uint32) // 257
            extras.append((PALETTE, cmap.T.astype(np.uint8).tobytes()))
        tags = {t.code: t for t in page.tags.values()}
        if 282 in tags and 296 not in tags:
            extras_296 = b"\x03" + struct.pack("<H", 2)  # TIFF's default unit: inch
        else:
            extras_296 = None
        kept: dict[int, bytes] = {}
        for code, tag in tags.items():
            if code in _TIFF_STRUCTURE and code not in (259, 317):
                continue
            if code in (259, 317):
                value = int(tag.value)
                if value != 1:
                    kept[code] = b"\x03" + struct.pack("<H", value)
                continue
            kept[code] = bytes([int(tag.dtype)]) + _little_endian(tag, tif.byteorder)
        if extras_296 is not None:
            kept[296] = extras_296
        if tuple(kept.get(c) for c in _TIFF_RESOLUTION) == _TIFF_PLAIN_RESOLUTION:
            for c in _TIFF_RESOLUTION:
                del kept[c]
        extras += [(f"tiff:{code}", kept[code]) for code in sorted(kept)]
    white_is_zero = int(page.photometric) == 0
    if fmt.bits == 1:
        pixels = pixels.astype(np.uint8)
        if white_is_zero:  # ours is 1 for white
            pixels = 1 - pixels
    values = _planes(pixels, fmt.planes, verdict.height, verdict.width, fmt.dtype)
    notes = ("white-is-zero 1-bit TIFF: restored black-is-zero",) if white_is_zero else ()
    return Picture(values, fmt.name, tuple(extras), "tiff", notes)


def _encode_tiff(picture: Picture) -> bytes:
    fmt = picture.pixel_format
    v = picture.values
    options: dict = {"software": False, "metadata": None, "photometric": "minisblack"}
    if fmt.name in ("RGB", "RGB16", "RGBA", "RGBA16"):
        options["photometric"] = "rgb"
    if fmt.alpha:
        options["extrasamples"] = (2,)
    tags: dict[int, bytes] = {}
    for kind, data in picture.extras:
        if kind == PALETTE:
            if len(data) != 768:
                raise _Bad("a TIFF palette holds exactly 256 entries")
            palette = np.frombuffer(data, np.uint8).reshape(256, 3).T.astype(np.uint16)
            options["photometric"], options["colormap"] = "palette", palette * 257
        elif kind.startswith("tiff:") and kind[5:].isdigit() and len(data) >= 1:
            tags[int(kind[5:])] = data
        else:
            raise _Bad(f"TIFF cannot hold a {kind} extra")
    if 259 in tags:
        options["compression"] = _short(tags.pop(259))
    if 317 in tags:
        options["predictor"] = _short(tags.pop(317))
    if any(c in tags for c in _TIFF_RESOLUTION):
        if not all(c in tags for c in _TIFF_RESOLUTION):
            raise _Bad("TIFF resolution needs tags 282, 283 and 296 together")
        rationals = {c: tags.pop(c) for c in (282, 283)}
        if any(len(r) != 9 or r[0] != 5 for r in rationals.values()):
            raise _Bad("TIFF resolution is one RATIONAL each way")
        options["resolution"] = ((1, 1), (1, 1))  # replaced below: tifffile reduces fractions
        options["resolutionunit"] = _short(tags.pop(296))
    extratags = []
    for code, data in sorted(tags.items()):
        if code in _TIFF_STRUCTURE or data[0] not in _TIFF_ITEM:
            raise _Bad(f"tiff:{code} cannot be written as a TIFF tag")
        extratags.append((code, data[0], None, data[1:], True))
    array = interleaved(v).astype(bool) if fmt.bits == 1 else interleaved(v)
    out = io.BytesIO()
    _tifffile().imwrite(out, array, byteorder="<", extratags=extratags,
                     **options)
    written = bytearray(out.getvalue())
    if "resolution" in options:
        _patch_rationals(written, {c: r[1:] for c, r in rationals.items()})
    return bytes(written)


def _patch_rationals(tiff: bytearray, values: dict[int, bytes]) -> None:
    """Put the given 8-byte RATIONAL values into the first IFD of a little-endian classic
    TIFF (header, then 2-byte entry count and 12-byte entries whose last 4 bytes are an
    offset for values longer than 4 bytes)."""
    (ifd,) = struct.unpack("<I", tiff[4:8])
    (count,) = struct.unpack("<H", tiff[ifd : ifd + 2])
    for i in range(count):
        entry = ifd + 2 + 12 * i
        code, dtype, number, offset = struct.unpack("<HHII", tiff[entry : entry + 12])
        if code in values and dtype == 5 and number == 1:
            tiff[offset : offset + 8] = values.pop(code)
    if values:
        raise _Bad("tifffile wrote no resolution tags to replace")


def _short(data: bytes) -> int:
    """A SHORT tag's value from a `tiff:` extra (type byte, then 2 bytes little-endian)."""
    if len(data) != 3 or data[0] != 3:
        raise _Bad(f"{data.hex()} is not a TIFF SHORT value")
    return struct.unpack("<H", data[1:])[0]


# --------------------------------------------------------------------------- BMP

def _sniff_bmp(f: BinaryIO) -> Sniffed:
    size = _size(f)
    head = _read(f, 26, "BMP header")
    offbits, dib = struct.unpack("<10xI I", head[:18])
    if dib == 12:
        w, h, _, bits = struct.unpack("<HHHH", head[18:26])
        compression, colors, entry = 0, 0, 3
    elif dib == 40:
        rest = _read(f, 28, "BMP header")
        w, h = struct.unpack("<ii", head[18:26])
        bits, compression = struct.unpack("<HI", rest[2:8])
        colors, entry = struct.unpack("<I", rest[20:24])[0], 4
    else:
        return _kept("bmp", f"BMP with a {dib}-byte header (colour space, masks) cannot be "
                     "rewritten")
    if compression:
        return _kept("bmp", f"BMP compression {compression} cannot be rewritten")
    if bits not in (1, 4, 8, 24):
        return _kept("bmp", f"{bits}-bit BMP cannot be rewritten exactly")
    if w <= 0 or h == 0:
        raise _Bad("damaged BMP (invalid size)")
    if bits <= 8:
        colors = colors or 1 << bits
    else:
        colors = 0
    if offbits != 14 + dib + entry * colors:
        return _kept("bmp", "BMP with an unusual layout (gaps or extra data)")
    end = offbits + ((w * bits + 31) // 32 * 4) * abs(h)
    if size < end:
        raise _Bad("truncated BMP")
    if size > end:
        return _kept("bmp", f"{size - end} bytes after the BMP's pixels")
    f.seek(0)
    with Image.open(f, formats=["BMP"]) as im:
        mode = im.mode
    if mode not in ("1", "L", "P", "RGB"):
        raise _Bad(f"unexpected BMP mode {mode}")
    return Sniffed("image", "bmp", "", mode, w, abs(h))


def _decode_bmp(data: bytes) -> Picture:
    with Image.open(io.BytesIO(data), formats=["BMP"]) as im:
        im.load()
        fmt = pixel_format(im.mode)
        pixels = np.asarray(im).astype(np.uint8)
        extras: list[tuple[str, bytes]] = []
        if fmt.palette:
            extras.append((PALETTE, bytes(im.getpalette("RGB"))))
    dib = struct.unpack("<I", data[14:18])[0]
    if dib == 40 and data[38:46] != bytes(8):
        extras.append(("bmp:resolution", data[38:46]))
    values = _planes(pixels, fmt.planes, im.height, im.width, fmt.dtype)
    return Picture(values, fmt.name, tuple(extras), "bmp")


def _encode_bmp(picture: Picture) -> bytes:
    fmt = picture.pixel_format
    if fmt.name not in ("1", "L", "P", "RGB"):
        raise _Bad(f"BMP cannot hold {fmt.name} pictures")
    resolution = bytes(8)
    for kind, data in picture.extras:
        if kind == "bmp:resolution" and len(data) == 8:
            resolution = data
        elif kind != PALETTE:
            raise _Bad(f"BMP cannot hold a {kind} extra")
    im = _pillow_image(picture)
    out = io.BytesIO()
    im.save(out, "BMP")
    written = bytearray(out.getvalue())
    written[38:46] = resolution
    return bytes(written)


def _pillow_image(picture: Picture) -> Image.Image:
    """A Pillow image of an 8-bit or 1-bit picture, with its palette."""
    v = picture.values
    if picture.format == "1":
        return Image.fromarray(v[0].astype(bool))
    if v.shape[0] == 1:
        if picture.format != "P":
            return Image.fromarray(v[0], "L")
        im = Image.frombytes("P", (picture.width, picture.height), v[0].tobytes())
        im.putpalette(picture.extra(PALETTE) or b"", "RGB")
        return im
    return Image.fromarray(interleaved(v), picture.format)


# --------------------------------------------------------------------------- PNM

_WHITESPACE = b" \t\n\r\v\f"
_PNM_HEADER_LIMIT = 1 << 20


@dataclass(frozen=True)
class _PnmHeader:
    kind: int  # 1 to 6
    width: int
    height: int
    maxval: int
    comments: tuple[bytes, ...]
    raster: int  # offset of the raster


def _pnm_header(head: bytes) -> _PnmHeader | None:
    """The header of a PNM file, or None if it is not one; _Bad if truncated."""
    kind = head[1] - ord("0")
    fields: list[int] = []
    comments: list[bytes] = []
    pos = 2
    wanted = 2 if kind in (1, 4) else 3
    while len(fields) < wanted:
        while pos < len(head) and head[pos] in _WHITESPACE:
            pos += 1
        if pos >= len(head):
            raise _Bad("truncated PNM header")
        if head[pos] == ord("#"):
            end = pos + 1
            while end < len(head) and head[end] not in b"\r\n":
                end += 1
            if end >= len(head):
                raise _Bad("truncated PNM header")
            comments.append(head[pos + 1 : end])
            pos = end
            continue
        start = pos
        while pos < len(head) and head[pos] not in _WHITESPACE and head[pos] != ord("#"):
            pos += 1
        token = head[start:pos]
        if not token.isdigit() or len(token) > 10:
            return None
        fields.append(int(token))
    if pos >= len(head) or head[pos] not in _WHITESPACE:
        raise _Bad("truncated PNM header")
    maxval = fields[2] if wanted == 3 else 1
    return _PnmHeader(kind, fields[0], fields[1], maxval, tuple(comments), pos + 1)


def _pnm_format(header: _PnmHeader) -> str:
    if header.kind in (1, 4):
        return "1"
    gray = header.kind in (2, 5)
    if header.maxval > 255:
        return "L16" if gray else "RGB16"
    return "L" if gray else "RGB"


def _raster_bytes(header: _PnmHeader) -> int:
    if header.kind == 4:
        return (header.width + 7) // 8 * header.height
    planes = 1 if header.kind == 5 else 3
    return planes * header.width * header.height * (2 if header.maxval > 255 else 1)


def _sniff_pnm(f: BinaryIO) -> Sniffed:
    size = _size(f)
    head = f.read(_PNM_HEADER_LIMIT)
    if head[1:2] == b"7":
        return _kept("pnm", "PAM files are kept as bytes")
    header = _pnm_header(head)
    if header is None:
        return _kept("", "not an image")
    if header.width < 1 or header.height < 1 or not 1 <= header.maxval <= 65535:
        raise _Bad("damaged PNM (invalid size or maximum value)")
    if header.kind >= 4:
        end = header.raster + _raster_bytes(header)
        if size < end:
            raise _Bad("truncated PNM")
        if size > end:
            f.seek(end)
            following = f.read(3)
            if following[:1] == b"P" and following[1:2] in b"123456" and following[1:2]:
                return _refused("pnm", "has several images")
            return _kept("pnm", f"{size - end} bytes after the PNM's pixels")
    return Sniffed("image", "pnm", "", _pnm_format(header), header.width, header.height)


def _decode_pnm(data: bytes) -> Picture:
    header = _pnm_header(data)
    if header is None:
        raise _Bad("not a PNM file")
    fmt = pixel_format(_pnm_format(header))
    w, h, planes = header.width, header.height, fmt.planes
    count = planes * w * h
    body = data[header.raster :]
    if header.kind == 4:
        rows = np.frombuffer(body, np.uint8, (w + 7) // 8 * h).reshape(h, -1)
        flat = np.unpackbits(rows, axis=1)[:, :w]  # 1 is black in PBM
        header = _PnmHeader(1, w, h, 1, header.comments, header.raster)
    elif header.kind >= 5:
        wide = header.maxval > 255
        flat = np.frombuffer(body, ">u2" if wide else np.uint8, count)
        if len(body) != count * (2 if wide else 1):
            raise _Bad("bytes after the PNM's pixels")
    else:
        text = body.replace(b"0", b" 0 ").replace(b"1", b" 1 ") if header.kind == 1 else body
        tokens = text.split()
        if len(tokens) != count or not all(t.isdigit() for t in tokens):
            raise _Bad(f"plain PNM holds {len(tokens)} values, expected {count}")
        flat = np.array([int(t) for t in tokens], np.int64)
    if flat.size and int(flat.max()) > header.maxval:
        raise _Bad(f"value above the maximum {header.maxval}")
    if header.kind == 1:
        flat = 1 - flat
    values = np.ascontiguousarray(
        np.asarray(flat).reshape(h, w, planes).transpose(2, 0, 1), dtype=fmt.dtype)
    extras = [("pnm:comment", c) for c in header.comments]
    if header.maxval not in (1 if header.kind in (1, 4) else 0, 255, 65535):
        extras.append(("pnm:maxval", str(header.maxval).encode("ascii")))
    notes = ("plain PNM: restored as raw PNM",) if header.kind <= 3 else ()
    return Picture(values, fmt.name, tuple(extras), "pnm", notes)


def _encode_pnm(picture: Picture) -> bytes:
    fmt = picture.pixel_format
    kinds = {"1": 4, "L": 5, "L16": 5, "RGB": 6, "RGB16": 6}
    if fmt.name not in kinds:
        raise _Bad(f"PNM cannot hold {fmt.name} pictures")
    maxval = 1 if fmt.bits == 1 else fmt.maximum
    lines = [b"P%d" % kinds[fmt.name]]
    for kind, data in picture.extras:
        if kind == "pnm:comment" and not any(c in data for c in b"\r\n"):
            lines.append(b"#" + data)
        elif kind == "pnm:maxval" and data.isdigit() and fmt.bits > 1:
            maxval = int(data)
        else:
            raise _Bad(f"PNM cannot hold a {kind} extra")
    low = 256 if fmt.bits == 16 else 1
    if not low <= maxval <= fmt.maximum:
        raise _Bad(f"maximum value {maxval} does not fit a {fmt.name} picture")
    v = picture.values
    if v.size and int(v.max()) > maxval:
        raise _Bad(f"values above the maximum {maxval}")
    lines.append(b"%d %d" % (picture.width, picture.height))
    if fmt.bits > 1:
        lines.append(b"%d" % maxval)
    if fmt.bits == 1:
        raster = np.packbits(1 - v[0], axis=1).tobytes()
    else:
        raster = interleaved(v).astype(">u2" if maxval > 255 else np.uint8).tobytes()
    return b"\n".join(lines) + b"\n" + raster


# --------------------------------------------------------------------------- WebP

_WEBP_META = ("ICCP", "EXIF", "XMP ")
_WEBP_FLAGS = {"ICCP": 0x20, "EXIF": 0x08, "XMP ": 0x04}


def _riff_chunks(f: BinaryIO) -> tuple[list[tuple[str, int, int]], int]:
    """(fourcc, data offset, length) of each chunk of a WebP file, and how many bytes follow
    the RIFF body."""
    size = _size(f)
    head = _read(f, 12, "WebP")
    end = struct.unpack("<I", head[4:8])[0] + 8
    if end > size:
        raise _Bad("truncated WebP")
    out = []
    pos = 12
    while pos < end:
        f.seek(pos)
        fourcc, length = struct.unpack("<4sI", _read(f, 8, "WebP"))
        name = fourcc.decode("latin-1")
        if pos + 8 + length > end:
            raise _Bad(f"truncated WebP ({name!r} chunk runs past the end)")
        out.append((name, pos + 8, length))
        pos += 8 + length + (length & 1)
    return out, size - end


def _webp_verdict(f: BinaryIO) -> tuple[Sniffed, list[tuple[str, int, int]]]:
    """The verdict on a WebP file from its chunks' headers, and its metadata chunks."""
    chunks, trailing = _riff_chunks(f)
    names = [c[0] for c in chunks]
    if "ANMF" in names or "ANIM" in names:
        return _refused("webp", f"has {names.count('ANMF')} frames"), []
    if "VP8 " in names or "ALPH" in names:
        return _kept("webp", "WebP: already lossy-coded (VP8)"), []
    if names.count("VP8L") != 1:
        raise _Bad("damaged WebP (no lossless image data)")
    meta, alpha_flag, header = [], None, (0, 0, 0)
    for fourcc, offset, length in chunks:
        f.seek(offset)
        if fourcc == "VP8X":
            alpha_flag = bool(_read(f, 10, "VP8X chunk")[0] & 0x10)
        elif fourcc == "VP8L":
            start = _read(f, 5, "VP8L chunk")
            if start[0] != 0x2F:
                raise _Bad("damaged WebP (bad VP8L header)")
            (bits,) = struct.unpack("<I", start[1:])
            header = ((bits & 0x3FFF) + 1, ((bits >> 14) & 0x3FFF) + 1, bits >> 28 & 1)
        elif fourcc in _WEBP_META and fourcc not in [m[0] for m in meta]:
            meta.append((fourcc, offset, length))
        else:
            return _kept("webp", f"WebP chunk {fourcc!r} cannot be rewritten"), []
    if trailing:
        return _kept("webp", f"{trailing} bytes after the WebP's end"), []
    alpha = alpha_flag if alpha_flag is not None else bool(header[2])
    fmt = "RGBA" if alpha else "RGB"
    return Sniffed("image", "webp", "", fmt, header[0], header[1]), meta


def _sniff_webp(f: BinaryIO) -> Sniffed:
    return _webp_verdict(f)[0]


def _decode_webp(data: bytes) -> Picture:
    verdict, meta = _webp_verdict(io.BytesIO(data))
    if verdict.action != "image":
        raise _Bad(verdict.reason)
    extras = tuple((f"webp:{c.strip()}", data[o : o + n]) for c, o, n in meta)
    with Image.open(io.BytesIO(data), formats=["WEBP"]) as im:
        im.load()
        if im.mode != verdict.format:
            raise _Bad(f"decoded as {im.mode}, the header says {verdict.format}")
        pixels = np.asarray(im)
    fmt = pixel_format(verdict.format)
    values = _planes(pixels, fmt.planes, verdict.height, verdict.width, fmt.dtype)
    return Picture(values, fmt.name, extras, "webp")


def _encode_webp(picture: Picture) -> bytes:
    if picture.format not in ("RGB", "RGBA"):
        raise _Bad(f"WebP cannot hold {picture.format} pictures")
    if picture.width > 16384 or picture.height > 16384:
        raise _Bad("WebP holds at most 16384 x 16384 pixels")
    meta = {}
    for kind, data in picture.extras:
        fourcc = kind[5:].ljust(4) if kind.startswith("webp:") else ""
        if fourcc not in _WEBP_META or fourcc in meta:
            raise _Bad(f"WebP cannot hold a {kind} extra")
        meta[fourcc] = data
    if [k[5:].ljust(4) for k, _ in picture.extras] != [k for k in _WEBP_META if k in meta]:
        raise _Bad("WebP metadata goes in the order ICCP, EXIF, XMP")
    out = io.BytesIO()
    _pillow_image(picture).save(out, "WEBP", lossless=True, exact=True)
    coded = out.getvalue()
    made, _ = _riff_chunks(io.BytesIO(coded))
    vp8l = next((coded[o : o + n] for c, o, n in made if c == "VP8L"), None)
    if vp8l is None:
        raise _Bad("the WebP encoder wrote no lossless image data")
    alpha = picture.format == "RGBA"
    image = bytearray(vp8l)
    image[4] = (image[4] & ~0x10) | (0x10 if alpha else 0)  # the header's alpha bit
    chunks = []
    if meta:
        flags = sum(_WEBP_FLAGS[k] for k in meta) | (0x10 if alpha else 0)
        size = struct.pack("<I", picture.width - 1)[:3] + struct.pack("<I", picture.height - 1)[:3]
        chunks.append(_riff_chunk("VP8X", bytes([flags, 0, 0, 0]) + size))
    if "ICCP" in meta:
        chunks.append(_riff_chunk("ICCP", meta["ICCP"]))
    chunks.append(_riff_chunk("VP8L", bytes(image)))
    chunks += [_riff_chunk(k, meta[k]) for k in ("EXIF", "XMP ") if k in meta]
    body = b"WEBP" + b"".join(chunks)
    return b"RIFF" + struct.pack("<I", len(body)) + body


def _riff_chunk(fourcc: str, data: bytes) -> bytes:
    return fourcc.encode("latin-1") + struct.pack("<I", len(data)) + data + b"\0" * (len(data) & 1)


# --------------------------------------------------------------------------- dispatch

_OTHERS = (  # (magic, offset, container, reason): recognised, kept as bytes
    (b"\xff\xd8\xff", 0, "jpeg", "JPEG: already lossy-coded"),
    (b"GIF87a", 0, "gif", "GIF: rowcast does not code GIF files"),
    (b"GIF89a", 0, "gif", "GIF: rowcast does not code GIF files"),
    (b"\x00\x00\x00\x0cjP  \r\n\x87\n", 0, "jp2", "JPEG 2000: rowcast does not code it"),
    (b"\xff\x4f\xff\x51", 0, "jp2", "JPEG 2000: rowcast does not code it"),
    (b"\xff\x0a", 0, "jxl", "JPEG XL: rowcast does not code it"),
    (b"\x00\x00\x00\x0cJXL \r\n\x87\n", 0, "jxl", "JPEG XL: rowcast does not code it"),
    (b"ftypavif", 4, "avif", "AVIF: rowcast does not code it"),
    (b"ftypheic", 4, "heif", "HEIF: rowcast does not code it"),
    (b"ftypmif1", 4, "heif", "HEIF: rowcast does not code it"),
    (b"8BPS", 0, "psd", "Photoshop documents are kept as bytes"),
    (b"qoif", 0, "qoi", "QOI: rowcast does not code it"),
    (b"\x76\x2f\x31\x01", 0, "exr", "OpenEXR: rowcast does not code it"),
    (b"\x00\x00\x01\x00", 0, "ico", "icons are kept as bytes"),
)


def _container(head: bytes) -> tuple[str, Callable[[BinaryIO], Sniffed] | None]:
    """The container rowcast codes that a file's first bytes announce, and its sniffer."""
    if head.startswith(PNG_SIGNATURE):
        return "png", _sniff_png
    if head[:4] in (b"II*\0", b"MM\0*", b"II+\0", b"MM\0+"):
        return "tiff", _sniff_tiff
    if head[:2] == b"BM":
        return "bmp", _sniff_bmp
    if len(head) > 2 and head[0] == ord("P") and head[1] in b"1234567" and head[2] in _WHITESPACE:
        return "pnm", _sniff_pnm
    if head[:4] == b"RIFF" and head[8:12] == b"WEBP":
        return "webp", _sniff_webp
    return "", None


def _sniff_stream(f: BinaryIO) -> Sniffed:
    """The verdict on an open file, from its content; sizes checked against MAX_BYTES."""
    head = f.read(32)
    f.seek(0)
    container, reader = _container(head)
    if reader is None:
        for magic, at, name, reason in _OTHERS:
            if head[at : at + len(magic)] == magic:
                return _kept(name, reason)
        return _kept("", "not an image")
    try:
        verdict = reader(f)
    except _Bad as exc:
        return _refused(container, str(exc))
    except (OSError, ValueError, struct.error) as exc:
        return _refused(container, f"unreadable {container.upper()} ({exc})")
    if verdict.action == "image":
        fmt = pixel_format(verdict.format)
        need = fmt.planes * verdict.width * verdict.height * (2 if fmt.bits == 16 else 1)
        if need > MAX_BYTES:
            return _refused(container, f"{verdict.width} x {verdict.height} is too large "
                            f"({need} bytes of values, at most {MAX_BYTES})")
    return verdict


_DECODERS: dict[str, Callable[[bytes], Picture]] = {
    "png": _decode_png, "tiff": _decode_tiff, "bmp": _decode_bmp, "pnm": _decode_pnm,
    "webp": _decode_webp}
_ENCODERS: dict[str, Callable[[Picture], bytes]] = {
    "png": _encode_png, "tiff": _encode_tiff, "bmp": _encode_bmp, "pnm": _encode_pnm,
    "webp": _encode_webp}
_DECODE_ERRORS = (OSError, ValueError, RuntimeError, SyntaxError, EOFError, struct.error,
                  zlib.error, Image.DecompressionBombError, IndexError)


def _picture(f: BinaryIO) -> Picture:
    """The picture of an open file; _Bad with the reason if it is not one we keep."""
    verdict = _sniff_stream(f)
    if verdict.action != "image":
        raise _Bad(verdict.reason)
    f.seek(0)
    data = f.read()
    try:
        picture = _DECODERS[verdict.container](data)
    except _Bad:
        raise
    except _DECODE_ERRORS as exc:
        raise _Bad(f"unreadable {verdict.container.upper()} ({exc})") from None
    if picture.format != verdict.format or (picture.width, picture.height) != (
            verdict.width, verdict.height):
        raise _Bad(f"decoded as {picture.format} {picture.width} x {picture.height}, the "
                   f"header says {verdict.format} {verdict.width} x {verdict.height}")
    return picture


def sniff(path: Path) -> Sniffed:
    """What happens to the file at `path`, from its content (never its name); cheap."""
    try:
        with open(path, "rb") as f:
            return _sniff_stream(f)
    except OSError as exc:
        return _refused("", f"cannot be read ({exc.strerror or exc})")


def read_picture(path: Path) -> Picture:
    """The picture in an image file, every value at full depth and every extra kept."""
    try:
        with open(path, "rb") as f:
            return _picture(f)
    except _Bad as exc:
        raise ImageError(f"{path}: {exc}") from None
    except OSError as exc:
        raise ImageError(f"{path}: cannot be read ({exc.strerror or exc})") from None


def _encoded(picture: Picture) -> bytes:
    """The file bytes of a picture in its container; _Bad if the container cannot hold it."""
    try:
        validate(picture)
    except (ValueError, KeyError) as exc:
        raise _Bad(str(exc)) from None
    encoder = _ENCODERS.get(picture.container)
    if encoder is None:
        raise _Bad(f"rowcast does not write {picture.container!r} files")
    try:
        return encoder(picture)
    except _Bad:
        raise
    except (ValueError, RuntimeError, OSError, struct.error, TypeError) as exc:
        raise _Bad(f"cannot be written as {picture.container.upper()} ({exc})") from None


def file_bytes(picture: Picture, path: Path) -> bytes:
    """The picture's file in its container; ImageError naming `path` if it cannot hold it."""
    try:
        return _encoded(picture)
    except _Bad as exc:
        raise ImageError(f"{path}: {exc}") from None


def write_new(path: Path, data: bytes) -> None:
    """Write `data` to a new file at `path`; ImageError naming it if that fails."""
    try:
        with open(path, "xb") as f:
            f.write(data)
    except OSError as exc:
        raise ImageError(f"{path}: cannot be written ({exc.strerror or exc})") from None


def write_picture(picture: Picture, path: Path) -> None:
    """Write the picture in its container to a new file at `path`."""
    write_new(path, file_bytes(picture, path))


def _same(a: Picture, b: Picture) -> bool:
    return (a.format == b.format and a.container == b.container and a.extras == b.extras
            and a.values.dtype == b.values.dtype and np.array_equal(a.values, b.values))


def can_write(picture: Picture) -> bool:
    """Whether writing the picture in its container and reading it back gives it exactly
    (checked by doing so in memory)."""
    try:
        return _same(picture, _picture(io.BytesIO(_encoded(picture))))
    except _Bad:
        return False


def restored(name: str, picture: Picture) -> tuple[str, Picture] | None:
    """The name and picture to restore: the same when `can_write`, else the picture as PNG
    under the name with ".png" appended when PNG holds it and its extras exactly, else None
    (the caller keeps the file's bytes)."""
    if can_write(picture):
        return name, picture
    as_png = Picture(picture.values, picture.format, picture.extras, "png", picture.notes)
    return (name + ".png", as_png) if can_write(as_png) else None


_NAMES = {
    PALETTE: "palette", TRANSPARENCY: "transparency",
    "png:iCCP": "icc", "png:eXIf": "exif", "png:iTXt": "text", "png:tEXt": "text",
    "png:zTXt": "text", "png:gAMA": "gamma", "png:cHRM": "chromaticity",
    "png:pHYs": "physical size", "png:sRGB": "colour space", "png:tIME": "time",
    "png:bKGD": "background", "png:sBIT": "significant bits", "png:hIST": "histogram",
    "png:sPLT": "suggested palette", "png:PLTE": "suggested palette", "png:depth": "bit depth",
    "png:cICP": "colour space", "png:mDCV": "display colour volume",
    "png:cLLI": "light level",
    "tiff:34675": "icc", "tiff:700": "xmp", "tiff:33723": "iptc", "tiff:34377": "photoshop",
    "tiff:270": "description", "tiff:305": "software", "tiff:306": "time",
    "tiff:315": "artist", "tiff:33432": "copyright", "tiff:271": "make", "tiff:272": "model",
    "tiff:274": "orientation", "tiff:282": "physical size", "tiff:283": "physical size",
    "tiff:296": "physical size", "tiff:259": "compression", "tiff:317": "predictor",
    "tiff:269": "document name", "tiff:285": "page name", "tiff:316": "host computer",
    "webp:ICCP": "icc", "webp:EXIF": "exif", "webp:XMP": "xmp",
    "bmp:resolution": "physical size", "pnm:comment": "comment", "pnm:maxval": "maximum value",
}


def describe(kind: str) -> str:
    """A short human name of an extra's kind, for listings."""
    name = _NAMES.get(kind.removesuffix("@end"))
    if name is not None:
        return name
    if kind.startswith("png:"):
        return f"png chunk {kind[4:].removesuffix('@end')}"
    if kind.startswith("tiff:"):
        return f"tiff tag {kind[5:]}"
    return kind
