"""The headline table: rowcast against conventional lossless codecs on held-out photos.

Thumbnails (`rowcast.heldout`) of scikit-image's RGB and gray photographs at each size are
measured with `rowcast.measure` in this one process: every baseline's file decoded and
compared value for value, rowcast's bytes being the archive entry `rowcast compress`
writes. Writes HEADLINE.md, headline.json and headline.png into --out (default: this
folder). Needs scikit-image and matplotlib.

  python benchmarks/headline.py [--sizes 32,64,128] [--model MODEL] [--codecs LIST]
                                [--out DIR] [--sci-every 8]

With the shared corpus beside the project, every 8th 16-bit scientific thumbnail of
../shared/corpus/thumbs/sci is measured too (the codecs that keep 16 bits).
"""

from __future__ import annotations

import argparse
import json
import platform
import time
from pathlib import Path

from rowcast import measure, workers
from rowcast.heldout import GRAY_PHOTOS, RGB_PHOTOS, thumbnails
from rowcast.picture import Picture

HERE = Path(__file__).resolve().parent
SETS = (("RGB", RGB_PHOTOS), ("L", GRAY_PHOTOS))
SCI = HERE.parent.parent / "shared" / "corpus" / "thumbs" / "sci"  # never used in training


def sixteen_bit(every: int) -> list[tuple[str, Picture]]:
    """Every `every`-th 16-bit gray thumbnail of the shared corpus's scientific images, in
    sorted order (none when the corpus is not there)."""
    if not every or not SCI.is_dir():
        return []
    chosen = []
    for path in sorted(SCI.rglob("*.png")):
        picture = measure.read_image(path)
        if picture.format == "L16":
            chosen.append((path.relative_to(SCI).as_posix(), picture))
    return chosen[::every]


def pictures(size: int, mode: str, names: tuple[str, ...]) -> list[tuple[str, Picture]]:
    """(name, picture) of each photo's thumbnail at this size."""
    return [(f"{name}-{size}", Picture(planes, mode))
            for name, planes in thumbnails(names, mode, size)]


def cell(value: float | None, digits: int = 3) -> str:
    return "-" if value is None else f"{value:.{digits}f}"


def markdown(groups: list[dict], everything: dict, codecs: list[str], seconds: float) -> str:
    """The tables: bits per subpixel of each codec per set and size, then speeds."""
    head = "| set | size | images | " + " | ".join(codecs) + " |"
    rule = "|---|---:|---:|" + "---:|" * len(codecs)
    lines = ["# Headline: rowcast and conventional lossless codecs", "",
             f"Model `{everything['model']}`; {platform.machine()}, "
             f"{workers.threads()} threads; measured in {seconds:.0f} s by "
             "`python benchmarks/headline.py`.", "",
             "Held-out thumbnails of scikit-image's photographs (`rowcast.heldout`). Every "
             "figure is a verified round trip: each baseline's file was decoded and compared "
             "value for value. rowcast: the archive entry as `rowcast compress` writes it. "
             "Baselines: " + "; ".join(f"{c['name']}: {c['about']}"
                                       for c in everything["codecs"][1:]) + ".", "",
             "## Bits per subpixel (lower is better)", "", head, rule]
    for g in groups:
        lines.append(f"| {g['set']} | {g['size']} | {g['images']} | " + " | ".join(
            cell(g["total"][c]["bits_per_subpixel"]) for c in codecs) + " |")
    lines.append("| all (each codec: the images it keeps) | | "
                 + str(len(everything["images"])) + " | " + " | ".join(
        cell(everything["total"][c]["bits_per_subpixel"]) for c in codecs) + " |")
    lines += ["", "## Speed, megapixels per second, one image per call (encode / decode)", "",
              head, rule]
    for g in groups:
        lines.append(f"| {g['set']} | {g['size']} | {g['images']} | " + " | ".join(
            f"{cell(g['total'][c]['encode_mps'], 2)} / {cell(g['total'][c]['decode_mps'], 2)}"
            for c in codecs) + " |")
    ours = everything["total"][measure.ROWCAST]
    lines += ["", f"rowcast's payloads are {ours['payload_to_cross_entropy']:.4f} times the "
              "model's cross-entropy. Failed round trips: " + (", ".join(
                  f"{c} {everything['total'][c]['failed']}" for c in codecs
                  if everything["total"][c]["failed"]) or "none") + ".", ""]
    return "\n".join(lines)


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--sizes", default="32,64,128", help="thumbnail sides, comma list")
    parser.add_argument("--model", type=Path, default=None, help="model (default: bundled)")
    parser.add_argument("--codecs", default=None, help="baselines, comma list (default: all)")
    parser.add_argument("--out", type=Path, default=HERE, help="folder to write into")
    parser.add_argument("--sci-every", type=int, default=8,
                        help="every n-th 16-bit scientific thumbnail (0: none)")
    args = parser.parse_args()
    baselines = measure.choose(args.codecs)
    codecs = [measure.ROWCAST, *(b.name for b in baselines)]
    engine = measure.load_engine(args.model)
    start = time.perf_counter()
    groups, everything = [], []
    for size in (int(s) for s in args.sizes.split(",")):
        for mode, names in SETS:
            measured = measure.measure_all(engine, pictures(size, mode, names), baselines)
            everything += measured
            groups.append({"set": mode, "size": size, "images": len(measured),
                           "total": measure.totals(measured, codecs)})
            print(f"{mode} {size}: " + ", ".join(
                f"{c} {cell(groups[-1]['total'][c]['bits_per_subpixel'])}" for c in codecs),
                flush=True)
    deep = sixteen_bit(args.sci_every)
    if deep:
        measured = measure.measure_all(engine, deep, baselines)
        everything += measured
        groups.append({"set": "L16 (sci)", "size": "18-256", "images": len(measured),
                       "total": measure.totals(measured, codecs)})
        print("L16: " + ", ".join(
            f"{c} {cell(groups[-1]['total'][c]['bits_per_subpixel'])}" for c in codecs),
            flush=True)
    seconds = time.perf_counter() - start
    data = measure.report(everything, baselines, engine.model.name)
    data["groups"] = groups
    data["seconds"] = seconds
    args.out.mkdir(parents=True, exist_ok=True)
    measure.write_atomic(args.out / "headline.json", json.dumps(data, indent=1).encode())
    measure.write_atomic(args.out / "headline.png", measure.plot_png(data))
    measure.write_atomic(args.out / "HEADLINE.md",
                         markdown(groups, data, codecs, seconds).encode())
    print(f"wrote {args.out / 'HEADLINE.md'}, headline.json, headline.png in {seconds:.0f} s")


if __name__ == "__main__":
    main()
