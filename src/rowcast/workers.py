"""Coding on several cores: a batch is split and its parts coded in forked processes.

Most of the coder's time is Python and coder calls that one thread runs. So a large batch
is shared by single-threaded processes, one per thread (`threads`; measured on the 2-core
build machine, 32 RGB thumbnails: decoding 2.07 -> 1.82 s, median of 4; with 16 or fewer
images nothing was gained, so smaller batches stay whole).
Every split gives the same integers (the exactness contract). Where fork is not available
(or not safe: macOS, Windows), the parts run one after another here.
"""

from __future__ import annotations

import ctypes
import multiprocessing as mp
import os
import signal
import sys
from collections.abc import Callable, Sequence
from typing import Any

from threadpoolctl import threadpool_limits

Report = Callable[[int], None]
# Pixels per process below which splitting a batch does not pay: 16 thumbnails of 64 px
# (measured: 6 to 8 did not gain), or one 256-px tile of a large picture.
MIN_SHARE_PIXELS = 1 << 16
PR_SET_PDEATHSIG = 1  # prctl(2)
_threads: list[int] = []  # set by `set_threads`


def set_threads(count: int | None) -> None:
    """Use `count` threads (None: as many as this process may run on)."""
    _threads[:] = [count] if count else []


def threads() -> int:
    """The threads rowcast uses: `set_threads`'s count, else the CPUs this process may run
    on."""
    if _threads:
        return _threads[0]
    return len(os.sched_getaffinity(0)) if hasattr(os, "sched_getaffinity") else os.cpu_count() or 1


def shares(count: int, workers: int | None, pixels: int) -> list[tuple[int, int]]:
    """[start, end) of each part of a batch of `count` images of `pixels` pixels each:
    `workers` parts when given, else one per thread (`threads`) as long as each gets
    MIN_SHARE_PIXELS."""
    if workers is None:
        workers = min(threads(), count * pixels // MIN_SHARE_PIXELS)
    n = max(1, min(workers, count))
    cuts = [count * i // n for i in range(n + 1)]
    return list(zip(cuts, cuts[1:], strict=False))


def map_split(fn: Callable[[Any], Any], items: Sequence, pixels: int,
              workers: int | None = None) -> list:
    """[fn(item) for item in items], the items shared among forked processes as a batch of
    `pixels` pixels in all is (`shares`, `run_split`)."""
    cuts = shares(len(items), workers, pixels // max(1, len(items)))
    done = run_split(lambda part, _report: [fn(item) for item in part],
                     [items[a:b] for a, b in cuts])
    return [result for part in done for result in part]


def can_fork() -> bool:
    """Whether parts may run in forked children on this platform."""
    return sys.platform.startswith("linux") and "fork" in mp.get_all_start_methods()


def _die_with_parent(parent: int) -> None:
    """Ask Linux to kill this process when the parent goes, however it goes (a forked
    child also holds pipe ends, so it would never see the parent's end of the pipe)."""
    try:
        libc = ctypes.CDLL(None, use_errno=True)
        libc.prctl(PR_SET_PDEATHSIG, signal.SIGKILL, 0, 0, 0)
    except (OSError, AttributeError):
        return
    if os.getppid() != parent:  # the parent went before the request took effect
        os._exit(1)


def _child(fn: Callable, part: Any, conn, parent: int) -> None:
    _die_with_parent(parent)
    signal.signal(signal.SIGINT, signal.SIG_IGN)  # the parent handles ^C and stops us,
    signal.signal(signal.SIGHUP, signal.SIG_IGN)  # and a hang-up,
    signal.signal(signal.SIGTERM, signal.SIG_DFL)  # with SIGTERM: it ends us at once
    try:
        with threadpool_limits(limits=1, user_api="blas"):
            result = fn(part, lambda n: conn.send(("progress", n)))
        conn.send(("done", result))
    except Exception as exc:  # handed to the parent, which raises it
        conn.send(("error", exc))
    finally:
        conn.close()


def run_split(fn: Callable[[Any, Report], Any], parts: Sequence, progress: Report | None = None
              ) -> list:
    """[fn(part, report) for part in parts]: the first part in this process, each other one
    in a forked child, each on one thread; `report(n)` from any of them reaches
    `progress`. An exception in any part is raised here, and the children are stopped.
    numpy's BLAS runs single-threaded throughout: its products here are small, and its
    threads would only contend for the same cores (measured: up to 1.7x slower)."""
    def forward(n: int) -> None:
        if progress is not None:
            progress(n)

    if len(parts) == 1 or not can_fork():
        with threadpool_limits(limits=1, user_api="blas"):
            return [fn(part, forward) for part in parts]
    ctx = mp.get_context("fork")
    pipes, procs = [], []
    try:
        for part in parts[1:]:
            receive, send = ctx.Pipe(duplex=False)
            proc = ctx.Process(target=_child, args=(fn, part, send, os.getpid()), daemon=True)
            proc.start()
            send.close()
            pipes.append(receive)
            procs.append(proc)
        results: list = [None] * len(parts)
        pending = set(range(len(pipes)))

        def drain(block: bool) -> None:
            for i in sorted(pending):
                while i in pending and (block or pipes[i].poll()):
                    try:
                        kind, value = pipes[i].recv()
                    except EOFError:
                        raise RuntimeError("a decoding process stopped unexpectedly") from None
                    if kind == "progress":
                        forward(value)
                    elif kind == "error":
                        raise value
                    else:
                        results[i + 1] = value
                        pending.discard(i)

        def report(n: int) -> None:
            forward(n)
            drain(block=False)

        with threadpool_limits(limits=1, user_api="blas"):
            results[0] = fn(parts[0], report)
        drain(block=True)
        return results
    finally:
        for proc in procs:
            if proc.is_alive():
                proc.terminate()
            proc.join()
        for pipe in pipes:
            pipe.close()
