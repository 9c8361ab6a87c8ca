"""Network designs side by side: held-out bits against decoding cost.

    python benchmarks/designs.py MODEL... [--threads 2]

For each model file (or bundled model name): its multiply-adds per pixel, the bits per
subpixel of its payloads on the held-out 64-px thumbnails of scikit-image's photographs
(32 RGB, 6 gray; never trained on), the validation figure its card records (the corpus's
validation tiles, integer model), and encode and decode speed on the 32 RGB thumbnails in
this process, the models interleaved so that they share the machine's state. Every
decode is checked. Prints the figures and writes benchmarks/DESIGNS.md and
benchmarks/designs.json.
"""

from __future__ import annotations

import json
import time
from datetime import date
from pathlib import Path

import numpy as np
import typer

import rowcast
from rowcast import codec, workers
from rowcast.heldout import GRAY_PHOTOS, RGB_PHOTOS, thumbnails
from rowcast.predictor import Engine
from rowcast.quantize import load_model

HERE = Path(__file__).parent
ROUNDS = 3  # timing rounds; the best of each is reported


def bits(engine: Engine, images: list[np.ndarray]) -> float:
    """Bits per subpixel of the images' payloads (as an archive codes them)."""
    coded = codec.encode_batch(engine, images)
    return 8.0 * sum(len(c.payload) for c in coded) / sum(im.size for im in images)


def timed(engine: Engine, images: list[np.ndarray]) -> tuple[float, float]:
    """(encode, decode) seconds of the images, the decode checked."""
    start = time.perf_counter()
    coded = codec.encode_batch(engine, images)
    encode = time.perf_counter() - start
    start = time.perf_counter()
    out = codec.decode_batch(engine, [c.payload for c in coded], *images[0].shape,
                             methods=[c.method for c in coded])
    decode = time.perf_counter() - start
    assert np.array_equal(out, np.stack(images))
    return encode, decode


def main(models: list[str], threads: int = 2) -> None:
    """Measure every model; write DESIGNS.md and designs.json."""
    workers.set_threads(threads)
    rgb = [p for _, p in thumbnails(RGB_PHOTOS, "RGB", 64, crops=4)]
    gray = [p for _, p in thumbnails(GRAY_PHOTOS, "L", 64)]
    engines = {name: Engine(load_model(None if name == "default" else Path(name)))
               for name in models}
    rows = {}
    for name, engine in engines.items():
        card = engine.model.card
        rows[name] = {"model": engine.model.name, "sha256": engine.model.sha256.hex()[:16],
                      "architecture": card["architecture"],
                      "macs_per_pixel": int(sum(layer.weight.size
                                                for layer in engine.model.layers)),
                      "val_integer_bpsp": card.get("training", {}).get("val_integer_bpsp"),
                      "rgb_bpsp": bits(engine, rgb), "gray_bpsp": bits(engine, gray),
                      "encode_s": [], "decode_s": []}
        timed(engine, rgb[:2])  # load every table and kernel before timing
    for _ in range(ROUNDS):
        for name, engine in engines.items():
            enc, dec = timed(engine, rgb)
            rows[name]["encode_s"].append(enc)
            rows[name]["decode_s"].append(dec)
    megapixels = sum(im.shape[1] * im.shape[2] for im in rgb) / 1e6
    for row in rows.values():
        row["encode_mps"] = megapixels / min(row.pop("encode_s"))
        row["decode_mps"] = megapixels / min(row.pop("decode_s"))
    figures = {"date": date.today().isoformat(), "rowcast": rowcast.__version__,
               "threads": threads, "rgb_images": len(rgb), "gray_images": len(gray),
               "models": rows}
    (HERE / "designs.json").write_text(json.dumps(figures, indent=1) + "\n")
    text = report(figures)
    (HERE / "DESIGNS.md").write_text(text)
    print(text)


def report(f: dict) -> str:
    lines = [
        "# Network designs: held-out bits against decoding cost",
        "",
        f"`python benchmarks/designs.py` on {f['date']}, rowcast {f['rowcast']}, "
        f"{f['threads']} threads. Bits per subpixel of the payloads on {f['rgb_images']} RGB "
        f"and {f['gray_images']} gray 64-px thumbnails of scikit-image's photographs (never "
        "trained on); validation: the figure the model's card records (integer model, the "
        "corpus's validation tiles); speed: the RGB thumbnails in one process, best of "
        f"{ROUNDS} interleaved rounds.",
        "",
        "| model | hidden | multiply-adds / pixel | RGB bpsp | gray bpsp | validation bpsp | "
        "encode MP/s | decode MP/s |",
        "|---|---:|---:|---:|---:|---:|---:|---:|",
    ]
    for name, r in f["models"].items():
        val = r["val_integer_bpsp"]
        lines.append(f"| {name} (`{r['sha256']}`) | {r['architecture']['hidden']} | "
                     f"{r['macs_per_pixel']:,} | {r['rgb_bpsp']:.4f} | {r['gray_bpsp']:.4f} | "
                     f"{'-' if val is None else f'{val:.4f}'} | {r['encode_mps']:.3f} | "
                     f"{r['decode_mps']:.3f} |")
    return "\n".join(lines) + "\n"


if __name__ == "__main__":
    typer.run(main)
