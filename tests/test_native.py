"""Specification of `rowcast.native`: the kernels are built ahead of time into one extension
module per machine, which a command loads without importing numba, written whole or not at
all; numba's JIT, the fallback, decodes the same pixels."""

from __future__ import annotations

import os
import subprocess
import sys
import textwrap
from pathlib import Path

import numpy as np
import pytest

from rowcast import codec, native
from rowcast.predictor import Engine
from rowcast.quantize import load_model

needs_compiler = pytest.mark.skipif(native.compiler() is None,
                                    reason="building the kernels ahead of time needs a C compiler")


@needs_compiler
def test_a_process_loads_the_prebuilt_kernels_without_numba() -> None:
    """Once built (here, if no test has needed the kernels yet), a new process loads the
    module and never imports numba."""
    native.kernels()
    script = textwrap.dedent("""
        import sys
        from rowcast import native
        print(native.kind(), "numba" in sys.modules)
    """)
    result = subprocess.run([sys.executable, "-c", script], capture_output=True, text=True,
                            env={k: v for k, v in os.environ.items() if k != "ROWCAST_KERNELS"})

    assert result.returncode == 0, result.stderr
    assert result.stdout.split() == ["prebuilt", "False"]


@needs_compiler
def test_a_build_is_whole_and_replaces_older_ones(tmp_path: Path) -> None:
    """The module appears complete under its name, older builds and a killed build's old
    work folder go, and it holds every entry point, computing what the JIT computes."""
    (tmp_path / "rowcast_kernels_0123456789abcdef.so").write_bytes(b"an older build")
    stale = tmp_path / ".build-killed"
    stale.mkdir()
    os.utime(stale, (0, 0))
    path = tmp_path / native.module_path().name.replace(native.key(), "fedcba9876543210")

    native.build(path)

    assert sorted(p.name for p in tmp_path.iterdir()) == [path.name]
    module = native.load(path)
    assert all(hasattr(module, name) for name in native.ENTRIES)
    table = np.random.default_rng(0).random(256).astype(np.float32)
    ours, theirs = np.empty(257, np.uint32), np.empty(257, np.uint32)
    assert module.quantise(table, ours) and native.jitted().quantise(table, theirs)
    assert np.array_equal(ours, theirs)


def test_without_a_compiler_nothing_is_built(tmp_path: Path,
                                            monkeypatch: pytest.MonkeyPatch) -> None:
    monkeypatch.setattr(native, "compiler", lambda: None)
    monkeypatch.setattr(native, "build", lambda path: pytest.fail("built without a compiler"))

    assert native.prebuilt(tmp_path / "rowcast_kernels_0000000000000000.so") is None
    assert list(tmp_path.iterdir()) == []


def test_a_failed_build_is_recorded_and_not_tried_again(tmp_path: Path,
                                                        monkeypatch: pytest.MonkeyPatch) -> None:
    """A build that fails (here: its linker) leaves its reason, so the next command goes
    straight to the JIT instead of spending the compile again."""
    tries = []

    def broken(path: Path) -> None:
        tries.append(path)
        raise RuntimeError("the linker failed")

    monkeypatch.setattr(native, "build", broken)
    path = tmp_path / "rowcast_kernels_0000000000000000.so"

    assert native.prebuilt(path) is None and native.prebuilt(path) is None
    assert len(tries) == 1
    assert (tmp_path / "rowcast_kernels_0000000000000000.failed").read_text() == (
        "RuntimeError: the linker failed\n")


def test_the_jit_decodes_what_the_prebuilt_kernels_decode(tmp_path: Path) -> None:
    """Images coded here (RGB and gray, tuned and adaptive) decode to the same pixels in a
    process that compiles the kernels with numba's JIT (ROWCAST_KERNELS=jit) as in this one,
    and both are the images."""
    engine = Engine(load_model())
    rng = np.random.default_rng(3)
    y, x = np.mgrid[0:24, 0:20]
    smooth = np.stack([(x * (c + 2) + y * 3) % 256 for c in range(3)])
    images = [np.clip(smooth + rng.integers(-6, 7, smooth.shape), 0, 255).astype(np.uint8)
              for _ in range(3)]
    cases = {"rgb": (images, 3, "adaptive"), "gray": ([im[:1] for im in images], 1, "tuned")}
    script = ["import numpy as np", "from rowcast import codec, native",
              "from rowcast.predictor import Engine", "from rowcast.quantize import load_model",
              "engine = Engine(load_model())", "assert native.kind() == 'jit'"]
    for name, (ims, planes, method) in cases.items():
        coded = codec.encode_batch(engine, ims, method)
        payloads, methods = [c.payload for c in coded], [c.method for c in coded]
        here = codec.decode_batch(engine, payloads, planes, 24, 20, methods=methods)
        assert np.array_equal(here, np.stack(ims))
        np.save(tmp_path / f"{name}.npy", here)
        (tmp_path / f"{name}.bin").write_bytes(b"".join(len(p).to_bytes(4, "big") + p
                                                        for p in payloads))
        script += [f"data = open('{tmp_path}/{name}.bin', 'rb').read()", "payloads, at = [], 0",
                   "while at < len(data):",
                   "    n = int.from_bytes(data[at:at + 4], 'big')",
                   "    payloads.append(data[at + 4:at + 4 + n]); at += 4 + n",
                   f"got = codec.decode_batch(engine, payloads, {planes}, 24, 20, "
                   f"methods={methods!r})",
                   f"assert np.array_equal(got, np.load('{tmp_path}/{name}.npy')), '{name}'"]
    result = subprocess.run([sys.executable, "-c", "\n".join(script)], capture_output=True,
                            text=True, env={**os.environ, "ROWCAST_KERNELS": "jit"})

    assert result.returncode == 0, result.stderr[-2000:]
