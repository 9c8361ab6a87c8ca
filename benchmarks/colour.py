"""Where coding the colour channels together falls short: rowcast against JPEG XL on the
retina tiles that JPEG XL codes smaller (benchmarks/ADAPT.md) and on the held-out photo
thumbnails.

    python benchmarks/colour.py

For each set:

* each codec's bytes with the three channels coded as one RGB image and as three gray
  images: what coding them together gains;
* the zeroth-order entropy of the residuals against the family's base prediction (the
  median predictor on each channel) and against a colour-difference base (G predicted as
  R plus the median predictor on G - R, B as G plus the median predictor on B - G);
* an experiment, in this process only: the payloads when the encoder uses that base for G
  and B, without the network's G and B mean corrections and channel couplings (trained
  for the plain base), each image keeping the shorter of its two payloads. No archive can
  hold them: rowcast's decoder knows the plain base alone.

Prints the figures and writes benchmarks/COLOUR.md and benchmarks/colour.json.
"""

from __future__ import annotations

import json
from datetime import date
from pathlib import Path

import imagecodecs
import numpy as np
import typer
from adapt import tiles

import rowcast
from rowcast import codec, workers
from rowcast import family as fam
from rowcast.heldout import RGB_PHOTOS, thumbnails
from rowcast.predictor import Engine
from rowcast.quantize import load_model

HERE = Path(__file__).parent


def median_of(d: np.ndarray) -> np.ndarray:
    """The median predictor on a signed plane (H, W): left, above, left + above -
    above-left; the left value on the top row, the one above in the first column, 0 at the
    origin."""
    left, up, corner = np.zeros_like(d), np.zeros_like(d), np.zeros_like(d)
    left[:, 1:], up[1:, :], corner[1:, 1:] = d[:, :-1], d[:-1, :], d[:-1, :-1]
    lo, hi = np.minimum(left, up), np.maximum(left, up)
    m = np.where(corner >= hi, lo, np.where(corner <= lo, hi, left + up - corner))
    m[0, :], m[:, 0] = left[0, :], up[:, 0]
    m[0, 0] = 0
    return m


def difference_base(img: np.ndarray) -> np.ndarray:
    """The family's base for R; G as R plus the median predictor on G - R, B as G plus the
    median predictor on B - G, clamped to 0..255. (3, H, W) int64."""
    x = img.astype(np.int64)
    base = fam.base_prediction(x)
    base[1] = np.clip(x[0] + median_of(x[1] - x[0]), 0, 255)
    base[2] = np.clip(x[1] + median_of(x[2] - x[1]), 0, 255)
    return base


def entropy(residuals: np.ndarray) -> float:
    """Zeroth-order entropy of integer residuals, bits each."""
    p = np.bincount(residuals.ravel() + 255) / residuals.size
    return float(-(p[p > 0] * np.log2(p[p > 0])).sum())


def payloads(engine: Engine, images: list[np.ndarray], difference: bool) -> np.ndarray:
    """Each image's payload bytes, with the plain base or (an experiment, see the module
    docstring) the colour-difference base."""
    if not difference:
        return np.array([len(c.payload) for c in codec.encode_batch(engine, images)])
    plain_base, plain_one = codec.base_prediction, codec._encode_one

    def one(out: np.ndarray, *args, **kwargs):
        out = out.copy()
        out[..., 2] = out[..., 4] = 0  # G's and B's mean corrections
        out[..., 2 * fam.CHANNELS : fam.OUTPUTS] = 0  # the channel couplings
        return plain_one(out, *args, **kwargs)

    codec.base_prediction, codec._encode_one = difference_base, one
    try:
        return np.array([len(c.payload) for c in codec.encode_batch(engine, images,
                                                                     workers=1)])
    finally:
        codec.base_prediction, codec._encode_one = plain_base, plain_one


def measure(engine: Engine, name: str, images: list[np.ndarray]) -> dict:
    """One set's figures; images (3, H, W) uint8."""
    hwc = [np.ascontiguousarray(im.transpose(1, 2, 0)) for im in images]
    jxl = {"joint": sum(len(imagecodecs.jpegxl_encode(t, lossless=True, effort=9))
                        for t in hwc),
           "apart": sum(len(imagecodecs.jpegxl_encode(np.ascontiguousarray(t[..., c]),
                                                      lossless=True, effort=9))
                        for t in hwc for c in range(3))}
    plain = payloads(engine, images, False)
    ours = {"joint": int(plain.sum()),
            "apart": int(sum(len(c.payload) for c in codec.encode_batch(
                engine, [im[c : c + 1].copy() for im in images for c in range(3)])))}
    x = [im.astype(np.int64) for im in images]
    entropies = {kind: [entropy(np.concatenate([(im[c] - base(im)[c]).ravel() for im in x]))
                        for c in range(3)]
                 for kind, base in (("plain", fam.base_prediction),
                                    ("difference", difference_base))}
    variant = payloads(engine, images, True)
    return {"set": name, "images": len(images), "subpixels": int(sum(im.size for im in images)),
            "rowcast": ours, "jxl9": jxl, "entropy_bits": entropies,
            "difference_base_payloads": int(variant.sum()),
            "shorter_of_both": int(np.minimum(plain, variant).sum())}


def main() -> None:
    """Both sets: print the table, write COLOUR.md and colour.json."""
    workers.set_threads(1)
    engine = Engine(load_model())
    sets = {"retina tiles": [np.ascontiguousarray(t.transpose(2, 0, 1))
                             for t in tiles("retina")],
            "photo thumbnails": [p for _, p in thumbnails(RGB_PHOTOS, "RGB", crops=4)]}
    rows = [measure(engine, name, images) for name, images in sets.items()]
    result = {"date": date.today().isoformat(), "rowcast": rowcast.__version__,
              "model": engine.model.name, "sets": rows}
    (HERE / "colour.json").write_text(json.dumps(result, indent=1) + "\n")
    lines = [f"# Coding the colour channels together ({result['date']}, rowcast "
             f"{result['rowcast']})", "",
             "`python benchmarks/colour.py`: the 484 64-px retina tiles of benchmarks/ADAPT.md "
             "and the 32 held-out RGB photo thumbnails. Bytes of every image coded as RGB "
             "(joint) and as three gray images (apart); the residuals' zeroth-order entropy "
             "(bits, R G B) against the median predictor on each channel (plain) and against "
             "the colour-difference base (G from R plus the median on G - R, B from G plus "
             "the median on B - G); the payloads of an encoder given that base for G and B "
             "without the network's G and B means and couplings (an experiment: no decoder "
             "reads them), and the shorter of each image's two payloads.", "",
             "| set | rowcast joint | apart | JPEG XL e9 joint | apart | entropy plain | "
             "entropy difference | difference base | shorter of both |",
             "|---|---:|---:|---:|---:|---|---|---:|---:|"]
    for r in rows:
        plain, diff = (" ".join(f"{v:.2f}" for v in r["entropy_bits"][k])
                       for k in ("plain", "difference"))
        base = r["rowcast"]["joint"]
        lines.append(f"| {r['set']} | {base} | {r['rowcast']['apart']} | "
                     f"{r['jxl9']['joint']} | {r['jxl9']['apart']} | {plain} | {diff} | "
                     f"{r['difference_base_payloads']} | {r['shorter_of_both']} "
                     f"({r['shorter_of_both'] / base:.3f}) |")
    (HERE / "COLOUR.md").write_text("\n".join(lines) + "\n")
    print("\n".join(lines))


if __name__ == "__main__":
    typer.run(main)
