"""Sizes of the pixel formats beyond 8-bit gray and RGB, against the codecs that keep them.

    python benchmarks/formats.py [--model FILE] [--sci N]

Sets, each written as files and compressed by `rowcast.compress` as a user would:
- RGBA: the 32 held-out 64-px RGB thumbnails (scikit-image's photos) under a soft
  cut-out mask (alpha 0 outside an ellipse, 255 inside, a graded rim), and 64-px
  thumbnails of scikit-image's two RGBA images (horse, logo);
- palette: the same 32 thumbnails quantised to 16 and to 256 colours (Pillow's median
  cut), one index transparent;
- 16-bit gray: the 16-bit thumbnails of ../shared/corpus/thumbs/sci (none was used to train
  the bundled model), the first N in sorted order (all by default).
rowcast's figure is each entry's payload plus its extras (palette, transparency, the
container name); PNG's is the file Pillow (or imagecodecs, for 16 bits) writes at zlib's
highest effort. JPEG-LS and JPEG XL (effort 9) are measured on the 16-bit set, each checked
to decode exactly. Prints the tables and writes benchmarks/FORMATS.md and formats.json.
"""

from __future__ import annotations

import io
import json
import sys
import tempfile
import time
from datetime import date
from pathlib import Path

import imagecodecs
import numpy as np
import typer
from PIL import Image

import rowcast
from rowcast.heldout import RGB_PHOTOS, data_dir, thumbnails

HERE = Path(__file__).parent
SCI = HERE.parent.parent / "shared" / "corpus" / "thumbs" / "sci"


def cutout_mask(size: int) -> np.ndarray:
    """Alpha of a centred ellipse with a graded rim, as a cut-out's mask."""
    y, x = np.mgrid[0:size, 0:size] + 0.5
    r = np.hypot((x - size / 2) / (0.42 * size), (y - size / 2) / (0.34 * size))
    return np.clip((1.0 - r) * 6.0 * 255, 0, 255).astype(np.uint8)


def rgba_images() -> dict[str, Image.Image]:
    images = {}
    mask = cutout_mask(64)
    for name, planes in thumbnails(RGB_PHOTOS, "RGB", 64, crops=4):
        rgba = np.concatenate([planes.transpose(1, 2, 0), mask[..., None]], axis=2)
        images[f"{name}-cutout.png"] = Image.fromarray(rgba, "RGBA")
    for name in ("horse.png", "logo.png"):
        with Image.open(data_dir() / name) as im:
            side = min(im.size)
            box = ((im.width - side) // 2, (im.height - side) // 2)
            square = im.crop((*box, box[0] + side, box[1] + side))
            images[name] = square.resize((64, 64), Image.Resampling.BOX).convert("RGBA")
    return images


def palette_images(colours: int) -> dict[str, Image.Image]:
    images = {}
    for name, planes in thumbnails(RGB_PHOTOS, "RGB", 64, crops=4):
        rgb = Image.fromarray(np.ascontiguousarray(planes.transpose(1, 2, 0)), "RGB")
        images[f"{name}-p{colours}.png"] = rgb.quantize(colours, Image.Quantize.MEDIANCUT)
    return images


def png_bytes(image: Image.Image) -> bytes:
    buffer = io.BytesIO()
    save = {"transparency": 0} if image.mode == "P" else {}
    image.save(buffer, "PNG", optimize=True, compress_level=9, **save)
    return buffer.getvalue()


def ours(folder: Path, model: Path | None, tmp: Path) -> tuple[dict[str, int], float, dict]:
    """Per file, the bytes rowcast spends on it (payload and extras); the seconds taken;
    the methods chosen."""
    start = time.perf_counter()
    summary = rowcast.compress([folder], tmp / f"{folder.name}.rowcast", model=model,
                               force=True)
    seconds = time.perf_counter() - start
    if not rowcast.verify(summary.archive, against=folder, model=model).ok:
        raise SystemExit(f"{folder}: rowcast round trip failed: benchmark invalid")
    methods: dict[str, int] = {}
    for e in summary.entries:
        label = "+".join(e["parts"]) if e["method"] == "coded" else e["method"]
        methods[label] = methods.get(label, 0) + 1
    return {e["path"]: e["bytes"] for e in summary.entries}, seconds, methods


def measure_set(name: str, images: dict[str, Image.Image], model: Path | None,
                tmp: Path) -> dict:
    folder = tmp / name
    folder.mkdir()
    png = {}
    for file, image in images.items():
        data = png_bytes(image)
        (folder / file).write_bytes(data)
        png[file] = len(data)
    sizes, seconds, methods = ours(folder, model, tmp)
    subpixels = sum(im.width * im.height * len(im.getbands()) for im in images.values())
    return {"images": len(images), "subpixels": subpixels, "seconds": seconds,
            "methods": methods,
            "rowcast_bpsp": 8.0 * sum(sizes.values()) / subpixels,
            "png_bpsp": 8.0 * sum(png.values()) / subpixels,
            "worse_than_png": sorted(f for f in images if sizes[f] > png[f])}


def sixteen_bit(model: Path | None, tmp: Path, count: int | None) -> dict:
    files = sorted(p for p in SCI.rglob("*.png")
                   if imagecodecs.png_decode(p.read_bytes()).dtype == np.uint16)[:count]
    folder = tmp / "sci16"
    folder.mkdir()
    values, png = {}, {}
    for i, path in enumerate(files):
        array = imagecodecs.png_decode(path.read_bytes())
        name = f"{i:04d}.png"
        data = bytes(imagecodecs.png_encode(array, level=9))
        (folder / name).write_bytes(data)
        values[name], png[name] = array, len(data)
    sizes, seconds, methods = ours(folder, model, tmp)
    subpixels = sum(a.size for a in values.values())
    figures = {"images": len(files), "subpixels": subpixels, "seconds": seconds,
               "methods": methods,
               "rowcast_bpsp": 8.0 * sum(sizes.values()) / subpixels,
               "png_bpsp": 8.0 * sum(png.values()) / subpixels}
    for label, encode, decode in (
        ("jpegls_bpsp", lambda a: imagecodecs.jpegls_encode(a, level=0),
         imagecodecs.jpegls_decode),
        ("jpegxl_e9_bpsp", lambda a: imagecodecs.jpegxl_encode(a, lossless=True, effort=9),
         imagecodecs.jpegxl_decode)):
        total = 0
        for array in values.values():
            data = encode(array)
            if not np.array_equal(np.asarray(decode(data)).reshape(array.shape), array):
                raise SystemExit(f"{label}: not lossless: benchmark invalid")
            total += len(data)
        figures[label] = 8.0 * total / subpixels
    return figures


def main(model: Path | None = None, sci: int | None = None) -> None:
    """Run every set, print the tables, write FORMATS.md and formats.json."""
    with tempfile.TemporaryDirectory() as tmp:
        tmp = Path(tmp)
        sets = {"RGBA": measure_set("rgba", rgba_images(), model, tmp),
                "P, 16 colours": measure_set("p16", palette_images(16), model, tmp),
                "P, 256 colours": measure_set("p256", palette_images(256), model, tmp)}
        deep = sixteen_bit(model, tmp, sci)
    results = {"date": date.today().isoformat(),
               "command": "python benchmarks/formats.py " + " ".join(sys.argv[1:]),
               "sets": sets, "sixteen_bit_gray": deep}
    (HERE / "formats.json").write_text(json.dumps(results, indent=2) + "\n")
    (HERE / "FORMATS.md").write_text(render(results))
    print(render(results))


def render(r: dict) -> str:
    lines = ["# Pixel formats beyond 8-bit gray and RGB", "",
             f"Produced by `{r['command'].strip()}` on {r['date']}. Bits per subpixel; "
             "rowcast's figures include each entry's extras (palette, transparency).", "",
             "| set | images | rowcast | PNG | rowcast / PNG | images larger than their PNG "
             "| methods |", "|---|---|---|---|---|---|---|"]
    for name, s in r["sets"].items():
        methods = ", ".join(f"{k} {v}" for k, v in sorted(s["methods"].items()))
        lines.append(f"| {name} | {s['images']} | {s['rowcast_bpsp']:.3f} | "
                     f"{s['png_bpsp']:.3f} | {s['rowcast_bpsp'] / s['png_bpsp']:.3f} | "
                     f"{len(s['worse_than_png'])} | {methods} |")
    d = r["sixteen_bit_gray"]
    methods = ", ".join(f"{k} {v}" for k, v in sorted(d["methods"].items()))
    lines += ["", f"16-bit gray: {d['images']} thumbnails of ../shared/corpus/thumbs/sci "
              f"(coded in {d['seconds']:.0f} s; methods: {methods})", "",
              "| codec | bits per subpixel | / JPEG XL |", "|---|---|---|"]
    for label, key in (("**rowcast**", "rowcast_bpsp"), ("PNG (imagecodecs, level 9)", "png_bpsp"),
                       ("JPEG-LS (imagecodecs)", "jpegls_bpsp"),
                       ("JPEG XL lossless, effort 9 (imagecodecs)", "jpegxl_e9_bpsp")):
        lines.append(f"| {label} | {d[key]:.3f} | {d[key] / d['jpegxl_e9_bpsp']:.3f} |")
    return "\n".join(lines) + "\n"


if __name__ == "__main__":
    typer.run(main)
