"""What `rowcast compress --adapt` saves on homogeneous folders, after paying for its model.

    python benchmarks/adapt.py [--minutes 2]

Folders of non-overlapping 64-px tiles of two of scikit-image's images (never used in
training): 484 tiles of `retina.jpg` (a fundus camera) and 195 of `hubble_deep_field.jpg`
(a telescope). For each, `rowcast compress DIR -o A --adapt --minutes M --json` runs as a
process, as a user runs it; the figures are its own report (payloads with the starting
model, with the adapted one, the packed model's bytes, the saving) and the archive's size,
beside JPEG XL (lossless, effort 9, imagecodecs) on the same tiles. Every archive is checked
with `rowcast verify --against DIR`. Prints the figures and writes benchmarks/ADAPT.md and
benchmarks/adapt.json. The target (issue 19): at least 5% saved on a folder of about 500.
"""

from __future__ import annotations

import json
import platform
import subprocess
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
from rowcast.heldout import data_dir

HERE = Path(__file__).parent
TARGET_SAVED = 0.05
SOURCES = {"retina": "retina.jpg", "hubble": "hubble_deep_field.jpg"}
TILE = 64


def tiles(name: str) -> list[np.ndarray]:
    """Every whole TILE x TILE tile of a scikit-image photograph, in raster order."""
    with Image.open(data_dir() / SOURCES[name]) as im:
        a = np.asarray(im.convert("RGB"))
    return [a[y : y + TILE, x : x + TILE] for y in range(0, a.shape[0] - TILE + 1, TILE)
            for x in range(0, a.shape[1] - TILE + 1, TILE)]


def _rowcast(*args: object) -> subprocess.CompletedProcess:
    return subprocess.run([sys.executable, "-m", "rowcast", *map(str, args)],
                          capture_output=True, text=True, check=True)


def measure(name: str, minutes: float, work: Path) -> dict:
    """One folder: the --adapt run's report, its archive's size, JPEG XL's bytes."""
    folder = work / name
    folder.mkdir()
    images = tiles(name)
    for i, tile in enumerate(images):
        Image.fromarray(tile).save(folder / f"{i:04d}.png")
    archive = work / f"{name}.rowcast"
    start = time.monotonic()
    report = json.loads(_rowcast("compress", folder, "-o", archive, "--adapt", "--minutes",
                                 minutes, "--json").stdout)
    wall = time.monotonic() - start
    _rowcast("verify", archive, "--against", folder)
    adapted = report["adaptation"]
    plain = adapted["start_payload_bytes"]
    jxl = sum(len(imagecodecs.jpegxl_encode(t, lossless=True, effort=9)) for t in images)
    subpixels = sum(t.size for t in images)
    return {"folder": name, "tiles": len(images), "subpixels": subpixels,
            "minutes": minutes, "wall_s": round(wall, 1), "kept": adapted["kept"],
            "plain_payload_bytes": plain, "adapted_payload_bytes": adapted["payload_bytes"],
            "model_bytes": adapted["model_bytes"], "saved_bytes": adapted["saved_bytes"],
            "saved": round(adapted["saved_bytes"] / plain, 4),
            "archive_bytes": archive.stat().st_size, "jxl9_bytes": jxl,
            "archive_vs_jxl9": round(archive.stat().st_size / jxl, 4)}


def main(minutes: float = 2.0) -> None:
    """Run every folder, print the table, write ADAPT.md and adapt.json."""
    rows = []
    with tempfile.TemporaryDirectory(prefix="rowcast-adapt-bench-") as tmp:
        for name in SOURCES:
            rows.append(measure(name, minutes, Path(tmp)))
            print(json.dumps(rows[-1]), flush=True)
    result = {"date": date.today().isoformat(), "rowcast": rowcast.__version__,
              "machine": f"{platform.machine()}, {platform.system()}",
              "target_saved": TARGET_SAVED, "folders": rows}
    (HERE / "adapt.json").write_text(json.dumps(result, indent=1) + "\n")
    lines = [f"# compress --adapt on homogeneous folders ({result['date']}, rowcast "
             f"{result['rowcast']})", "",
             f"`python benchmarks/adapt.py --minutes {minutes:g}`: 64-px tiles of scikit-image "
             "images, `rowcast compress DIR --adapt` as a process. Saved = (plain payloads - "
             "adapted payloads - packed model) / plain payloads; target at least "
             f"{TARGET_SAVED:.0%}.", "",
             "| folder | tiles | plain payloads | adapted payloads | model | saved | archive "
             "| archive / JPEG XL e9 | wall s |", "|---|---:|---:|---:|---:|---:|---:|---:|---:|"]
    lines += [f"| {r['folder']} | {r['tiles']} | {r['plain_payload_bytes']} | "
              f"{r['adapted_payload_bytes']} | {r['model_bytes']} | {r['saved']:.1%} | "
              f"{r['archive_bytes']} | {r['archive_vs_jxl9']:.3f} | {r['wall_s']} |"
              for r in rows]
    (HERE / "ADAPT.md").write_text("\n".join(lines) + "\n")
    print("\n".join(lines))


if __name__ == "__main__":
    typer.run(main)
