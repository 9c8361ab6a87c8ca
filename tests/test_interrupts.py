"""Stopping rowcast never leaves debris: SIGTERM and SIGHUP unwind like ^C (temporary
archive and staging folder removed, exit status 130), a SIGKILL during compress leaves no
temporary file (0.8 left `.NAME.rowcast.XXXX.tmp`), and decoding processes die with their
parent even when it is killed outright (0.8 left a worker running for a minute holding
277 MB)."""

from __future__ import annotations

import os
import signal
import subprocess
import sys
import textwrap
import time
from pathlib import Path
from types import SimpleNamespace

import numpy as np
import pytest
from PIL import Image

from rowcast import cli

ENTRY = [sys.executable, "-c", "from rowcast.launch import main; main()"]
ENV = {**os.environ, "OMP_NUM_THREADS": "1"}


def textured(folder: Path, count: int) -> None:
    """`count` 64-px RGB images with noise: slow enough to code that a signal lands mid-run."""
    folder.mkdir()
    rng = np.random.default_rng(5)
    y, x = np.mgrid[0:64, 0:64]
    for i in range(count):
        base = np.stack([(x * (c + 1) + y * 2 + i) % 256 for c in range(3)], axis=2)
        noisy = np.clip(base + rng.integers(-9, 10, base.shape), 0, 255).astype(np.uint8)
        Image.fromarray(noisy, "RGB").save(folder / f"f{i:03d}.png")


def wait_for(condition, seconds: float = 60.0) -> None:
    end = time.monotonic() + seconds
    while not condition():
        assert time.monotonic() < end, "timed out waiting for the command to get going"
        time.sleep(0.02)


def writing_into(folder: Path):
    """Whether a process holds a file open in `folder` (unnamed ones included: Linux shows
    them as "folder/#inode (deleted)")."""
    def check(pid: int) -> bool:
        for fd in Path(f"/proc/{pid}/fd").glob("*"):
            try:
                if os.readlink(fd).startswith(f"{folder}/"):
                    return True
            except OSError:
                continue
        return False
    return check


def stop_midway(args: list[str], started, sig: int) -> subprocess.CompletedProcess:
    """Run rowcast, send `sig` once `started(pid)` holds, and wait for it to end."""
    proc = subprocess.Popen([*ENTRY, *args], env=ENV, stdout=subprocess.PIPE,
                            stderr=subprocess.PIPE, text=True)
    try:
        wait_for(lambda: started(proc.pid) or proc.poll() is not None)
        assert proc.poll() is None, "finished before the signal: give it more work"
        time.sleep(0.3)
        proc.send_signal(sig)
        out, err = proc.communicate(timeout=60)
    finally:
        proc.kill()
    return subprocess.CompletedProcess(args, proc.returncode, out, err)


def compressed(tmp_path: Path, count: int = 40) -> Path:
    """An archive of `count` textured thumbnails (in tmp_path/in), made by the command."""
    textured(tmp_path / "in", count)
    archive = tmp_path / "a.rowcast"
    done = subprocess.run([*ENTRY, "compress", str(tmp_path / "in"), "-o", str(archive)],
                          env=ENV, capture_output=True, text=True)
    assert done.returncode == 0, done.stderr
    return archive


@pytest.mark.parametrize("sig", [signal.SIGTERM, signal.SIGHUP], ids=["SIGTERM", "SIGHUP"])
def test_a_signal_during_compress_leaves_no_temporary_file(tmp_path: Path, sig: int) -> None:
    textured(tmp_path / "in", 48)
    out = tmp_path / "out"
    out.mkdir()
    result = stop_midway(["compress", str(tmp_path / "in"), "-o", str(out / "a.rowcast")],
                         writing_into(out), sig)

    assert result.returncode == 130, result.stderr
    assert result.stderr == "rowcast: interrupted; nothing was written\n"
    assert list(out.iterdir()) == []


@pytest.mark.skipif(not sys.platform.startswith("linux"), reason="unnamed files: Linux only")
def test_even_sigkill_during_compress_leaves_nothing(tmp_path: Path) -> None:
    """The archive is written into an unnamed file (O_TMPFILE) that gets its name only when
    complete, so a kill that cannot be caught leaves no debris either."""
    textured(tmp_path / "in", 48)
    out = tmp_path / "out"
    out.mkdir()
    result = stop_midway(["compress", str(tmp_path / "in"), "-o", str(out / "a.rowcast")],
                         writing_into(out), signal.SIGKILL)

    assert result.returncode == -signal.SIGKILL
    assert list(out.iterdir()) == []


def test_sigterm_during_decompress_leaves_no_staging_folder(tmp_path: Path) -> None:
    archive = compressed(tmp_path, 240)  # the prebuilt kernels decode 40 within the wait
    out = tmp_path / "restored"
    result = stop_midway(["decompress", str(archive), "-o", str(out)],
                         lambda pid: out.exists() and any(out.iterdir()), signal.SIGTERM)

    assert result.returncode == 130, result.stderr
    assert not out.exists()  # made by this run, so removed with the staging folder


def state(pid: int) -> str:
    """The process's state letter from /proc (Linux), or "gone"."""
    try:
        status = Path(f"/proc/{pid}/status").read_text()
    except FileNotFoundError:
        return "gone"
    return next(line.split()[1] for line in status.splitlines() if line.startswith("State:"))


@pytest.mark.skipif(not sys.platform.startswith("linux"), reason="forked workers: Linux only")
def test_decoding_processes_die_with_a_killed_parent(tmp_path: Path) -> None:
    script = textwrap.dedent("""
        import os, time
        from rowcast import workers

        def part(index, report):
            if index:
                print(os.getpid(), flush=True)
            time.sleep(120)

        workers.run_split(part, [0, 1])
    """)
    parent = subprocess.Popen([sys.executable, "-c", script], env=ENV, stdout=subprocess.PIPE,
                              text=True)
    try:
        child = int(parent.stdout.readline())
        assert state(child) not in ("gone", "Z")
        parent.kill()
        parent.wait()
        wait_for(lambda: state(child) in ("gone", "Z"), seconds=10)
    finally:
        parent.kill()


def test_running_out_of_memory_is_one_line_and_a_clean_exit(tmp_path: Path) -> None:
    """A MemoryError (0.8 printed `internal error: MemoryError`) says what happened and what
    bounds it, exits 1, and writes nothing."""
    script = textwrap.dedent("""
        from rowcast import api, cli

        def exhausted(*args, **kwargs):
            raise MemoryError

        api.read_index = exhausted
        cli.main()
    """)
    archive = tmp_path / "any.rowcast"
    archive.write_bytes(b"x")
    result = subprocess.run([sys.executable, "-c", script, "list", str(archive)], env=ENV,
                            capture_output=True, text=True)

    assert result.returncode == 1
    assert result.stderr.startswith("rowcast: error: out of memory; nothing was written")
    assert result.stderr.count("\n") == 1 and "Traceback" not in result.stderr


def test_the_next_decompress_clears_what_a_killed_one_left(tmp_path: Path) -> None:
    """SIGKILL cannot be caught, so a killed decompress leaves its staging folder; the next
    decompress into that folder removes it (its process is gone) and leaves exactly the
    restored files. A staging folder of a live process is never touched."""
    archive = compressed(tmp_path, 240)
    out = tmp_path / "restored"
    stop_midway(["decompress", str(archive), "-o", str(out)],
                lambda pid: out.exists() and any(out.iterdir()), signal.SIGKILL)
    (left,) = out.iterdir()
    live = out / f".rowcast-stage-{os.getpid()}-kept"
    live.mkdir()

    again = subprocess.run([*ENTRY, "decompress", str(archive), "-o", str(out)], env=ENV,
                           capture_output=True, text=True)

    assert again.returncode == 0, again.stderr
    assert not left.exists() and live.is_dir()
    assert sorted(p.name for p in out.iterdir()) == sorted(
        [live.name, *(p.name for p in (tmp_path / "in").iterdir())])


def fake_frame(path: str, back=None) -> SimpleNamespace:
    return SimpleNamespace(f_code=SimpleNamespace(co_filename=path), f_back=back)


def test_a_stop_inside_the_compilers_callback_is_retried_not_lost() -> None:
    """A signal that lands in llvmlite's ctypes callbacks (numba compiling on a first run)
    would raise where ctypes drops the exception: the stop is deferred by a 50 ms alarm
    instead, and outside them it unwinds at once."""
    inside = fake_frame("/x/numba/core/codegen.py",
                        fake_frame("/venv/site-packages/llvmlite/binding/executionengine.py"))
    try:
        cli._stop(signal.SIGTERM, inside)
        assert 0 < signal.getitimer(signal.ITIMER_REAL)[0] <= 0.05
    finally:
        signal.setitimer(signal.ITIMER_REAL, 0)
        signal.signal(signal.SIGALRM, signal.SIG_DFL)
    with pytest.raises(KeyboardInterrupt):
        cli._stop(signal.SIGTERM, fake_frame("/src/rowcast/api.py"))
