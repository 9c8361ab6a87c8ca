"""How fast, and in how much memory, an index of a million small entries is read.

Writes a format-7 archive of ENTRIES coded images with one-byte payloads (paths of camera
folders and days, random checksums, every hundredth entry with a `parts` field) to a
temporary folder, then reads its index in fresh processes with `archive.read_index` (a
list) and `archive.iter_index` (consumed one entry at a time) and reports the wall time
and the process's peak resident memory over what it held before reading (Linux).
Prints the results and writes them to benchmarks/index_speed.json.

    python benchmarks/index_speed.py [ENTRIES]
"""

from __future__ import annotations

import hashlib
import json
import subprocess
import sys
import tempfile
import time
from collections.abc import Iterator
from pathlib import Path

from rowcast import archive

ENTRIES = 1_000_000
MODEL = archive.ModelIdentity("benchmark", hashlib.sha256(b"benchmark").digest())


def entries(count: int) -> Iterator[archive.Entry]:
    """Small coded RGB images with a one-byte payload each."""
    for i in range(count):
        path = f"cam{i % 100:02d}/day{i // 10_000:03d}/frame{i:07d}.png"
        parts = ("adaptive",) if i % 100 == 0 else ()
        yield archive.Entry(path, "image", "RGB", 64, 48, "coded",
                            hashlib.sha256(i.to_bytes(8, "little")).digest(), b"\x01",
                            parts=parts)


def status_kib(field: str) -> int:
    """A memory line of /proc/self/status (Linux), in KiB: VmRSS now, VmHWM the peak."""
    for line in Path("/proc/self/status").read_text().splitlines():
        if line.startswith(field + ":"):
            return int(line.split()[1])
    raise KeyError(field)


def reset_peak() -> None:
    """Start the peak (VmHWM) again from the present size, so that importing rowcast's
    dependencies does not hide what reading needs (Linux: /proc/self/clear_refs)."""
    Path("/proc/self/clear_refs").write_text("5")


def measure(how: str, src: Path) -> dict:
    """Read the index of src one way in this process; time, count and peak memory."""
    reset_peak()
    base = status_kib("VmRSS")
    start = time.perf_counter()
    if how == "read_index":
        count = len(archive.read_index(src)[1])
    else:
        count = sum(1 for _ in archive.iter_index(src)[1])
    seconds = time.perf_counter() - start
    return {"entries": count, "seconds": round(seconds, 3),
            "peak_mib_over_start": round((status_kib("VmHWM") - base) / 1024, 1)}


def main(count: int) -> None:
    """Write the archive, measure both readers in child processes, report."""
    with tempfile.TemporaryDirectory() as folder:
        src = Path(folder) / "index.rowcast"
        start = time.perf_counter()
        size = archive.write_archive(src, MODEL, entries(count))
        results: dict = {"entries": count, "archive_bytes": size,
                         "write_seconds": round(time.perf_counter() - start, 3)}
        for how in ("read_index", "iter_index"):
            child = subprocess.run([sys.executable, __file__, "--measure", how, str(src)],
                                   check=True, capture_output=True, text=True)
            results[how] = json.loads(child.stdout)
    print(json.dumps(results, indent=2))
    out = Path(__file__).with_name("index_speed.json")
    out.write_text(json.dumps(results, indent=2) + "\n")


if __name__ == "__main__":
    if sys.argv[1:2] == ["--measure"]:
        print(json.dumps(measure(sys.argv[2], Path(sys.argv[3]))))
    else:
        main(int(sys.argv[1]) if len(sys.argv) > 1 else ENTRIES)
