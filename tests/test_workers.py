"""Specification of `rowcast.workers.map_split`: the encoder's per-picture work (restorability
checks, PNG fallbacks) shared among processes gives what one process gives, in order."""

from __future__ import annotations

import os

from rowcast import workers


def square_and_process(i: int) -> tuple[int, int]:
    return i * i, os.getpid()


def test_a_shared_map_gives_every_result_in_order() -> None:
    items = list(range(40))
    got = workers.map_split(square_and_process, items, pixels=40 * 64 * 64, workers=2)

    assert [v for v, _ in got] == [i * i for i in items]
    if workers.can_fork():  # the second half ran in a forked child
        assert {pid for _, pid in got[:20]} == {os.getpid()}
        assert os.getpid() not in {pid for _, pid in got[20:]}


def test_a_small_map_stays_in_this_process() -> None:
    """Below MIN_SHARE_PIXELS a process (16 thumbnails of 64 px) forking does not pay."""
    got = workers.map_split(square_and_process, list(range(8)), pixels=8 * 64 * 64)

    assert {pid for _, pid in got} == {os.getpid()} and [v for v, _ in got][-1] == 49
