"""The run-time needs no torch: compressing, listing, verifying and decoding import only
numpy and the coder; torch is for training alone (the `train` extra)."""

from __future__ import annotations

import os
import subprocess
import sys
import textwrap
from pathlib import Path

import numpy as np
import pytest
from conftest import TINY
from PIL import Image

import rowcast
from rowcast import native


def test_coding_and_decoding_import_no_torch(tmp_path: Path) -> None:
    script = textwrap.dedent(f"""
        import sys
        import numpy as np
        from PIL import Image
        import rowcast
        from rowcast.cli import main

        rng = np.random.default_rng(3)
        Image.fromarray(rng.integers(0, 256, (9, 11, 3), np.uint8)).save("{tmp_path}/a.png")
        rowcast.compress(["{tmp_path}/a.png"], "{tmp_path}/a.rowcast", model="{TINY}")
        assert rowcast.verify("{tmp_path}/a.rowcast", against=None, model="{TINY}").ok
        assert not rowcast.decompress("{tmp_path}/a.rowcast", "{tmp_path}/out",
                                      model="{TINY}").failed
        print(sorted(m for m in sys.modules if m.split(".")[0] == "torch"))
    """)
    result = subprocess.run([sys.executable, "-c", script], capture_output=True, text=True)

    assert result.returncode == 0, result.stderr
    assert result.stdout.strip() == "[]"
    assert (tmp_path / "out" / "a.png").exists()


def test_listing_and_help_load_no_compiler(tmp_path: Path) -> None:
    """`rowcast --help` and `rowcast list` start fast: they import neither torch nor numba
    (numba's import and first call cost about half a second; only coding needs them), nor
    tifffile (13 ms; only TIFF files need it), nor pydantic (typer 0.29 and later coerce
    every option through it: 0.1 s more a command; pyproject keeps typer below 0.29)."""
    Image.fromarray(np.zeros((4, 4), np.uint8)).save(tmp_path / "a.png")
    rowcast.compress([tmp_path / "a.png"], tmp_path / "a.rowcast", model=TINY)
    for args in (["--help"], ["list", str(tmp_path / "a.rowcast")]):
        script = textwrap.dedent(f"""
            import sys
            from rowcast import launch
            sys.argv = ["rowcast", *{args!r}]
            try:
                launch.main()
            except SystemExit:
                pass
            print(sorted({{m.split(".")[0] for m in sys.modules}}
                         & {{"numba", "torch", "tifffile", "pydantic"}}))
        """)
        result = subprocess.run([sys.executable, "-c", script], capture_output=True, text=True)

        assert result.returncode == 0, result.stderr
        assert result.stdout.strip().splitlines()[-1] == "[]", args


@pytest.mark.parametrize("setting", [None, "2"])
def test_the_command_keeps_numpys_blas_to_one_thread(setting: str | None) -> None:
    """The command's parallel work is forked single-threaded processes; BLAS threads beside
    them only spin. `rowcast` keeps OpenBLAS (numpy's BLAS) to one thread, unless the user
    sets OPENBLAS_NUM_THREADS: then it has what plain numpy has. Read through threadpoolctl."""
    report = ('from threadpoolctl import threadpool_info\n'
              'print([i["num_threads"] for i in threadpool_info() '
              'if i["internal_api"] == "openblas"])')
    command = textwrap.dedent("""
        import sys
        from rowcast import launch
        sys.argv = ["rowcast", "--help"]
        try:
            launch.main()
        except SystemExit:
            pass
    """) + report
    env = {k: v for k, v in os.environ.items() if k != "OPENBLAS_NUM_THREADS"}
    if setting is not None:
        env["OPENBLAS_NUM_THREADS"] = setting
    seen = [subprocess.run([sys.executable, "-c", script], capture_output=True, text=True,
                           env=env) for script in (command, "import numpy\n" + report)]

    assert all(r.returncode == 0 for r in seen), seen[0].stderr + seen[1].stderr
    rowcast_threads, numpy_threads = (r.stdout.strip().splitlines()[-1] for r in seen)
    assert rowcast_threads == ("[1]" if setting is None else numpy_threads)


@pytest.mark.parametrize("kernels", ["prebuilt", "jit"])
def test_a_small_decode_loads_no_compiler(tmp_path: Path, kernels: str) -> None:
    """Decoding never imports numba once the kernels are prebuilt for this machine. With
    numba's JIT instead (ROWCAST_KERNELS=jit), one thumbnail of up to REFERENCE_PIXELS runs
    the reference decoder, done before numba would have loaded; a larger job loads it.
    Every way restores the same pixels (checked against the files by Pillow)."""
    if kernels == "prebuilt" and native.kind() != "prebuilt":
        pytest.skip("no C compiler here: the kernels cannot be prebuilt")
    rng = np.random.default_rng(4)
    sizes = {"small": (40, 40), "large": (80, 80)}
    for name, (h, w) in sizes.items():
        folder = tmp_path / name
        folder.mkdir()
        smooth = np.cumsum(rng.integers(-3, 4, (h, w, 3)), axis=1) + 128
        Image.fromarray(np.clip(smooth, 0, 255).astype(np.uint8)).save(folder / "a.png")
        rowcast.compress([folder], tmp_path / f"{name}.rowcast", model=TINY)
    env = {**os.environ, "ROWCAST_KERNELS": kernels}
    for name in sizes:
        script = textwrap.dedent(f"""
            import sys
            import rowcast
            assert not rowcast.decompress("{tmp_path}/{name}.rowcast", "{tmp_path}/out-{name}",
                                          model="{TINY}").failed
            print(sorted({{m.split(".")[0] for m in sys.modules}} & {{"numba"}}))
        """)
        result = subprocess.run([sys.executable, "-c", script], capture_output=True, text=True,
                                env=env)

        assert result.returncode == 0, result.stderr
        jit_loaded = kernels == "jit" and name == "large"
        assert result.stdout.strip() == ("['numba']" if jit_loaded else "[]"), name
        with Image.open(tmp_path / f"out-{name}" / "a.png") as back, \
                Image.open(tmp_path / name / "a.png") as original:
            assert np.array_equal(np.asarray(back), np.asarray(original))
