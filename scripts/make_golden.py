"""Make the golden files of archive format 7 in tests/golden/.

    python scripts/make_golden.py formats   # formats/*, golden-formats.rowcast (0.9: format
                                            # 7, every pixel format, extras, a kept file)

The tiny models and the archives of formats 1 to 6 were made once by the parts of this
script in rowcast 0.8 and earlier (see the repository's history); they are decoded by
`rowcast.legacy` and never written again. Each part ran once; the files are committed, and
tests check that today's code still decodes the archive and re-encodes the files to the same
bytes. Never rerun a part to make a test pass: a difference means old archives would break,
which needs a format version bump instead.
"""

import sys
from pathlib import Path

import imagecodecs
import numpy as np
import tifffile
from PIL import Image, PngImagePlugin

import rowcast

ROOT = Path(__file__).resolve().parents[1]
GOLDEN = ROOT / "tests" / "golden"


def formats() -> None:
    """One small file of each pixel format, cut from the committed golden images, with a
    transparency key, palette transparency, colour under alpha 0, metadata chunks, a TIFF,
    a PNM, a BMP and a lossless WebP, and a text file kept as bytes."""
    folder = GOLDEN / "formats"
    folder.mkdir(exist_ok=True)
    sky = np.asarray(Image.open(GOLDEN / "tuned/sky.png"))[:12, :14]
    gate = np.asarray(Image.open(GOLDEN / "gray/gate.png"))[:10, :12]
    alpha = np.zeros(sky.shape[:2], np.uint8)
    alpha[3:10, 2:12] = 255
    alpha[2, 2:12] = 96
    Image.fromarray(np.dstack([sky, alpha]), "RGBA").save(folder / "rgba.png")
    Image.fromarray(np.dstack([gate, alpha[:10, :12]]), "LA").save(folder / "la.png")
    Image.fromarray(sky).quantize(6).save(folder / "palette.png", transparency=2)
    Image.fromarray(gate > 90).save(folder / "bits.png")
    Image.fromarray(gate).save(folder / "keyed.png", transparency=int(gate[0, 0]))
    deep = (gate.astype(np.uint16) * 13 + 1000)
    (folder / "deep.png").write_bytes(imagecodecs.png_encode(deep))
    (folder / "rgb16.png").write_bytes(imagecodecs.png_encode(sky.astype(np.uint16) * 255 + 3))
    text = PngImagePlugin.PngInfo()
    text.add_text("camera", "gate-2")
    text.add_itxt("note", "frost at 05:30", lang="en")
    Image.fromarray(sky).save(folder / "tagged.png", pnginfo=text, dpi=(300, 300),
                              icc_profile=b"\x00\x00\x00\x20golden-icc" * 4)
    rgba16 = np.dstack([sky.astype(np.uint16) * 257, alpha.astype(np.uint16) * 257])
    tifffile.imwrite(folder / "rgba16.tif", rgba16, photometric="rgb", extrasamples=[2],
                     description="probe 7, 05:30")
    values = np.asarray(gate[:6, :8].astype(np.uint16) * 4 + 3, ">u2").tobytes()
    (folder / "scan.pgm").write_bytes(b"P5\n# probe 7\n8 6\n1023\n" + values)
    Image.fromarray(sky[:8, :8]).save(folder / "thumb.bmp")
    Image.fromarray(sky[:8, :10]).save(folder / "leaf.webp", lossless=True)
    (folder / "notes.txt").write_text("gate camera 2: lens cleaned 2026-11-30\n")
    report(rowcast.compress([folder], GOLDEN / "golden-formats.rowcast",
                            model=GOLDEN / "tiny.safetensors"))


def report(summary) -> None:
    for e in summary.entries:
        print(e["path"], e["kind"], e.get("format"), e["method"], e.get("parts"), e["bytes"])


if __name__ == "__main__":
    {"formats": formats}[sys.argv[1]]()
