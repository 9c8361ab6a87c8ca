"""Coding the colour channels together: rowcast's two bases against JPEG XL on the retina
tiles that JPEG XL codes smaller (benchmarks/ADAPT.md), on the held-out photo thumbnails,
and on those thumbnails passed through Pillow's JPEG (quality 90, 4:2:0), as a camera's JPEG
thumbnails are.

    python benchmarks/colour.py

For each set:

* each codec's bytes with the three channels coded as one RGB image and as three gray
  images: what coding them together gains;
* the zeroth-order entropy of the residuals against the family's base prediction (the
  median predictor on each channel) and against the colour-difference base
  (`family.difference_base`: G predicted as R plus the median predictor on G - R, B as G
  plus the median predictor on B - G);
* the payloads of rowcast 0.11-0.13's default (a model of the median base) on its base
  alone, on the colour-difference base alone without its network's colour terms (method
  "difference"), as its encoder chooses per image, and the shorter of each image's two
  (the best a choice could do);
* the payloads of the default, whose network was trained to correct the colour-difference
  base (what `rowcast compress` writes).

Prints the figures and writes benchmarks/COLOUR.md and benchmarks/colour.json.
"""

from __future__ import annotations

import io
import json
from datetime import date
from pathlib import Path

import imagecodecs
import numpy as np
import typer
from adapt import tiles
from PIL import Image

import rowcast
from rowcast import codec, workers
from rowcast import family as fam
from rowcast.heldout import RGB_PHOTOS, thumbnails
from rowcast.predictor import Engine
from rowcast.quantize import load_model

HERE = Path(__file__).parent
MEDIAN = "default-2232214be5c6b626"  # the bundled default of rowcast 0.11-0.13


def entropy(residuals: np.ndarray) -> float:
    """Zeroth-order entropy of integer residuals, bits each."""
    p = np.bincount(residuals.ravel() + 255) / residuals.size
    return float(-(p[p > 0] * np.log2(p[p > 0])).sum())


def payloads(engine: Engine, images: list[np.ndarray], base: str) -> tuple[np.ndarray, int]:
    """(each image's payload bytes on `base` (`codec.encode_batch`), how many are coded on
    the colour-difference base)."""
    coded = codec.encode_batch(engine, images, base=base)
    return (np.array([len(c.payload) for c in coded]),
            sum(c.method == "difference" for c in coded))


def through_jpeg(images: list[np.ndarray]) -> list[np.ndarray]:
    """Each image through Pillow's JPEG encoder and decoder (quality 90, 4:2:0)."""
    out = []
    for im in images:
        buffer = io.BytesIO()
        Image.fromarray(im.transpose(1, 2, 0)).save(buffer, "JPEG", quality=90)
        out.append(np.ascontiguousarray(np.asarray(Image.open(buffer)).transpose(2, 0, 1)))
    return out


def measure(engine: Engine, trained: Engine, name: str, images: list[np.ndarray]) -> dict:
    """One set's figures; images (3, H, W) uint8; `engine` a model of the median base,
    `trained` the default, whose network corrects the colour-difference base."""
    hwc = [np.ascontiguousarray(im.transpose(1, 2, 0)) for im in images]
    jxl = {"joint": sum(len(imagecodecs.jpegxl_encode(t, lossless=True, effort=9))
                        for t in hwc),
           "apart": sum(len(imagecodecs.jpegxl_encode(np.ascontiguousarray(t[..., c]),
                                                      lossless=True, effort=9))
                        for t in hwc for c in range(3))}
    plain, _ = payloads(engine, images, "plain")
    difference, _ = payloads(engine, images, "difference")
    either, chosen = payloads(engine, images, "either")
    ours = {"joint": int(plain.sum()),
            "apart": int(sum(len(c.payload) for c in codec.encode_batch(
                engine, [im[c : c + 1].copy() for im in images for c in range(3)])))}
    x = [im.astype(np.int64) for im in images]
    entropies = {kind: [entropy(np.concatenate([(im[c] - base(im)[c]).ravel() for im in x]))
                        for c in range(3)]
                 for kind, base in (("plain", fam.base_prediction),
                                    ("difference", fam.difference_base))}
    return {"set": name, "images": len(images), "subpixels": int(sum(im.size for im in images)),
            "rowcast": ours, "jxl9": jxl, "entropy_bits": entropies,
            "difference_base_payloads": int(difference.sum()),
            "chosen_payloads": int(either.sum()), "chosen_difference": chosen,
            "shorter_of_both": int(np.minimum(plain, difference).sum()),
            "default_payloads": int(payloads(trained, images, "either")[0].sum())}


def main() -> None:
    """Both sets: print the table, write COLOUR.md and colour.json."""
    workers.set_threads(1)
    engine, trained = Engine(load_model(MEDIAN)), Engine(load_model())
    photos = [p for _, p in thumbnails(RGB_PHOTOS, "RGB", crops=4)]
    sets = {"retina tiles": [np.ascontiguousarray(t.transpose(2, 0, 1))
                             for t in tiles("retina")],
            "photo thumbnails": photos, "photo thumbnails through JPEG": through_jpeg(photos)}
    rows = [measure(engine, trained, name, images) for name, images in sets.items()]
    result = {"date": date.today().isoformat(), "rowcast": rowcast.__version__,
              "median_model": MEDIAN, "default": trained.model.sha256.hex()[:16],
              "sets": rows}
    (HERE / "colour.json").write_text(json.dumps(result, indent=1) + "\n")
    lines = [f"# Coding the colour channels together ({result['date']}, rowcast "
             f"{result['rowcast']})", "",
             "`python benchmarks/colour.py`: the 484 64-px retina tiles of benchmarks/ADAPT.md, "
             "the 32 held-out RGB photo thumbnails, and those thumbnails through Pillow's JPEG "
             "(quality 90, 4:2:0). Bytes of every image coded as RGB (joint) and as three gray "
             "images (apart); the residuals' zeroth-order entropy (bits, R G B) against the "
             "median predictor on each channel (plain) and against the colour-difference base "
             "(G from R plus the median on G - R, B from G plus the median on B - G); "
             f"the payloads of `{MEDIAN}` (rowcast 0.11-0.13's default, median base) on its "
             "base, on the colour-difference base without its network's colour terms (method "
             "`difference`), as its encoder chooses per image (how many took the difference "
             "base) and the shorter of each image's two; and the payloads of the default "
             f"(`{result['default']}`), whose network corrects the colour-difference base. "
             "Ratios are to the first.", "",
             "| set | median model | apart | JPEG XL e9 joint | apart | entropy plain | "
             "entropy difference | difference base | encoder's choice | shorter of both | "
             "default |",
             "|---|---:|---:|---:|---:|---|---|---:|---:|---:|---:|"]
    for r in rows:
        plain, diff = (" ".join(f"{v:.2f}" for v in r["entropy_bits"][k])
                       for k in ("plain", "difference"))
        base = r["rowcast"]["joint"]
        lines.append(f"| {r['set']} | {base} | {r['rowcast']['apart']} | "
                     f"{r['jxl9']['joint']} | {r['jxl9']['apart']} | {plain} | {diff} | "
                     f"{r['difference_base_payloads']} "
                     f"({r['difference_base_payloads'] / base:.3f}) | "
                     f"{r['chosen_payloads']} ({r['chosen_payloads'] / base:.3f}; "
                     f"{r['chosen_difference']} of {r['images']}) | {r['shorter_of_both']} "
                     f"({r['shorter_of_both'] / base:.3f}) | {r['default_payloads']} "
                     f"({r['default_payloads'] / base:.3f}) |")
    (HERE / "COLOUR.md").write_text("\n".join(lines) + "\n")
    print("\n".join(lines))


if __name__ == "__main__":
    typer.run(main)
