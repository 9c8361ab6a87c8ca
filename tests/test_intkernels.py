"""Specification of `rowcast.intkernels.dense`, the decoder's matrix product: uint8 times
int8 summed in int32 equals numpy's int64 product (the definition) for every shape the
packing pads, on this machine's code path (AVX-512 VNNI where numba compiles for it) and
on the portable one every other target gets."""

from __future__ import annotations

import json
import os
import subprocess
import sys

import numpy as np
import pytest

from rowcast import native
from rowcast.intkernels import LANES, packed, vnni

SHAPES = [(1, 4, 1), (3, 20, 200), (64, 256, 256), (70, 288, 48), (5, 40, 48), (2, 258, 65),
          (9, 18, 256), (4, 256, 9), (1, 1, 16)]  # (rows, inputs, outputs)


def product(a: np.ndarray, weight: np.ndarray) -> np.ndarray:
    """`dense` on unpadded a (M, K) uint8 and weight (N, K) int8: (M, N) int64."""
    m, k = a.shape
    padded = np.zeros((m, -(-k // 4) * 4), np.uint8)
    padded[:, :k] = a
    out = np.full((m, -(-len(weight) // LANES) * LANES), 7, np.int32)
    native.jitted().dense(padded, packed(weight), out)
    assert not out[:, len(weight) :].any()  # padded outputs have zero weights
    return out[:, : len(weight)].astype(np.int64)


def cases(seed: int = 0):
    rng = np.random.default_rng(seed)
    for m, k, n in SHAPES:
        a = rng.integers(0, 256, (m, k)).astype(np.uint8)
        w = rng.integers(-128, 128, (n, k)).astype(np.int8)
        yield a, w
    k = 256  # the extremes: every product at its largest, both signs
    yield np.full((2, k), 255, np.uint8), np.repeat(np.int8([[127], [-128]]), k, 1)


def check_all() -> int:
    """Every case against numpy's int64 product; returns how many."""
    count = 0
    for a, w in cases():
        assert np.array_equal(product(a, w), a.astype(np.int64) @ w.T.astype(np.int64))
        count += 1
    return count


def test_dense_is_the_integer_matrix_product() -> None:
    """Random and extreme inputs, outputs and inputs that are not multiples of the block:
    the same integers as numpy's int64 product."""
    assert check_all() == len(SHAPES) + 1


def test_packing_pads_with_zeros() -> None:
    """Outputs round up to 16 and inputs to 4; the added weights are zeros."""
    w = np.ones((17, 5), np.int8)
    flat = packed(w)
    assert flat.size == 32 * 8 and flat.sum() == 17 * 5


PORTABLE = """
import json, numpy as np
import test_intkernels as t
from rowcast import native
n = t.check_all()
asm = "".join(native.jitted().dense.inspect_asm().values())
print(json.dumps({"cases": n, "vnni": "vpdpbusd" in asm}))
"""


@pytest.mark.parametrize("cpu", ["host", "generic"])
def test_both_code_paths_give_the_same_integers(cpu: str, tmp_path) -> None:
    """Compiled afresh for this machine and for a generic x86-64 or other target (no
    VNNI: the plain vector code), in a new process: every case is the int64 product. The
    host's machine code uses vpdpbusd exactly when numba compiles for AVX-512 VNNI."""
    env = {**os.environ, "NUMBA_CACHE_DIR": str(tmp_path)}
    if cpu == "generic":
        env |= {"NUMBA_CPU_NAME": "generic", "NUMBA_CPU_FEATURES": ""}
    tests = os.path.dirname(__file__)
    run = subprocess.run([sys.executable, "-c", PORTABLE], env=env, cwd=tests,
                         capture_output=True, text=True, timeout=240)
    assert run.returncode == 0, run.stderr[-2000:]
    found = json.loads(run.stdout.strip().splitlines()[-1])
    assert found["cases"] == len(SHAPES) + 1
    if cpu == "generic":
        assert not found["vnni"]
    else:
        assert found["vnni"] == vnni()
