"""Count the tuning choices the encoder makes on corpus thumbnails: the priors of format 6.

    python scripts/tuning_priors.py ../shared/corpus [--model default]

Format 6 range-codes each image's tuning fields ahead of its pixels, each with a fixed
count table: one plus the number of times the encoder chose that value on these thumbnails
(64-px tiles of the corpus photographs at reductions 2 to 16, RGB and gray). The tables are
format constants (`tuning.PRIORS`); this prints them as Python for that file. scikit-image's
images stay out: they are the held-out set.
"""

from pathlib import Path

import numpy as np
import typer
from PIL import Image

from rowcast import codec, tuning
from rowcast.family import base_prediction
from rowcast.predictor import Engine
from rowcast.quantize import load_model

REDUCTIONS = (2, 3, 4, 6, 8, 12, 16)


def tiles(folder: Path, mode: str, size: int = 64) -> list[np.ndarray]:
    """Every 64-px tile of every photograph at every reduction, as planes (P, 64, 64)."""
    out = []
    for path in sorted((folder / "photos").iterdir()):
        with Image.open(path) as im:
            img = im.convert(mode)
        for s in REDUCTIONS:
            small = np.asarray(img.reduce(s))
            h, w = small.shape[:2]
            for y in range(0, h - size + 1, size):
                for x in range(0, w - size + 1, size):
                    t = small[y : y + size, x : x + size]
                    out.append(t[None] if t.ndim == 2 else t.transpose(2, 0, 1))
    return out


def choices(engine: Engine, images: list[np.ndarray]) -> list[codec.Tune]:
    """The tuning the encoder picks for each image (None where it would not pay)."""
    found = []
    for start in range(0, len(images), 8):
        group = np.stack([codec.as_rgb(im) for im in images[start : start + 8]])
        for out, rgb in zip(engine.parallel(group), group, strict=True):
            tune, _ = codec.tuning_of(out, rgb, base_prediction(rgb), images[0].shape[0],
                                      layout="compact")  # a choice that knows no priors
            found.append(tune)
    return found


def main(corpus: Path, model: str = "default") -> None:
    engine = Engine(load_model(model))
    counts = {name: np.ones(shape, np.int64) for name, shape in tuning.PRIOR_SHAPES.items()}
    for mode in ("RGB", "L"):
        images = tiles(corpus, mode)
        tunes = [t for t in choices(engine, images) if t is not None]
        print(f"# {mode}: {len(images)} tiles, {len(tunes)} tuned")
        for t in tunes:
            for name, rows, symbols in tuning.fields(t.offsets, t.couplings, t.carried_gains,
                                                     len(images[0])):
                np.add.at(counts[name], (rows, symbols), 1)
    for name, table in counts.items():
        rows = ",\n    ".join("(" + ", ".join(map(str, r)) + ")" for r in table)
        print(f'"{name}": (\n    {rows},\n),')


if __name__ == "__main__":
    typer.run(main)
