"""Bytes and speed of rowcast beside conventional lossless codecs, every figure verified.

Each image is read at full depth (`rowcast.imagefile.read_picture`) and given to rowcast
and to each baseline in `BASELINES` in the same process. A baseline's output is decoded and
compared value for value with the picture; a mismatch, or an error while coding, is that
codec failing for that image (status "failed", with the reason), never a figure. A format
that a baseline cannot hold (its `keeps`) is skipped with the reason.

What each figure counts:

- rowcast: the archive entry as `rowcast.api.compress` writes it, payload plus the packed
  extras (palette, transparency, metadata, container); the picture is the one compress
  would store (`imagefile.restored`). Also the model's cross-entropy and the payload's
  ratio to it.
- baselines: the file a codec writes for the values alone (no metadata). A palette image
  goes only to the codecs that store an index plane with its palette (PNG and TIFF), and is
  measured as that: indices plus palette; the others skip it. 1-bit images likewise go to
  the codecs with a 1-bit mode.

Speeds are megapixels (width x height) per second of one call on one image; rowcast codes
each image alone, as the baselines do (coding many same-sized images together, as
`compress` and `decompress` do, is faster per image).
"""

from __future__ import annotations

import csv
import io
import time
from collections.abc import Callable, Iterable, Sequence
from dataclasses import asdict, dataclass, field
from pathlib import Path

import imagecodecs
import numpy as np
from PIL import Image, features

from rowcast import imagefile
from rowcast.entrycodec import Wanted, decode_values, encode_pictures, png_of
from rowcast.errors import DataError, UsageError
from rowcast.picture import PALETTE, Picture, interleaved, pack_picture_extras, planar
from rowcast.pixelformats import pixel_format
from rowcast.predictor import Engine
from rowcast.quantize import ModelError, load_model

GRAY_COLOUR = ("L", "LA", "RGB", "RGBA")
DEEP = ("L16", "LA16", "RGB16", "RGBA16")
ROWCAST = "rowcast"


class Mismatch(ValueError):
    """A decoded image that is not the picture that was coded; the message says how."""


# ---- conversions between a picture's planes and what the codecs take ---------------------

def _palette_of(picture: Picture) -> bytes:
    return picture.extra(PALETTE) or b""


def _decoded(values: np.ndarray, palette: bytes = b"") -> Picture:
    """What a baseline's decoder gives back; the format is filled in by `same_pixels`."""
    extras = ((PALETTE, palette),) if palette else ()
    return Picture(values, "", extras)


def same_pixels(picture: Picture, decoded: Picture) -> str:
    """"" when the decoded values equal the picture's, shape, dtype and value for value
    (for a palette picture also the colour of every index it uses), else how they differ."""
    want, got = picture.values, decoded.values
    if got.shape != want.shape:
        return f"decoded shape {got.shape}, not {want.shape}"
    if got.dtype != want.dtype:
        return f"decoded as {got.dtype}, not {want.dtype}"
    wrong = int(np.count_nonzero(got != want))
    if wrong:
        return f"{wrong} of {want.size} values differ"
    if picture.pixel_format.palette:
        used = np.unique(want)
        mine = np.frombuffer(_palette_of(picture), np.uint8).reshape(-1, 3)
        theirs = np.frombuffer(decoded.extra(PALETTE) or b"", np.uint8).reshape(-1, 3)
        if len(theirs) <= used.max() or not np.array_equal(mine[used], theirs[used]):
            return "palette colours differ"
    return ""


# ---- the baselines --------------------------------------------------------------------------

def _pillow_image(picture: Picture) -> Image.Image:
    """A Pillow image of the values (P with its palette, 1-bit as mode "1")."""
    fmt = picture.pixel_format
    if fmt.bits == 1:
        gray = Image.fromarray(picture.values[0] * np.uint8(255), "L")
        return gray.convert("1", dither=Image.Dither.NONE)  # 0 and 255 map exactly
    if fmt.bits == 16:
        return Image.fromarray(picture.values[0])  # Pillow's 16-bit gray, "I;16"
    image = Image.fromarray(interleaved(picture.values), "L" if fmt.palette else fmt.name)
    if fmt.palette:
        image.putpalette(_palette_of(picture))
    return image


def _pillow_save(image: Image.Image, kind: str, **options) -> bytes:
    buffer = io.BytesIO()
    image.save(buffer, kind, **options)
    return buffer.getvalue()


def _png_decode(data: bytes, picture: Picture) -> Picture:
    fmt = picture.pixel_format
    if not (fmt.palette or fmt.bits == 1):
        return _decoded(planar(imagecodecs.png_decode(data)))
    with Image.open(io.BytesIO(data), formats=["PNG"]) as image:
        values = planar(np.asarray(image).astype(np.uint8))
        palette = bytes(image.getpalette() or []) if image.mode == "P" else b""
    return _decoded(values, palette)


def _webp_encode(picture: Picture) -> bytes:
    image = Image.fromarray(interleaved(picture.values), picture.format)
    image = image.convert("RGBA" if picture.pixel_format.alpha else "RGB")
    return _pillow_save(image, "WEBP", lossless=True, method=6, quality=100, exact=True)


def _webp_decode(data: bytes, picture: Picture) -> Picture:
    fmt = picture.pixel_format
    with Image.open(io.BytesIO(data), formats=["WEBP"]) as image:
        rgb = planar(np.asarray(image.convert("RGBA" if fmt.alpha else "RGB")))
    if fmt.planes <= 2:  # gray went in as equal colour planes: they must come back equal
        if not (np.array_equal(rgb[0], rgb[1]) and np.array_equal(rgb[0], rgb[2])):
            raise Mismatch("gray came back with unequal colour planes")
        rgb = rgb[[0, 3]] if fmt.alpha else rgb[:1]
    return _decoded(np.ascontiguousarray(rgb))


def _jp2_encode(picture: Picture) -> bytes:
    return bytes(imagecodecs.jpeg2k_encode(interleaved(picture.values), level=0,
                                           reversible=True, codecformat="jp2"))


def _tiff_encode(picture: Picture) -> bytes:
    return _pillow_save(_pillow_image(picture), "TIFF", compression="tiff_adobe_deflate")


def _tiff_decode(data: bytes, picture: Picture) -> Picture:
    """tifffile as an independent reader of Pillow's TIFF; a colour map's 16-bit entries
    back to 8 bits."""
    import tifffile  # only here: every command imports this module for its codec names

    with tifffile.TiffFile(io.BytesIO(data)) as tif:
        page = tif.pages[0]
        values = page.asarray()
        colormap = page.colormap
    palette = b""
    if colormap is not None:
        palette = (np.asarray(colormap, np.uint32) >> 8).astype(np.uint8).T.tobytes()
    return _decoded(planar(values.astype(np.uint8) if values.dtype == bool else values),
                    palette)


def _jxl_encode(picture: Picture) -> bytes:
    return bytes(imagecodecs.jpegxl_encode(interleaved(picture.values), lossless=True,
                                           effort=9))


def _jls_encode(picture: Picture) -> bytes:
    return bytes(imagecodecs.jpegls_encode(interleaved(picture.values), level=0))


def _imagecodecs_decoder(decode: Callable[[bytes], np.ndarray]):
    def run(data: bytes, picture: Picture) -> Picture:
        return _decoded(planar(np.asarray(decode(data))))

    return run


@dataclass(frozen=True)
class Baseline:
    """A conventional lossless codec: its short name, what it is, the pixel formats it
    holds exactly, an encoder (picture -> file bytes), a decoder (file bytes, the picture
    for its format -> the decoded picture) and whether this installation has it."""

    name: str
    about: str
    keeps: tuple[str, ...]
    encode: Callable[[Picture], bytes]
    decode: Callable[[bytes, Picture], Picture]
    available: bool


BASELINES: tuple[Baseline, ...] = (
    Baseline("png", "PNG, zlib level 9 (imagecodecs; Pillow optimize for palette and 1-bit)",
             (*GRAY_COLOUR, "P", "1", *DEEP), png_of, _png_decode,
             imagecodecs.PNG.available),
    Baseline("webp", "WebP lossless, method 6, quality 100, exact (Pillow)", GRAY_COLOUR,
             _webp_encode, _webp_decode, features.check("webp")),
    Baseline("jp2", "JPEG 2000 file, reversible wavelet (imagecodecs, OpenJPEG)",
             (*GRAY_COLOUR, *DEEP), _jp2_encode,
             _imagecodecs_decoder(imagecodecs.jpeg2k_decode), imagecodecs.JPEG2K.available),
    Baseline("tiff", "TIFF, deflate at libtiff's default level (Pillow; read by tifffile)",
             (*GRAY_COLOUR, "P", "1", "L16"), _tiff_encode, _tiff_decode,
             features.check("libtiff")),
    Baseline("jxl", "JPEG XL lossless, effort 9 (imagecodecs, libjxl)",
             (*GRAY_COLOUR, *DEEP), _jxl_encode,
             _imagecodecs_decoder(imagecodecs.jpegxl_decode), imagecodecs.JPEGXL.available),
    Baseline("jpegls", "JPEG-LS lossless (imagecodecs, CharLS)",
             ("L", "RGB", "RGBA", "L16", "RGB16", "RGBA16"), _jls_encode,
             _imagecodecs_decoder(imagecodecs.jpegls_decode), imagecodecs.JPEGLS.available),
)
BY_NAME: dict[str, Baseline] = {b.name: b for b in BASELINES}


def choose(names: str | None) -> tuple[Baseline, ...]:
    """The baselines of a comma list of names (None: all); ValueError names an unknown one."""
    if names is None:
        return BASELINES
    chosen = [n.strip() for n in names.split(",") if n.strip()]
    unknown = [n for n in chosen if n not in BY_NAME] if chosen else [names]
    if unknown:
        raise ValueError(f"unknown codec {', '.join(map(repr, unknown))} (known: "
                         f"{', '.join(BY_NAME)})")
    return tuple(BY_NAME[n] for n in dict.fromkeys(chosen))


# ---- results --------------------------------------------------------------------------------

@dataclass
class Figure:
    """One codec on one image: status "ok", "skipped" or "failed" (with the reason);
    when ok, its bytes and seconds to encode and decode. rowcast's figure also has the
    model's cross-entropy, the extras' bytes and the payload's method."""

    codec: str
    status: str
    reason: str = ""
    bytes: int | None = None
    encode_s: float | None = None
    decode_s: float | None = None
    cross_entropy_bits: float | None = None
    extras_bytes: int | None = None
    method: str | None = None


@dataclass
class Measured:
    """One image and every codec's figure on it."""

    path: str
    format: str
    width: int
    height: int
    figures: dict[str, Figure] = field(default_factory=dict)

    @property
    def pixels(self) -> int:
        return self.width * self.height

    @property
    def subpixels(self) -> int:
        return self.pixels * pixel_format(self.format).planes


def _rate(pixels: int, seconds: float | None) -> float | None:
    """Megapixels per second, None when not measured or too fast to time."""
    return pixels / seconds / 1e6 if seconds else None


def figure_row(m: Measured, f: Figure) -> dict:
    """Every field of one figure, with its derived rates, as plain data."""
    row = {"path": m.path, "format": m.format, "width": m.width, "height": m.height,
           "pixels": m.pixels, "subpixels": m.subpixels, **asdict(f),
           "bits_per_subpixel": None, "encode_mps": None, "decode_mps": None,
           "payload_to_cross_entropy": None}
    if f.status == "ok":
        row["bits_per_subpixel"] = 8.0 * f.bytes / m.subpixels
        row["encode_mps"] = _rate(m.pixels, f.encode_s)
        row["decode_mps"] = _rate(m.pixels, f.decode_s)
        if f.cross_entropy_bits:
            row["payload_to_cross_entropy"] = (8.0 * (f.bytes - f.extras_bytes)
                                               / f.cross_entropy_bits)
    return row


def totals(measured: Sequence[Measured], codecs: Sequence[str]) -> dict[str, dict]:
    """Per codec, over the images it coded: images, bytes, subpixels, bits per subpixel,
    encode and decode MP/s (all pixels over all seconds), and how many it skipped or
    failed; rowcast's also its cross-entropy and the payloads' ratio to it."""
    out = {}
    for name in codecs:
        figs = [(m, m.figures[name]) for m in measured if name in m.figures]
        ok = [(m, f) for m, f in figs if f.status == "ok"]
        size = sum(f.bytes for _, f in ok)
        subpixels = sum(m.subpixels for m, _ in ok)
        pixels = sum(m.pixels for m, _ in ok)
        row = {"codec": name, "images": len(ok), "bytes": size, "subpixels": subpixels,
               "pixels": pixels,
               "bits_per_subpixel": 8.0 * size / subpixels if subpixels else None,
               "encode_s": sum(f.encode_s for _, f in ok),
               "decode_s": sum(f.decode_s for _, f in ok),
               "skipped": sum(f.status == "skipped" for _, f in figs),
               "failed": sum(f.status == "failed" for _, f in figs)}
        row["encode_mps"] = _rate(pixels, row["encode_s"])
        row["decode_mps"] = _rate(pixels, row["decode_s"])
        if name == ROWCAST:
            bits = sum(f.cross_entropy_bits for _, f in ok)
            payload = sum(f.bytes - f.extras_bytes for _, f in ok)
            row["cross_entropy_bits"] = bits
            row["extras_bytes"] = size - payload
            row["payload_to_cross_entropy"] = 8.0 * payload / bits if bits else None
        out[name] = row
    return out


def best_baseline(m: Measured) -> Figure | None:
    """The baseline with the fewest bytes on this image, of those that coded it."""
    ok = [f for name, f in m.figures.items() if name != ROWCAST and f.status == "ok"]
    return min(ok, key=lambda f: f.bytes, default=None)


# ---- measuring ------------------------------------------------------------------------------

def _timed(fn: Callable, *args):
    start = time.perf_counter()
    value = fn(*args)
    return value, time.perf_counter() - start


def measure_baseline(baseline: Baseline, picture: Picture) -> Figure:
    """One baseline on one picture: skipped when it cannot hold the format, failed when it
    raises or its decoded values are not the picture's, else its bytes and times."""
    if not baseline.available:
        return Figure(baseline.name, "skipped", "not in this installation")
    fmt = picture.pixel_format
    if fmt.name not in baseline.keeps:
        return Figure(baseline.name, "skipped", f"cannot hold {fmt.name} ({fmt.about})")
    try:
        data, enc = _timed(baseline.encode, picture)
        decoded, dec = _timed(baseline.decode, data, picture)
    except Exception as exc:  # each library raises its own classes
        return Figure(baseline.name, "failed", f"{exc.__class__.__name__}: {exc}")
    wrong = same_pixels(picture, decoded)
    if wrong:
        return Figure(baseline.name, "failed", f"round trip: {wrong}")
    return Figure(baseline.name, "ok", bytes=len(data), encode_s=enc, decode_s=dec)


def as_compressed(name: str, picture: Picture) -> Picture:
    """The picture as `rowcast.api.compress` would store it (its container may become PNG)."""
    plan = imagefile.restored(name, picture)
    return picture if plan is None else plan[1]


def measure_rowcast(engine: Engine, picture: Picture) -> Figure:
    """rowcast on one picture, alone: the entry's bytes (payload and packed extras), the
    model's cross-entropy, and the decoded values compared with the picture's."""
    extras = len(pack_picture_extras(picture))
    (coded,), enc = _timed(encode_pictures, engine, [picture])
    want = Wanted(picture.pixel_format, picture.width, picture.height, coded.method,
                  coded.payload)
    (values,), dec = _timed(decode_values, engine, [want])
    figure = Figure(ROWCAST, "ok", bytes=len(coded.payload) + extras, encode_s=enc,
                    decode_s=dec, cross_entropy_bits=coded.cross_entropy,
                    extras_bytes=extras, method=coded.method)
    if not isinstance(values, np.ndarray):
        return Figure(ROWCAST, "failed", f"does not decode: {values}")
    wrong = same_pixels(picture, _decoded(values, _palette_of(picture)))
    return Figure(ROWCAST, "failed", f"round trip: {wrong}") if wrong else figure


def measure_picture(engine: Engine, name: str, picture: Picture,
                    baselines: Sequence[Baseline]) -> Measured:
    """rowcast and every baseline on one picture."""
    picture = as_compressed(name, picture)
    m = Measured(name, picture.format, picture.width, picture.height)
    m.figures[ROWCAST] = measure_rowcast(engine, picture)
    for b in baselines:
        m.figures[b.name] = measure_baseline(b, picture)
    return m


def load_engine(model: Path | None) -> Engine:
    """The engine of a model file or bundled model name (None: the default); UsageError
    naming the file when it does not load."""
    try:
        return Engine(load_model(model))
    except ModelError as exc:
        raise UsageError(str(exc)) from None


def read_image(path: Path) -> Picture:
    """The picture in an image file; DataError naming the file and the reason."""
    try:
        return imagefile.read_picture(path)
    except imagefile.ImageError as exc:
        raise DataError(str(exc)) from None


def measure_all(engine: Engine, pictures: Iterable[tuple[str, Picture]],
                baselines: Sequence[Baseline],
                progress: Callable[[int], None] | None = None) -> list[Measured]:
    """`measure_picture` of each (name, picture), in order, after coding a small picture
    once untimed (the coder builds its tables on first use)."""
    measure_rowcast(engine, Picture(np.zeros((3, 4, 4), np.uint8), "RGB"))
    out = []
    for name, picture in pictures:
        out.append(measure_picture(engine, name, picture, baselines))
        if progress:
            progress(1)
    return out


# ---- reports --------------------------------------------------------------------------------

def report(measured: Sequence[Measured], baselines: Sequence[Baseline], model: str) -> dict:
    """Everything as plain data: the codecs, every figure of every image, and the totals."""
    names = [ROWCAST, *(b.name for b in baselines)]
    return {"model": model,
            "codecs": [{"name": ROWCAST, "about": f"rowcast, model {model}", "keeps": "all",
                        "available": True}]
            + [{"name": b.name, "about": b.about, "keeps": list(b.keeps),
                "available": b.available} for b in baselines],
            "images": [{"path": m.path, "format": m.format, "width": m.width,
                        "height": m.height, "pixels": m.pixels, "subpixels": m.subpixels,
                        "figures": {n: figure_row(m, f) for n, f in m.figures.items()}}
                       for m in measured],
            "total": totals(measured, names)}


CSV_FIELDS = ("path", "format", "width", "height", "pixels", "subpixels", "codec", "status",
              "reason", "bytes", "bits_per_subpixel", "encode_s", "decode_s", "encode_mps",
              "decode_mps", "cross_entropy_bits", "extras_bytes", "method",
              "payload_to_cross_entropy")


def csv_text(measured: Sequence[Measured]) -> str:
    """One row per image and codec (`CSV_FIELDS`); empty cells where a figure has none."""
    buffer = io.StringIO()
    writer = csv.DictWriter(buffer, CSV_FIELDS, lineterminator="\n")
    writer.writeheader()
    for m in measured:
        for f in m.figures.values():
            row = figure_row(m, f)
            writer.writerow({k: "" if row[k] is None else row[k] for k in CSV_FIELDS})
    return buffer.getvalue()


PLOT_SIZE = (11.0, 4.5)  # inches
PLOT_DPI = 100


def plot_png(data: dict) -> bytes:
    """A PNG of `PLOT_SIZE` x `PLOT_DPI` pixels: bits per subpixel of each codec over the
    images it coded (bars), and per image rowcast against the best baseline (scatter).
    Needs matplotlib."""
    import matplotlib

    matplotlib.use("Agg")
    from matplotlib.figure import Figure as Plot

    plot = Plot(figsize=PLOT_SIZE, dpi=PLOT_DPI, layout="constrained")
    bars, scatter = plot.subplots(1, 2)
    rows = [r for r in data["total"].values() if r["bits_per_subpixel"] is not None]
    names = [f"{r['codec']}\n({r['images']})" for r in rows]
    heights = [r["bits_per_subpixel"] for r in rows]
    bars.bar(names, heights, color=["tab:red" if r["codec"] == ROWCAST else "tab:gray"
                                    for r in rows])
    for x, h in enumerate(heights):
        bars.annotate(f"{h:.2f}", (x, h), ha="center", va="bottom", fontsize=8)
    bars.set_ylabel("bits per subpixel")
    bars.set_title("all images each codec coded (count under its name)")
    points = []
    for image in data["images"]:
        figs = image["figures"]
        ours = figs.get(ROWCAST, {})
        others = [f for n, f in figs.items() if n != ROWCAST and f["status"] == "ok"]
        if ours.get("status") == "ok" and others:
            best = min(others, key=lambda f: f["bytes"])
            points.append((best["bits_per_subpixel"], ours["bits_per_subpixel"]))
    if points:
        xs, ys = zip(*points, strict=True)
        scatter.scatter(xs, ys, s=14, color="tab:red")
        top = max(max(xs), max(ys)) * 1.05
        scatter.plot([0, top], [0, top], color="black", linewidth=0.8)
        scatter.set_xlim(0, top)
        scatter.set_ylim(0, top)
    scatter.set_xlabel("best baseline, bits per subpixel")
    scatter.set_ylabel("rowcast, bits per subpixel")
    scatter.set_title("per image (below the line: rowcast smaller)")
    buffer = io.BytesIO()
    plot.savefig(buffer, format="png", dpi=PLOT_DPI)
    return buffer.getvalue()


def write_atomic(path: Path, data: bytes) -> None:
    """Write through a temporary file beside `path`, then rename over it."""
    temp = path.with_name(f".{path.name}.partial")
    try:
        temp.write_bytes(data)
        temp.replace(path)
    finally:
        temp.unlink(missing_ok=True)
