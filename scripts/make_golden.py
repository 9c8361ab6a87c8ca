"""Make the golden files in tests/golden/: a tiny model, two tiny images, their archives.

    python scripts/make_golden.py first   # tiny model, images, golden.rowcast (0.1, untuned)
    python scripts/make_golden.py tuned   # tuned/sky.png, golden-tuned.rowcast (0.2, tuning)
    python scripts/make_golden.py mixture # tiny-mixture model, golden-mixture.rowcast (0.2)
    python scripts/make_golden.py packed  # golden-packed.rowcast (0.3, format version 3)
    python scripts/make_golden.py adaptive  # golden-adaptive.rowcast and
                                            # golden-mixture-adaptive.rowcast (0.4, gains)
    python scripts/make_golden.py retuned   # golden-retuned.rowcast (0.4.1: the encoder's
                                            # second choice of scale offsets; the mixture
                                            # archive came out unchanged, so it has none)
    python scripts/make_golden.py compact   # gray/gate.png, golden-compact.rowcast (0.5:
                                            # format 5, a gray entry's compact header)
    python scripts/make_golden.py streamed  # golden-streamed.rowcast and
                                            # golden-mixture-streamed.rowcast (0.8: format
                                            # 6, tuning range-coded, endings trimmed)

Each part ran once; the files are committed, and tests check that today's code still
decodes the archives and re-encodes the images to the same bytes. Never rerun a part to
make a test pass: a difference means old archives would break, which needs a format
version bump instead. A new coding method gets a new part and a new archive; so does an
encoder that chooses differently within a format (the older archives stay, decoded only).
"""

import sys
from pathlib import Path

import numpy as np
import torch
from PIL import Image

import rowcast
from rowcast import family as fam
from rowcast.network import Predictor
from rowcast.quantize import export, save_model
from rowcast.train import Config, calibrate, train

ROOT = Path(__file__).resolve().parents[1]
GOLDEN = ROOT / "tests" / "golden"



def first() -> None:
    GOLDEN.mkdir(parents=True, exist_ok=True)
    cfg = Config(data=str(ROOT.parent / "shared" / "corpus"), out=str(ROOT / "runs" / "golden"),
                 minutes=0.5, width=8, hidden=8, depth=2, batch=16, qat_at=0.4, validation=())
    net = train(cfg)
    card, tensors = export(net, "golden-tiny")
    save_model(GOLDEN / "tiny.safetensors", card, tensors)
    orchard = np.asarray(Image.open(ROOT / "sample_images/orchard-north/cam01_1200.png"))
    (GOLDEN / "images").mkdir(exist_ok=True)
    Image.fromarray(orchard[20:32, 8:24]).save(GOLDEN / "images/orchard.png")
    leaf = np.asarray(Image.open(ROOT / "sample_images/frost-sensor/leaf_0600.png"))
    Image.fromarray(leaf[10:17, 5:14]).save(GOLDEN / "images/leaf.png")
    report(rowcast.compress([GOLDEN / "images"], GOLDEN / "golden.rowcast",
                            model=GOLDEN / "tiny.safetensors", force=True, version=1))


def tuned() -> None:
    (GOLDEN / "tuned").mkdir(exist_ok=True)
    sky = np.asarray(Image.open(ROOT / "sample_images/weather-ridge/sky_1300.png"))
    Image.fromarray(sky[:40, :48]).save(GOLDEN / "tuned/sky.png")
    report(rowcast.compress([GOLDEN / "tuned"], GOLDEN / "golden-tuned.rowcast",
                            model=GOLDEN / "tiny.safetensors", version=2))


def mixture() -> None:
    """A two-component model: random weights (calibrated, not trained) are enough to pin the
    arithmetic; its first-component weights sit mid-range so that tables really mix."""
    torch.manual_seed(7)
    net = Predictor(width=8, hidden=8, depth=2, left=3, activity=True, components=2)
    sky = np.asarray(Image.open(GOLDEN / "tuned/sky.png")).transpose(2, 0, 1)
    calibrate(net, torch.from_numpy(sky[None].copy()).float())
    net.quant = True
    with torch.no_grad():
        net.out.bias[fam.OUTPUTS + 2 :: 3] = 0.5
    card, tensors = export(net, "golden-tiny-mixture")
    save_model(GOLDEN / "tiny-mixture.safetensors", card, tensors)
    report(rowcast.compress([GOLDEN / "tuned"], GOLDEN / "golden-mixture.rowcast",
                            model=GOLDEN / "tiny-mixture.safetensors", version=2))


def packed() -> None:
    report(rowcast.compress([GOLDEN / "images", GOLDEN / "tuned"],
                            GOLDEN / "golden-packed.rowcast", model=GOLDEN / "tiny.safetensors",
                            version=3))


def adaptive() -> None:
    report(rowcast.compress([GOLDEN / "images", GOLDEN / "tuned"],
                            GOLDEN / "golden-adaptive.rowcast", model=GOLDEN / "tiny.safetensors"))
    report(rowcast.compress([GOLDEN / "tuned"], GOLDEN / "golden-mixture-adaptive.rowcast",
                            model=GOLDEN / "tiny-mixture.safetensors"))


def retuned() -> None:
    report(rowcast.compress([GOLDEN / "images", GOLDEN / "tuned"],
                            GOLDEN / "golden-retuned.rowcast", model=GOLDEN / "tiny.safetensors"))


def compact() -> None:
    (GOLDEN / "gray").mkdir(exist_ok=True)
    gate = np.asarray(Image.open(ROOT / "sample_images/gate/gate_night.png"))
    Image.fromarray(gate[8:48, 12:60]).save(GOLDEN / "gray/gate.png")
    report(rowcast.compress([GOLDEN / "images", GOLDEN / "tuned", GOLDEN / "gray"],
                            GOLDEN / "golden-compact.rowcast", model=GOLDEN / "tiny.safetensors"))


def streamed() -> None:
    report(rowcast.compress([GOLDEN / "images", GOLDEN / "tuned", GOLDEN / "gray"],
                            GOLDEN / "golden-streamed.rowcast", model=GOLDEN / "tiny.safetensors"))
    report(rowcast.compress([GOLDEN / "tuned", GOLDEN / "gray"],
                            GOLDEN / "golden-mixture-streamed.rowcast",
                            model=GOLDEN / "tiny-mixture.safetensors"))


def report(summary) -> None:
    for e in summary.entries:
        print(e["path"], e["method"], e["bytes"])


if __name__ == "__main__":
    {"first": first, "tuned": tuned, "mixture": mixture, "packed": packed,
     "adaptive": adaptive, "retuned": retuned, "compact": compact,
     "streamed": streamed}[sys.argv[1]]()
