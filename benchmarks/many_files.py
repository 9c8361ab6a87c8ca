"""A folder of many thumbnails: peak memory, files per second, and the time to list the
archive and to restore one entry from it, each command run as a user runs it.

    python benchmarks/many_files.py [--count 10000] [--model NAME]

Images: 64 x 64 RGB thumbnails made from the photo thumbnails of ../shared/corpus/thumbs
(each reduced to 64 x 64, then flipped and turned for more), or, without the corpus,
smooth synthetic ones. Each command runs as its own process (start-up included); peak
memory is the largest resident set of the command and the processes it forks, sampled every
20 ms from /proc. Prints the figures and writes benchmarks/many_files.json.
"""

from __future__ import annotations

import json
import os
import subprocess
import sys
import tempfile
import time
from datetime import date
from pathlib import Path

import numpy as np
import typer
from PIL import Image

HERE = Path(__file__).parent
PHOTOS = HERE.parent.parent / "shared" / "corpus" / "thumbs" / "photo"
SIDE = 64
ENTRY = [sys.executable, "-c", "from rowcast.launch import main; main()"]


def thumbnails(count: int) -> list[Image.Image]:
    """`count` distinct 64-px RGB thumbnails."""
    sources = sorted(p for p in PHOTOS.rglob("*") if p.suffix.lower() in (".png", ".jpg"))
    variants = (None, Image.Transpose.FLIP_LEFT_RIGHT, Image.Transpose.FLIP_TOP_BOTTOM,
                Image.Transpose.ROTATE_90, Image.Transpose.ROTATE_180)
    out: list[Image.Image] = []
    for turn in variants:
        for path in sources:
            if len(out) == count:
                return out
            with Image.open(path) as im:
                small = im.convert("RGB").resize((SIDE, SIDE), Image.Resampling.BOX)
            out.append(small if turn is None else small.transpose(turn))
    rng = np.random.default_rng(0)
    y, x = np.mgrid[0:SIDE, 0:SIDE]
    while len(out) < count:  # no corpus, or not enough of it
        a, b, c = rng.integers(1, 5, 3)
        planes = np.stack([(a * x + b * y + c * k * 20) % 256 for k in range(3)], axis=2)
        noisy = np.clip(planes + rng.integers(-4, 5, planes.shape), 0, 255)
        out.append(Image.fromarray(noisy.astype(np.uint8), "RGB"))
    return out


def tree_rss(pid: int) -> int:
    """Resident bytes of a process and its children (from /proc; 0 once it is gone)."""
    total = 0
    try:
        children = Path(f"/proc/{pid}/task/{pid}/children").read_text().split()
        for line in Path(f"/proc/{pid}/status").read_text().splitlines():
            if line.startswith("VmRSS:"):
                total += int(line.split()[1]) * 1024
    except (FileNotFoundError, ProcessLookupError):
        return 0
    return total + sum(tree_rss(int(child)) for child in children)


def timed(args: list[str]) -> tuple[float, int]:
    """(wall seconds, peak resident bytes) of one rowcast command; exits on failure."""
    start = time.perf_counter()
    proc = subprocess.Popen([*ENTRY, *args], stdout=subprocess.DEVNULL, stderr=subprocess.PIPE,
                            env={**os.environ, "OMP_NUM_THREADS": "2"})
    peak = 0
    while proc.poll() is None:
        peak = max(peak, tree_rss(proc.pid))
        time.sleep(0.02)
    seconds = time.perf_counter() - start
    if proc.returncode:
        raise SystemExit(f"rowcast {' '.join(args)} failed: {proc.stderr.read().decode()}")
    return seconds, peak


def main(count: int = 10_000, model: str = "default") -> None:
    """Write the thumbnails, then compress, list and restore one entry, timing each."""
    with tempfile.TemporaryDirectory() as tmp:
        tmp = Path(tmp)
        folder = tmp / "thumbs"
        for i, image in enumerate(thumbnails(count)):
            sub = folder / f"cam{i // 1000:02d}"
            sub.mkdir(parents=True, exist_ok=True)
            image.save(sub / f"frame_{i:05d}.png", compress_level=6)
        source_bytes = sum(p.stat().st_size for p in folder.rglob("*.png"))
        archive = tmp / "many.rowcast"
        compress_s, compress_peak = timed(["compress", str(folder), "-o", str(archive),
                                           "--model", model, "--quiet"])
        list_s, list_peak = timed(["list", str(archive)])
        one = f"cam{(count // 2) // 1000:02d}/frame_{count // 2:05d}.png"
        extract_s, extract_peak = timed(["decompress", str(archive), one, "-o",
                                         str(tmp / "one"), "--model", model, "--quiet"])
        archive_bytes = archive.stat().st_size
    results = {
        "date": date.today().isoformat(),
        "command": "python benchmarks/many_files.py " + " ".join(sys.argv[1:]),
        "files": count, "side": SIDE, "source": "corpus photos" if PHOTOS.is_dir() else "synthetic",
        "png_bytes": source_bytes, "archive_bytes": archive_bytes,
        "compress_seconds": compress_s, "files_per_second": count / compress_s,
        "compress_peak_mib": compress_peak / 2**20,
        "list_seconds": list_s, "list_peak_mib": list_peak / 2**20,
        "extract_one_seconds": extract_s, "extract_one_peak_mib": extract_peak / 2**20,
    }
    (HERE / "many_files.json").write_text(json.dumps(results, indent=2) + "\n")
    for key, value in results.items():
        print(f"{key:>22}: {value:.3f}" if isinstance(value, float) else f"{key:>22}: {value}")


if __name__ == "__main__":
    typer.run(main)
