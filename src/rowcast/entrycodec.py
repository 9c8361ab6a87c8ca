"""Pictures to archive payloads and back: the pixel format's planes become pieces.

A picture of any format in `pixelformats.FORMATS` is coded group by group (`groups`: R, G,
B together, alpha alone, gray or palette indices alone). An 8-bit group is one piece for
the predictor; 1-bit values go to it as 0 and 255; a 16-bit group is split by
`rowcast.deep` into a few parameter bytes, 8-bit planes for the predictor and literal low
bits. Each predictor piece is kept as the predictor's code or, when shorter, as zlib or
raw bytes, so no piece costs more than its raw size plus a few bytes.

The payload of method "coded" (docs/FORMAT.md) is, for each group, the number of its
pieces, then each piece: a method byte (`PIECES`), its length and its bytes. A predicted
plane set larger than a thumbnail (a side over `TILE`) is a "tiles" piece instead: the
tile side, then one piece for each TILE x TILE tile in raster order, so that tiles decode
independently, together with same-sized tiles of other pictures, on every worker, in
bounded memory. The whole picture may instead be kept as a PNG of its values (method
"png") or raw ("literal"), whichever of the three is shortest.
"""

from __future__ import annotations

import io
import zlib
from collections import defaultdict
from collections.abc import Callable, Sequence
from dataclasses import dataclass

import imagecodecs
import numpy as np
from PIL import Image

from rowcast import codec, deep, native, varint
from rowcast.entropy import PayloadError
from rowcast.picture import PALETTE, Picture, interleaved
from rowcast.pixelformats import PixelFormat
from rowcast.predictor import Engine
from rowcast.workers import map_split

PIECES: dict[str, int] = {"literal": 0, "model": 1, "tuned": 2, "adaptive": 3, "zlib": 4,
                          "tiles": 5, "difference": 6}
_PIECE_NAMES = {code: name for name, code in PIECES.items()}
PREDICTED = ("model", "tuned", "adaptive", "difference")  # pieces coded by the predictor
ONE_BIT_HIGH = 255  # a 1-bit value of 1 as the predictor sees it
TILE = 256  # predicted planes with a side over this are coded in tiles of this side
# A decode of this many predicted pixels or fewer, where the compiled kernels are neither
# loaded nor prebuilt for this machine (`native.ready`), runs the reference decoder
# instead: building them takes seconds, and loading numba's JIT about 0.5 s, more than the
# reference takes for one 64-px thumbnail (measured on 2 cores with the JIT: 32 x 32 RGB
# 0.14 s against 0.54 s, 64 x 64 0.41 against 0.57, 128 x 128 1.51 against 0.68, loading
# included). The pixels are the same either way.
REFERENCE_PIXELS = 64 * 64
# Predictor planes decoded together: the compiled loop's products are matrices of this
# many images (split among the worker processes). Measured on 2 cores, 178 thumbnails of
# 64 px: 0.50 MP/s in batches of 32, 0.63 of 64, 0.68 of 128 and 256.
BATCH = 128


class CodingError(ValueError):
    """A payload that does not decode; the message says why (without the entry's name)."""


@dataclass(frozen=True)
class Encoded:
    """A picture's payload: its method ("coded", "png" or "literal"), bytes, the methods
    of its pieces (for `rowcast list`) and the bits the model's cross-entropy and the other
    pieces' bytes account for."""

    method: str
    payload: bytes
    parts: tuple[str, ...]
    cross_entropy: float


@dataclass(frozen=True)
class Wanted:
    """A payload to decode: how the archive describes it. `layout` is the predictor
    payload layout (`codec.LAYOUTS`; "streamed" from format 7 on)."""

    format: PixelFormat
    width: int
    height: int
    method: str
    payload: bytes
    layout: str = "streamed"


# ---- the pieces of a picture -------------------------------------------------------------

def _groups(picture: Picture) -> list[list[tuple[str, object]]]:
    """Per group, its pieces as ("predict", uint8 (P, H, W)) or ("bytes", bytes)."""
    fmt, values = picture.pixel_format, picture.values
    out = []
    for group in fmt.groups:
        planes = values[list(group)]
        if fmt.bits == 16:
            params, model_planes, literal = deep.split(planes)
            rest = b"" if literal is None else np.ascontiguousarray(literal).tobytes()
            out.append([("bytes", params), *(("predict", p) for p in model_planes),
                        ("bytes", rest)])
        elif fmt.bits == 1:
            out.append([("predict", (planes * ONE_BIT_HIGH).astype(np.uint8))])
        else:
            out.append([("predict", np.ascontiguousarray(planes, dtype=np.uint8))])
    return out


def _plain(data: bytes) -> tuple[str, bytes]:
    """Raw bytes as the shorter of zlib and literal."""
    packed = zlib.compress(data, 9)
    return ("zlib", packed) if len(packed) < len(data) else ("literal", data)


def _piece(method: str, data: bytes) -> bytes:
    return bytes([PIECES[method]]) + varint.pack(len(data)) + data


def encode_pictures(engine: Engine | None, pictures: Sequence[Picture],
                    workers: int | None = None, quick: bool = False) -> list[Encoded]:
    """The shortest payload of each picture (`Encoded`); same-sized predictor pieces of
    all the pictures are coded together, and their fallbacks (`_fallbacks`: PNG, zlib)
    made on every core, as the coding is. `engine` None codes without the predictor;
    `quick`: without `codec.tuning_of`'s second search."""
    groups = [_groups(p) for p in pictures]
    buckets: dict[tuple, list[tuple[int, int, int, int]]] = defaultdict(list)
    for i, picture_groups in enumerate(groups):
        for g, pieces in enumerate(picture_groups):
            for k, (what, data) in enumerate(pieces):
                if what == "predict":
                    for t, tile in enumerate(tiles(data)):
                        buckets[tile.shape].append((i, g, k, t))
    coded: dict[tuple[int, int, int, int], codec.Coded] = {}
    if engine is not None:
        for members in buckets.values():
            images = [tiles(groups[i][g][k][1])[t] for i, g, k, t in members]
            coded.update(zip(members, codec.encode_batch(engine, images, "adaptive",
                                                         workers=workers, quick=quick),
                             strict=True))
    fallbacks = map_split(lambda i: _fallbacks(pictures[i], groups[i]), range(len(pictures)),
                          sum(p.width * p.height for p in pictures), workers)
    results = []
    for i, (picture, (png, plain)) in enumerate(zip(pictures, fallbacks, strict=True)):
        body, parts, bits = bytearray(), [], 0.0
        for g, pieces in enumerate(groups[i]):
            body += varint.pack(len(pieces))
            for k, (what, _) in enumerate(pieces):
                if what != "predict":
                    method, chosen = plain[g][k][0]
                    bits += 8 * len(chosen)
                    body += _piece(method, chosen)
                    continue
                chosen = [_best(fallback, coded.get((i, g, k, t)))
                          for t, fallback in enumerate(plain[g][k])]
                bits += sum(b for _, _, b in chosen)
                parts.append(_summary([m for m, _, _ in chosen]))
                if len(chosen) == 1:
                    body += _piece(*chosen[0][:2])
                else:
                    body += _piece("tiles", varint.pack(TILE) + b"".join(
                        _piece(m, d) for m, d, _ in chosen))
        results.append(_shortest(picture, png,
                                 Encoded("coded", bytes(body), tuple(parts), bits)))
    return results


def _fallbacks(picture: Picture, pieces: list[list[tuple[str, object]]]
               ) -> tuple[bytes, list[list[list[tuple[str, bytes]]]]]:
    """(the picture's `png_of`, for each group's each piece the `_plain` forms of its
    tiles, a bytes piece's alone): what the predictor's code must beat, made on every core."""
    return png_of(picture), [[[_plain(t.tobytes()) for t in tiles(data)] if what == "predict"
                              else [_plain(data)] for what, data in group] for group in pieces]


def tiles(planes: np.ndarray) -> list[np.ndarray]:
    """A predicted plane set (P, H, W) as its TILE x TILE tiles in raster order (the edge
    ones smaller), or itself alone when no side is over TILE."""
    h, w = planes.shape[1:]
    if h <= TILE and w <= TILE:
        return [planes]
    return [np.ascontiguousarray(planes[:, y : y + TILE, x : x + TILE])
            for y in range(0, h, TILE) for x in range(0, w, TILE)]


def _best(plain: tuple[str, bytes], coded: codec.Coded | None) -> tuple[str, bytes, float]:
    """(piece method, bytes, bits accounted) of a predicted plane set: the shorter of its
    predictor code and its `_plain` form."""
    method, chosen = plain
    if coded is not None and len(coded.payload) < len(chosen):
        return coded.method, coded.payload, coded.cross_entropy + coded.tuning_bits
    return method, chosen, 8.0 * len(chosen)


def _summary(methods: list[str]) -> str:
    """What `rowcast list` shows for a predicted piece: its method, or for tiles the
    richest predictor method among them (else the plain method of the first)."""
    return next((m for m in reversed(PREDICTED) if m in methods), methods[0])


def _shortest(picture: Picture, png: bytes, coded: Encoded) -> Encoded:
    """The shortest of the coded payload, the PNG of the values (`png_of`) and the raw
    values."""
    best = coded
    for method, payload in (("png", png), ("literal", literal_of(picture))):
        if len(payload) < len(best.payload):
            best = Encoded(method, payload, (), 8.0 * len(payload))
    return best


# ---- whole-picture fallbacks -------------------------------------------------------------

def literal_of(picture: Picture) -> bytes:
    """The raw values: plane-major, 16-bit big-endian, 1-bit one byte a value."""
    dtype = ">u2" if picture.pixel_format.bits == 16 else np.uint8
    return np.ascontiguousarray(picture.values, dtype=dtype).tobytes()


def png_of(picture: Picture) -> bytes:
    """The values as a PNG at zlib's highest effort (a palette image with its palette, at
    the bit depth the palette needs; 1-bit packed); no metadata."""
    fmt = picture.pixel_format
    if fmt.palette or fmt.bits == 1:
        image = Image.fromarray(picture.values[0], "P" if fmt.palette else "L")
        if fmt.palette:
            image.putpalette(picture.extra(PALETTE))
        else:
            image = image.point(lambda v: 255 * v).convert("1", dither=Image.Dither.NONE)
        buffer = io.BytesIO()
        image.save(buffer, "PNG", optimize=True)
        return buffer.getvalue()
    return bytes(imagecodecs.png_encode(interleaved(picture.values), level=9))


def _from_png(fmt: PixelFormat, width: int, height: int, payload: bytes) -> np.ndarray:
    if fmt.palette or fmt.bits == 1:
        try:
            with Image.open(io.BytesIO(payload), formats=["PNG"]) as image:
                if image.size != (width, height) or image.mode != ("P" if fmt.palette else "1"):
                    raise CodingError("PNG payload of the wrong size or mode")
                flat = np.asarray(image, dtype=np.uint8)
        except (OSError, SyntaxError, ValueError) as exc:
            raise CodingError(f"PNG payload does not decode ({exc})") from None
        return flat[None].astype(np.uint8)
    try:
        flat = imagecodecs.png_decode(payload)
    except Exception as exc:  # imagecodecs raises its own error classes
        raise CodingError(f"PNG payload does not decode ({exc})") from None
    values = flat[None] if flat.ndim == 2 else flat.transpose(2, 0, 1)
    if values.shape != (fmt.planes, height, width) or values.dtype != np.dtype(fmt.dtype):
        raise CodingError("PNG payload of the wrong size or depth")
    return np.ascontiguousarray(values)


def _from_literal(fmt: PixelFormat, width: int, height: int, payload: bytes) -> np.ndarray:
    dtype = ">u2" if fmt.bits == 16 else np.uint8
    count = fmt.planes * width * height
    if len(payload) != count * np.dtype(dtype).itemsize:
        raise CodingError("literal payload of the wrong length")
    values = np.frombuffer(payload, dtype).reshape(fmt.planes, height, width)
    if fmt.bits == 1 and values.size and int(values.max()) > 1:
        raise CodingError("1-bit literal payload holds values above 1")
    return values.astype(fmt.dtype)


# ---- decoding ----------------------------------------------------------------------------

class _Reader:
    """Reads a coded payload's numbers and pieces, refusing to run past its end."""

    def __init__(self, data: bytes) -> None:
        self.data, self.pos = data, 0

    def number(self) -> int:
        try:
            value, self.pos = varint.unpack(self.data, self.pos)
        except IndexError:
            raise CodingError("truncated coded payload") from None
        except ValueError:
            raise CodingError("malformed number in coded payload") from None
        return value

    def piece(self) -> tuple[str, bytes]:
        if self.pos >= len(self.data):
            raise CodingError("truncated coded payload")
        code = self.data[self.pos]
        self.pos += 1
        if code not in _PIECE_NAMES:
            raise CodingError(f"unknown piece method {code} (from a newer rowcast?)")
        length = self.number()
        if length > len(self.data) - self.pos:
            raise CodingError("piece runs past the payload")
        self.pos += length
        return _PIECE_NAMES[code], self.data[self.pos - length : self.pos]


def _plain_bytes(method: str, data: bytes, size: int) -> bytes:
    """A zlib or literal piece's bytes, refusing more than `size` (checked as it inflates)."""
    if method == "literal":
        out = data
    elif method == "zlib":
        inflater = zlib.decompressobj()
        try:
            out = inflater.decompress(data, size + 1)
        except zlib.error:
            raise CodingError("zlib piece does not inflate") from None
        if not inflater.eof:
            raise CodingError("zlib piece inflates past its size")
    else:
        raise CodingError(f"a {method} piece where bytes belong")
    if len(out) > size:
        raise CodingError("piece larger than its plane")
    return out


@dataclass
class _Slot:
    """A predictor plane of a payload: where its decoded values go."""

    item: int
    shape: tuple[int, int, int]
    method: str
    data: bytes


def _parse(want: Wanted, index: int, slots: list[_Slot]) -> list[list]:
    """The groups of a coded payload as lists of bytes or `_Slot`s (to be decoded)."""
    fmt, h, w = want.format, want.height, want.width
    reader, groups = _Reader(want.payload), []
    for group in fmt.groups:
        count = reader.number()
        expected_min = 3 if fmt.bits == 16 else 1
        if not expected_min <= count <= (3 + deep.MAX_PLANES if fmt.bits == 16 else 1):
            raise CodingError(f"a group of {count} pieces")
        pieces = []
        for k in range(count):
            method, data = reader.piece()
            predict = fmt.bits != 16 or 0 < k < count - 1
            shape = (len(group), h, w)
            if not predict:
                pieces.append(_plain_bytes(method, data, deep.MAX_PARAMS if k == 0
                                           else 2 * len(group) * h * w))
            elif method == "tiles":
                pieces.append(_parse_tiles(data, shape, index, slots))
            else:
                pieces.append(_predicted(method, data, shape, index, slots))
        groups.append(pieces)
    if reader.pos != len(want.payload):
        raise CodingError("trailing bytes in coded payload")
    return groups


def _predicted(method: str, data: bytes, shape: tuple[int, int, int], index: int,
               slots: list[_Slot]) -> _Slot | np.ndarray:
    """A predicted plane set's piece: a `_Slot` to decode, or its plain values."""
    if method in PREDICTED:
        slot = _Slot(index, shape, method, data)
        slots.append(slot)
        return slot
    if method == "tiles":
        raise CodingError("a tiles piece inside a tiles piece")
    raw = _plain_bytes(method, data, int(np.prod(shape)))
    if len(raw) != int(np.prod(shape)):
        raise CodingError("plane piece of the wrong length")
    return np.frombuffer(raw, np.uint8).reshape(shape)


@dataclass
class _Tiled:
    """A predicted plane set coded in tiles: its shape, the tile side, each tile's piece."""

    shape: tuple[int, int, int]
    side: int
    tiles: list


MIN_TILE = 16  # the least tile side a reader accepts


def _parse_tiles(data: bytes, shape: tuple[int, int, int], index: int,
                 slots: list[_Slot]) -> _Tiled:
    """A tiles piece: the side, then a piece per tile in raster order. The tile count is
    checked against the bytes (each tile's piece takes at least two) before any list of
    that size exists."""
    reader = _Reader(data)
    side = reader.number()
    planes, h, w = shape
    if side < MIN_TILE or (h <= side and w <= side):
        raise CodingError(f"tiles of side {side} for a plane of {w} x {h}")
    count = -(-h // side) * -(-w // side)
    if 2 * count > len(data):
        raise CodingError(f"a tiles piece of {len(data)} bytes for {count} tiles")
    tiles = []
    for y in range(0, h, side):
        for x in range(0, w, side):
            method, piece = reader.piece()
            tile = (planes, min(side, h - y), min(side, w - x))
            tiles.append(_predicted(method, piece, tile, index, slots))
    if reader.pos != len(data):
        raise CodingError("trailing bytes in tiles piece")
    return _Tiled(shape, side, tiles)


def _slots_of(piece) -> list[_Slot]:
    """The slots a parsed piece waits for."""
    if isinstance(piece, _Slot):
        return [piece]
    return [t for t in piece.tiles if isinstance(t, _Slot)] if isinstance(piece, _Tiled) else []


def _values_of(piece, planes: dict[int, np.ndarray]):
    """A parsed piece's values once its slots are decoded."""
    if isinstance(piece, _Slot):
        return planes[id(piece)]
    if not isinstance(piece, _Tiled):
        return piece
    out = np.empty(piece.shape, np.uint8)
    side, width = piece.side, piece.shape[2]
    per_row = -(-width // side)
    for t, tile in enumerate(piece.tiles):
        y, x = t // per_row * side, t % per_row * side
        out[:, y : y + side, x : x + side] = _values_of(tile, planes)
    return out


def _assemble(want: Wanted, groups: list[list], planes: dict[int, np.ndarray]) -> np.ndarray:
    """The picture's values from its parsed groups and decoded predictor planes."""
    fmt = want.format
    values = np.zeros((fmt.planes, want.height, want.width), fmt.dtype)
    for group, pieces in zip(fmt.groups, groups, strict=True):
        got = [_values_of(p, planes) for p in pieces]
        if fmt.bits == 16:
            literal = np.frombuffer(got[-1], np.uint8) if got[-1] else None
            part = deep.join(got[0], got[1:-1], literal, (len(group), want.height, want.width))
        elif fmt.bits == 1:
            plane = got[0]
            if np.any((plane != 0) & (plane != ONE_BIT_HIGH)):
                raise CodingError("1-bit plane holds values other than 0 and 1")
            part = (plane // ONE_BIT_HIGH).astype(np.uint8)
        else:
            part = got[0]
        values[list(group)] = part
    return values


def decode_values(engine: Engine | None, wanted: Sequence[Wanted], batch: int = BATCH,
                  progress: Callable[[int], None] | None = None,
                  workers: int | None = None) -> list[np.ndarray | CodingError]:
    """Each payload's values, or the CodingError that stops it; a damaged payload never
    stops the others. Predictor planes of the same shape decode together, `batch` at a
    time; `engine` may be None when no payload needs the predictor."""
    results: list[np.ndarray | CodingError | None] = [None] * len(wanted)
    slots: list[_Slot] = []
    parsed: dict[int, list[list]] = {}
    for i, want in enumerate(wanted):
        try:
            if want.method == "png":
                results[i] = _from_png(want.format, want.width, want.height, want.payload)
            elif want.method == "literal":
                results[i] = _from_literal(want.format, want.width, want.height, want.payload)
            elif want.method == "coded":
                parsed[i] = _parse(want, i, slots)
            elif want.method in PREDICTED:  # an archive of format 1 to 6: one piece
                slot = _Slot(i, (want.format.planes, want.height, want.width), want.method,
                             want.payload)
                slots.append(slot)
                parsed[i] = [[slot]]
            else:
                raise CodingError(f"no decoder for method {want.method!r}")
        except CodingError as exc:
            results[i] = exc
    planes = _decode_slots(engine, wanted, slots, batch, progress, workers)
    for i, groups in parsed.items():
        mine = [s for g in groups for p in g for s in _slots_of(p)]
        failed = next((planes[id(s)] for s in mine if isinstance(planes[id(s)], CodingError)),
                      None)
        if failed is not None:
            results[i] = failed
            continue
        try:
            if wanted[i].method == "coded":
                results[i] = _assemble(wanted[i], groups, planes)
            else:
                results[i] = planes[id(groups[0][0])]
        except (CodingError, ValueError) as exc:
            results[i] = CodingError(str(exc))
    return results


def _decode_slots(engine: Engine | None, wanted: Sequence[Wanted], slots: list[_Slot],
                  batch: int, progress, workers) -> dict[int, np.ndarray | CodingError]:
    """Decode predictor planes of the same shape and layout together; on a failure, each
    of that batch alone, so only the damaged ones fail."""
    out: dict[int, np.ndarray | CodingError] = {}
    if slots and engine is None:
        raise ValueError("predictor pieces need an engine")
    compiled = (native.ready()
                or sum(s.shape[1] * s.shape[2] for s in slots) > REFERENCE_PIXELS)
    buckets: dict[tuple, list[_Slot]] = defaultdict(list)
    per_item: dict[int, int] = defaultdict(int)
    for s in slots:
        buckets[(s.shape, wanted[s.item].layout)].append(s)
        per_item[s.item] += 1
    for ((planes, h, w), layout), members in buckets.items():
        for start in range(0, len(members), batch):
            part = members[start : start + batch]
            try:
                decoded = codec.decode_batch(engine, [s.data for s in part], planes, h, w,
                                             progress=_rows_of(progress, part, wanted,
                                                               per_item),
                                             workers=workers,
                                             methods=[s.method for s in part], layout=layout,
                                             compiled=compiled)
                out.update((id(s), d) for s, d in zip(part, decoded, strict=True))
            except (PayloadError, ValueError, RuntimeError):
                for s in part:
                    try:
                        out[id(s)] = codec.decode_batch(engine, [s.data], planes, h, w,
                                                        workers=1, methods=[s.method],
                                                        layout=layout, compiled=compiled)[0]
                    except (PayloadError, ValueError, RuntimeError) as exc:
                        out[id(s)] = CodingError(f"predictor piece does not decode ({exc})")
    return out


def _rows_of(progress, part: list[_Slot], wanted: Sequence[Wanted],
             per_item: dict[int, int]):
    """`progress` in picture rows for a batch of slots that reports slot rows: a slot of h
    rows, one of k of a picture of height H, counts H / (k h) a row, so each picture adds
    its height once all its slots (tiles, plane groups) are decoded."""
    if progress is None:
        return None
    rows = sum(wanted[s.item].height / (per_item[s.item] * s.shape[1]) for s in part)
    return lambda n: progress(n * rows / len(part))


def needs_engine(methods: Sequence[str], parts: Sequence[Sequence[str]]) -> bool:
    """Whether payloads with these methods and pieces need the predictor."""
    return any(m in PREDICTED for m in methods) or any(
        p in PREDICTED for ps in parts for p in ps)
