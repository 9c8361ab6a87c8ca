"""Coverage-guided fuzzing of the archive reader and the decoder, seeded with the golden
archives (every format version, every pixel format, kept files).

    pip install atheris      # the fuzzer (a pure pip install on Linux x86_64)
    python benchmarks/fuzz_archive.py -max_total_time=600 -rss_limit_mb=3000

Each input is written as an archive file and read as `rowcast list`, `verify` and
`decompress` would: the index, every payload and extras record, then every entry decoded
with the committed tiny model (entries over `DECODE_LIMIT` subpixels are only indexed: a
range code decodes a long run of likely values from very few bytes, so size alone is
bounded by the reader's pixel limit, not by this script). The expected outcome of a bad
input is rowcast's own error (`RowcastError`, `ArchiveError`, or a `DataError` per entry);
anything else is a finding. Findings are grouped by class (exception type and the
innermost rowcast frame) and written, with the count of inputs tried, to
benchmarks/fuzz_report.json every 100 inputs; the first input of each class
is kept in benchmarks/fuzz_findings/ (not committed).
"""

from __future__ import annotations

import json
import sys
import time
import traceback
from pathlib import Path

import atheris

with atheris.instrument_imports():
    from rowcast import archive
    from rowcast.api import decode_entries
    from rowcast.errors import RowcastError

HERE = Path(__file__).parent
GOLDEN = HERE.parent / "tests" / "golden"
MODEL = GOLDEN / "tiny.safetensors"
DECODE_LIMIT = 1 << 16
SCRATCH = Path("/dev/shm" if Path("/dev/shm").is_dir() else "/tmp") / "rowcast-fuzz.rowcast"
FINDINGS = HERE / "fuzz_findings"
REPORT = HERE / "fuzz_report.json"

state = {"runs": 0, "expected": 0, "clean": 0, "start": time.time(), "classes": {}}


def _where(exc: BaseException) -> str:
    """The innermost frame inside rowcast, as file:line."""
    frames = [f for f in traceback.extract_tb(exc.__traceback__) if "/rowcast/" in f.filename]
    last = frames[-1] if frames else traceback.extract_tb(exc.__traceback__)[-1]
    return f"{Path(last.filename).name}:{last.lineno}"


def _report() -> None:
    state["seconds"] = round(time.time() - state["start"], 1)
    REPORT.write_text(json.dumps({k: v for k, v in state.items() if k != "start"}, indent=2)
                      + "\n")


def _exercise(path: Path) -> None:
    _, entries = archive.read_index(path)
    for entry in entries:
        archive.read_payload(path, entry)
        archive.read_extras(path, entry)
    small = [e.path for e in entries if e.width * e.height * 4 <= DECODE_LIMIT]
    for _ in decode_entries(path, model=MODEL, only=small):
        pass


def one_input(data: bytes) -> None:
    state["runs"] += 1
    SCRATCH.write_bytes(data)
    try:
        _exercise(SCRATCH)
        state["clean"] += 1
    except (RowcastError, archive.ArchiveError):
        state["expected"] += 1
    except Exception as exc:  # a finding: group it, keep its first input, go on
        key = f"{type(exc).__name__} at {_where(exc)}"
        found = state["classes"].setdefault(key, {"count": 0, "message": str(exc)[:200]})
        found["count"] += 1
        if found["count"] == 1:
            FINDINGS.mkdir(exist_ok=True)
            (FINDINGS / f"{len(state['classes']):03d}.rowcast").write_bytes(data)
            print(f"finding: {key}: {str(exc)[:200]}", file=sys.stderr)
    if state["runs"] % 100 == 0:
        _report()


def main() -> None:
    seeds = Path(SCRATCH.parent / "rowcast-fuzz-seeds")
    seeds.mkdir(exist_ok=True)
    for golden in sorted(GOLDEN.glob("*.rowcast")):
        (seeds / golden.name).write_bytes(golden.read_bytes())
    atheris.Setup([*sys.argv, str(seeds)], one_input)
    try:
        atheris.Fuzz()
    finally:
        _report()


if __name__ == "__main__":
    main()
