"""Make the golden files in tests/golden/: a tiny model, two tiny images, their archive.

Run once; the files are committed, and tests check that today's code still decodes the
archive and re-encodes the images to the same bytes. Never rerun to make a test pass: a
difference means old archives would break, which needs a format version bump instead.
"""

from pathlib import Path

import numpy as np
from PIL import Image

import rowcast
from rowcast.quantize import export, save_model
from rowcast.train import Config, train

ROOT = Path(__file__).resolve().parents[1]
GOLDEN = ROOT / "tests" / "golden"

if __name__ == "__main__":
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
    summary = rowcast.compress([GOLDEN / "images"], GOLDEN / "golden.rowcast",
                               model=GOLDEN / "tiny.safetensors", force=True)
    for e in summary.entries:
        print(e["path"], e["method"], e["bytes"])
