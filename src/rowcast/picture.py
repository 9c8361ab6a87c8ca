"""What an image file holds, as rowcast keeps it: values, palette, transparency, metadata.

`Picture` is the unit that readers produce, the codec codes and writers restore. Its
`extras` (palette, transparency key, metadata blocks) travel beside the coded values as
one byte string (`pack_extras`), and its checksum covers both, so a restored file is
checked for everything it carries, not only its pixels.
"""

from __future__ import annotations

import hashlib
from dataclasses import dataclass, field

import numpy as np

from rowcast import varint
from rowcast.pixelformats import PixelFormat, pixel_format

PALETTE = "palette"  # RGB triples, 3 bytes an entry
CONTAINER = "container"  # the file type to restore into, first of a picture's packed extras
TRANSPARENCY = "transparency"  # as the PNG specification's tRNS chunk holds it
# Extras that say what the values mean rather than describe the scene: --strip-metadata
# keeps them (a file's bit depth below 8, a PNM's maximum value; see rowcast.imagefile).
MEANING = frozenset({PALETTE, TRANSPARENCY, "png:depth", "pnm:maxval"})


@dataclass(frozen=True, eq=False)
class Picture:
    """One image: `values` (planes, height, width) in the format's dtype, and its extras.

    `extras` is an ordered tuple of (kind, bytes): the palette (`PALETTE`), the
    transparency key (`TRANSPARENCY`: for gray a 2-byte big-endian value, for RGB three,
    for a palette one alpha byte per entry), and metadata blocks whose kinds the file
    reader names (`rowcast.imagefile`). `container` is the file type it came from and goes
    back to ("png", "tiff", "bmp", "pnm", "webp").
    """

    values: np.ndarray
    format: str
    extras: tuple[tuple[str, bytes], ...] = ()
    container: str = "png"
    notes: tuple[str, ...] = field(default=(), compare=False)  # what a reader wants said

    @property
    def pixel_format(self) -> PixelFormat:
        return pixel_format(self.format)

    @property
    def width(self) -> int:
        return int(self.values.shape[2])

    @property
    def height(self) -> int:
        return int(self.values.shape[1])

    def extra(self, kind: str) -> bytes | None:
        """The first extra of this kind, or None."""
        return next((data for k, data in self.extras if k == kind), None)

    @property
    def metadata(self) -> tuple[tuple[str, bytes], ...]:
        """The extras that are metadata (neither palette nor transparency)."""
        return tuple((k, d) for k, d in self.extras if k not in (PALETTE, TRANSPARENCY))

    def without_metadata(self) -> Picture:
        """The same picture with only the extras that give its values their meaning."""
        kept = tuple((k, d) for k, d in self.extras if k in MEANING)
        return Picture(self.values, self.format, kept, self.container, self.notes)


def value_bytes(values: np.ndarray) -> bytes:
    """The values as the archive's checksum reads them: plane-major, 16-bit big-endian."""
    if values.dtype == np.uint16:
        return np.ascontiguousarray(values, dtype=">u2").tobytes()
    return np.ascontiguousarray(values, dtype=np.uint8).tobytes()


def interleaved(values: np.ndarray) -> np.ndarray:
    """Values (P, H, W) as (H, W) for one plane, else (H, W, P), in a fresh C-ordered array:
    encoders check the strides, which numpy leaves unusual on axes of length 1."""
    hwc = values.transpose(1, 2, 0)
    return (hwc[..., 0] if values.shape[0] == 1 else hwc).copy()


def planar(array: np.ndarray) -> np.ndarray:
    """An image array (H, W) or (H, W, P) as values (P, H, W), C-ordered."""
    return np.ascontiguousarray(array[None] if array.ndim == 2 else array.transpose(2, 0, 1))


def checksum(values: np.ndarray, extras: bytes = b"") -> bytes:
    """SHA-256 of the packed extras followed by the values (`value_bytes`)."""
    digest = hashlib.sha256(extras)
    digest.update(value_bytes(values))
    return digest.digest()


def pack_extras(extras: tuple[tuple[str, bytes], ...]) -> bytes:
    """One byte string of the extras: count, then (kind length, kind, data length, data)."""
    out = bytearray(varint.pack(len(extras)))
    for kind, data in extras:
        raw = kind.encode("utf-8")
        out += varint.pack(len(raw)) + raw + varint.pack(len(data)) + data
    return bytes(out)


class ExtrasError(ValueError):
    """Packed extras that do not parse."""


def unpack_extras(data: bytes) -> tuple[tuple[str, bytes], ...]:
    """The inverse of `pack_extras`; ExtrasError on anything malformed or left over."""
    pos = 0

    def number() -> int:
        nonlocal pos
        try:
            value, pos = varint.unpack(data, pos)
        except IndexError:
            raise ExtrasError("truncated extras") from None
        except ValueError:
            raise ExtrasError("malformed number in extras") from None
        return value

    def take(count: int) -> bytes:
        nonlocal pos
        if count > len(data) - pos:
            raise ExtrasError("truncated extras")
        pos += count
        return data[pos - count : pos]

    count = number()
    if count > len(data):
        raise ExtrasError("extras count larger than the extras")
    out = []
    for _ in range(count):
        try:
            kind = take(number()).decode("utf-8")
        except UnicodeDecodeError:
            raise ExtrasError("extras kind is not UTF-8") from None
        out.append((kind, take(number())))
    if pos != len(data):
        raise ExtrasError("trailing bytes in extras")
    return tuple(out)


def pack_picture_extras(picture: Picture) -> bytes:
    """What an archive keeps beside a picture's coded values: its extras (`pack_extras`),
    led by its container unless that is PNG; nothing at all for a bare PNG picture."""
    lead = () if picture.container == "png" else ((CONTAINER, picture.container.encode("ascii")),)
    extras = (*lead, *picture.extras)
    return pack_extras(extras) if extras else b""


def unpack_picture_extras(data: bytes) -> tuple[str, tuple[tuple[str, bytes], ...]]:
    """(container, extras) from `pack_picture_extras`; ExtrasError if malformed."""
    extras = unpack_extras(data) if data else ()
    if data and not extras:
        raise ExtrasError("an empty extras record is written as no bytes")
    if not extras or extras[0][0] != CONTAINER:
        return "png", extras
    try:
        container = extras[0][1].decode("ascii")
    except UnicodeDecodeError:
        raise ExtrasError("container name is not ASCII") from None
    if container == "png" or any(kind == CONTAINER for kind, _ in extras[1:]):
        raise ExtrasError("container record that a writer never makes")
    return container, extras[1:]


def validate(picture: Picture) -> None:
    """ValueError unless the values fit the format: shape, dtype, range, palette size."""
    fmt = picture.pixel_format
    v = picture.values
    if v.ndim != 3 or v.shape[0] != fmt.planes or v.dtype != np.dtype(fmt.dtype):
        raise ValueError(f"{fmt.name} needs ({fmt.planes}, H, W) {fmt.dtype} values, "
                         f"not {v.shape} {v.dtype}")
    if fmt.bits == 1 and v.size and int(v.max()) > 1:
        raise ValueError("1-bit values above 1")
    if fmt.palette:
        palette = picture.extra(PALETTE)
        if palette is None or len(palette) % 3 or not 3 <= len(palette) <= 768:
            raise ValueError("a palette image needs a palette of 1 to 256 RGB entries")
        if v.size and int(v.max()) >= len(palette) // 3:
            raise ValueError("palette index past the palette")
