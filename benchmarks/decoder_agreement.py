"""The compiled decoder against the reference decoder on many random images.

    python benchmarks/decoder_agreement.py [--count 1000] [--seed 0]

Random images (gray or RGB, 1 to 96 px a side, smooth fields with noise of random
strength, some flat, some pure noise, some whose G and B follow R closely, which the
encoder codes on the colour-difference base) are coded with the bundled model (each image's own
tuning and feedback gains, as compress codes them) and decoded by both decoders, each
batch of same-sized images together; every pixel must agree with the other decoder and
with the image. The golden archives are decoded by both in tests/test_golden.py. Prints
the figures and writes benchmarks/decoder_agreement.json.
"""

from __future__ import annotations

import json
import time
from collections import defaultdict
from datetime import date
from pathlib import Path

import numpy as np
import typer

import rowcast
from rowcast import codec, workers
from rowcast.predictor import Engine
from rowcast.quantize import load_model

HERE = Path(__file__).parent


def random_image(rng: np.random.Generator) -> np.ndarray:
    """One image (P, H, W) uint8 of a random kind and size."""
    planes = int(rng.choice([1, 3]))
    h, w = (int(rng.integers(1, 97)) for _ in range(2))
    kind = rng.integers(0, 5)
    if kind == 0:  # flat
        return np.full((planes, h, w), rng.integers(0, 256), np.uint8)
    if kind == 1:  # noise
        return rng.integers(0, 256, (planes, h, w), dtype=np.uint8)
    y, x = np.mgrid[0:h, 0:w]
    field = np.stack([np.sin(x / rng.uniform(2, 30) + c) * np.cos(y / rng.uniform(2, 30))
                      for c in range(planes)])
    noise = rng.normal(0, rng.uniform(0.5, 20) if kind == 2 else 2, field.shape)
    if kind == 4:  # colour that follows R, as after JPEG: what the difference base codes
        noise = np.cumsum(rng.normal(0, 1, field.shape) * [[[4]], [[0.7]], [[0.7]]], axis=0)
        field = field[:1].repeat(planes, axis=0)
    return np.clip(128 + 100 * field + noise, 0, 255).astype(np.uint8)


def main(count: int = 1000, seed: int = 0) -> None:
    """Code `count` random images and decode them with both decoders."""
    workers.set_threads(1)
    engine = Engine(load_model())
    rng = np.random.default_rng(seed)
    images = [random_image(rng) for _ in range(count)]
    groups: dict[tuple, list[int]] = defaultdict(list)
    for i, im in enumerate(images):
        groups[im.shape].append(i)
    times = {"encode": 0.0, "compiled": 0.0, "reference": 0.0}
    methods: dict[str, int] = defaultdict(int)
    disagreements = []
    for shape, members in groups.items():
        start = time.perf_counter()
        coded = codec.encode_batch(engine, [images[i] for i in members])
        times["encode"] += time.perf_counter() - start
        for c in coded:
            methods[c.method] += 1
        decoded = {}
        for name, compiled in (("compiled", True), ("reference", False)):
            start = time.perf_counter()
            decoded[name] = codec.decode_batch(engine, [c.payload for c in coded], *shape,
                                               methods=[c.method for c in coded],
                                               compiled=compiled)
            times[name] += time.perf_counter() - start
        for k, i in enumerate(members):
            same = np.array_equal(decoded["compiled"][k], decoded["reference"][k])
            if not same or not np.array_equal(decoded["compiled"][k], images[i]):
                disagreements.append(i)
    figures = {"date": date.today().isoformat(), "rowcast": rowcast.__version__,
               "model": engine.model.name, "images": count, "seed": seed,
               "shapes": len(groups), "subpixels": int(sum(im.size for im in images)),
               "methods": dict(methods), "disagreements": disagreements,
               "seconds": {k: round(v, 2) for k, v in times.items()}}
    (HERE / "decoder_agreement.json").write_text(json.dumps(figures, indent=1) + "\n")
    print(json.dumps(figures, indent=1))
    if disagreements:
        raise SystemExit(f"{len(disagreements)} images differ")


if __name__ == "__main__":
    typer.run(main)
