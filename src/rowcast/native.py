"""The compiled kernels, built ahead of time into an extension module once per machine.

The kernels (the network's int8 products, the range coder, the decoder's row loop, the
tuning search) are Python functions marked with `jit` in their modules. Python calls them
only through `kernels()`, a namespace of the entry points in `ENTRIES`:

* "prebuilt": an extension module that numba's ahead-of-time compiler builds for this
  machine's CPU the first time a process needs it (about 15 s, with a C compiler), kept in
  the package's __pycache__ (or the user's cache folder) under a name that hashes the
  kernels' sources, Python, numpy and the CPU. Later processes load it in about a
  millisecond and never import numba: this is what takes start-up from about 0.8 s to 0.3.
* "jit": numba's just-in-time compiler (machine code cached beside the modules), where no
  extension can be built (no C compiler; a failed build leaves its reason beside the
  module's name, `rowcast_kernels_<key>.failed`, and is not tried again for the same
  sources until that file is deleted), where NUMBA_CPU_NAME asks for another target (the
  tests' portable path) or where ROWCAST_KERNELS=jit asks for it.

Both compile the same functions with the same LLVM, and the integers they compute do not
depend on it; the tests hold both against the reference decoder.
"""

from __future__ import annotations

import contextlib
import functools
import hashlib
import importlib
import importlib.machinery
import importlib.util
import os
import platform
import shutil
import sys
import sysconfig
import tempfile
import time
import warnings
from pathlib import Path
from types import SimpleNamespace

import numpy as np

HERE = Path(__file__).parent
KERNEL_MODULES = ("intkernels", "rangecoder", "tablecdfs", "tuningkernel", "rowdecoder")
CONSTANT_MODULES = ("native", "family", "tables", "feedback")  # constants the kernels read
_I8 = "i8[::1]"
# The entry points Python calls: name -> (module, function, the types it is called with).
ENTRIES = {
    "conv_rows": ("intkernels", "conv_rows",
                  "void(u1[:,:,:,::1], i1[:,::1], i8[::1], i8[::1], i8, b1, u1[:,:,:,::1])"),
    "conv_rows_wide": ("intkernels", "conv_rows",  # int64 outputs: the network's last layer
                       "void(u1[:,:,:,::1], i1[:,::1], i8[::1], i8[::1], i8, b1, i8[:,:,:,::1])"),
    "dense": ("intkernels", "dense", "void(u1[:,::1], i1[::1], i4[:,::1])"),  # benchmarks
    "quantise": ("rangecoder", "quantise", "b1(f4[::1], u4[::1])"),
    "decoder_start": ("rangecoder", "decoder_start", "u8[::1](u4[::1])"),
    "decode_symbol": ("rangecoder", "decode_symbol", "i8(u8[::1], u4[::1], u4[::1], i8)"),
    "encoder_start": ("rangecoder", "encoder_start", "u8[::1]()"),
    "encode_tables": ("rangecoder", "encode_tables",
                      "Tuple((u4[::1], i8))(u8[::1], u4[::1], i8[::1], f4[:,::1])"),
    "encode_tables_wide": ("rangecoder", "encode_tables",  # float64 tables
                           "Tuple((u4[::1], i8))(u8[::1], u4[::1], i8[::1], f8[:,::1])"),
    "encode_rows": ("tablecdfs", "_encode_rows", "Tuple((u4[::1], i8))(u8[::1], u4[::1], "
                    "i8[::1], i8[::1], i8[::1], i8[::1], u4[:,::1], b1[::1])"),
    "lengths": ("tuningkernel", "_lengths",
                f"void({_I8}, {_I8}, {_I8}, {_I8}, i8[:,::1], i8[:,::1], {_I8}, i8[:,::1])"),
    "coupled_sums": ("tuningkernel", "_coupled_sums", f"void({', '.join([_I8] * 11)})"),
    "colour_costs": ("tuningkernel", "_colour_costs",
                     "void(i8[::1], i8[:,::1], i8[:,::1], i8[:,::1], i8[:,::1], i8, i8[::1])"),
    "feedback": ("tuningkernel", "_feedback", "void(i8[:,::1], i8[:,::1], i8[:,::1], "
                 "i8[:,::1], i8[:,::1], i8[::1], i8, i8[:,::1], i8[:,::1], i8[:,::1], "
                 "i8[:,::1])"),
    "head_rows": ("rowdecoder", "_head_rows",
                  "i4[:,:,::1](u1[:,:,::1], i1[::1], i8[:,::1], i8[:,::1])"),
    "row": ("rowdecoder", "_row",
            "i8(i8, i4[:,:,::1], u1[:,:,:,::1], i8, i1[::1], i8, i8[::1], i8, i1[::1], i8[::1], "
            "i8[::1], i8, i1[::1], i8[::1], i8[::1], i8, b1, i8[::1], i8[:,::1], i8[:,::1], "
            "b1, i8[:,::1], i8[:,::1], b1[::1], b1[::1], i8[:,:,:,::1], i8[:,:,:,::1], i8[:,::1], "
            "i8[::1], i8[::1], i8[:,::1], i8[:,::1], u4[:,::1], b1[::1], u8[:,::1], u4[::1], "
            "i8[::1], "
            "u1[:,::1], i4[:,::1], u1[:,::1], i4[:,::1], u1[:,::1], i4[:,::1], i8[:,::1])"),
}

_MARKED: list[tuple] = []  # (function, numba options) of every `jit` kernel
_LATER: list[tuple] = []  # (module name, global name, factory) of `later` objects


def jit(fn=None, **options):
    """Mark a kernel: it stays a plain function here, compiled by `kernels()` (with
    numba's options, e.g. inline="always")."""

    def mark(f):
        _MARKED.append((f, options))
        return f

    return mark(fn) if fn is not None else mark


def later(module: str, name: str, factory) -> None:
    """A global of a kernel module that only numba can make (an intrinsic), made by
    `factory()` when the kernels are compiled."""
    _LATER.append((module, name, factory))


def kind() -> str:
    """Which kernels this process runs: "prebuilt" or "jit"."""
    return kernels().kind


def _jit_wanted() -> bool:
    return os.environ.get("ROWCAST_KERNELS") == "jit" or "NUMBA_CPU_NAME" in os.environ


def ready() -> bool:
    """Whether `kernels()` costs little now: loaded in this process, or prebuilt for this
    machine (else it builds the module, or loads numba, first)."""
    return kernels.cache_info().currsize > 0 or (not _jit_wanted() and module_path().exists())


@functools.cache
def kernels() -> SimpleNamespace:
    """The entry points of `ENTRIES`, from the prebuilt extension module (built now if this
    machine has none yet) or else compiled just in time; `.kind` says which."""
    module = None if _jit_wanted() else prebuilt(module_path())
    if module is None:
        return jitted()
    return SimpleNamespace(kind="prebuilt", **{name: getattr(module, name) for name in ENTRIES})


def prebuilt(path: Path):
    """The prebuilt module at `path`, built now if it is not there; None where it cannot
    be: no C compiler, or a build of these sources that failed before (its reason is kept
    beside it, so later commands do not spend the compile again)."""
    failed = path.with_name(_module_name(path) + ".failed")
    if not path.exists():
        if failed.exists() or compiler() is None:
            return None
        try:
            build(path)
        except Exception as exc:  # a broken tool chain, a read-only cache
            with contextlib.suppress(OSError):
                failed.write_text(f"{type(exc).__name__}: {exc}\n")
            return None
    try:
        return load(path)
    except ImportError:
        return None


def compiler() -> str | None:
    """The C compiler that links the prebuilt module (Python's own, as extensions are
    built with), or None if there is none."""
    cc = os.environ.get("CC") or sysconfig.get_config_var("CC") or "cc"
    return shutil.which(cc.split()[0])


@functools.cache
def jitted() -> SimpleNamespace:
    """Every kernel as a numba dispatcher (compiled on first call, cached on disk), by the
    names of `ENTRIES` and by its own name. Each kernel module's globals become the
    dispatchers, so kernels calling each other are compiled together."""
    import numba

    for module in KERNEL_MODULES:
        importlib.import_module(f"rowcast.{module}")
    for module, name, factory in _LATER:
        setattr(sys.modules[f"rowcast.{module}"], name, factory())
    compiled = {id(f): numba.njit(cache=True, nogil=True, **opts)(f) for f, opts in _MARKED}
    for module in KERNEL_MODULES:
        space = vars(sys.modules[f"rowcast.{module}"])
        for name, value in list(space.items()):
            if id(value) in compiled:
                space[name] = compiled[id(value)]
    by_name = {f.__name__: compiled[id(f)] for f, _ in _MARKED}
    entries = {name: by_name[function] for name, (_, function, _) in ENTRIES.items()}
    return SimpleNamespace(kind="jit", **{**by_name, **entries})


def _cpu() -> str:
    """This CPU's name and features, as cheaply as the platform allows."""
    try:
        with open("/proc/cpuinfo") as f:
            return "".join(line for line in f.read().split("\n\n")[0].splitlines(True)
                           if line.startswith(("model name", "flags", "Features")))
    except OSError:
        import llvmlite.binding as llvm

        return llvm.get_host_cpu_name() + llvm.get_host_cpu_features().flatten()


@functools.cache
def key() -> str:
    """What the prebuilt module depends on: the kernels' sources, Python, numpy, the CPU."""
    h = hashlib.sha256()
    for name in (*KERNEL_MODULES, *CONSTANT_MODULES):
        h.update((HERE / f"{name}.py").read_bytes())
    h.update(f"{sys.version}|{np.__version__}|{platform.machine()}|{_cpu()}".encode())
    return h.hexdigest()[:16]


def cache_dir() -> Path:
    """Where prebuilt modules live: the package's __pycache__ when it can be written,
    else $XDG_CACHE_HOME/rowcast (~/.cache/rowcast)."""
    here = HERE / "__pycache__"
    if os.access(here if here.exists() else HERE, os.W_OK):
        return here
    base = os.environ.get("XDG_CACHE_HOME") or Path.home() / ".cache"
    return Path(base) / "rowcast"


def module_path() -> Path:
    name = f"rowcast_kernels_{key()}"
    return cache_dir() / (name + importlib.machinery.EXTENSION_SUFFIXES[0])


def _module_name(path: Path) -> str:
    """The module a prebuilt file holds: its name up to the first dot."""
    return path.name.split(".")[0]


def load(path: Path):
    """Import a prebuilt module from its file."""
    spec = importlib.util.spec_from_file_location(_module_name(path), path)
    module = importlib.util.module_from_spec(spec)
    spec.loader.exec_module(module)
    return module


def build(path: Path) -> None:
    """Compile `ENTRIES` for this machine's CPU into the extension module `path` (its name
    chooses the module's), written whole or not at all; older builds in its folder go, and
    so do work folders that a killed build left over an hour ago."""
    if sys.stderr.isatty():  # a person waits: say why, once per machine
        print("rowcast: compiling its kernels for this machine (once, about 15 s)",
              file=sys.stderr, flush=True)
    jitted()  # the kernel modules' globals become dispatchers: kernels see each other
    path.parent.mkdir(parents=True, exist_ok=True)
    for left in path.parent.glob(".build-*"):
        if time.time() - left.stat().st_mtime > 3600:
            shutil.rmtree(left, ignore_errors=True)
    work = Path(tempfile.mkdtemp(prefix=".build-", dir=path.parent))
    try:
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")  # numba marks its AOT compiler as pending removal
            from numba.pycc import CC

            cc = CC(_module_name(path), source_module=__name__)
            cc.output_dir = str(work)
            cc.target_cpu = "host"
            for name, (module, function, signature) in ENTRIES.items():
                kernel = getattr(sys.modules[f"rowcast.{module}"], function)
                cc.export(name, signature)(kernel.py_func)
            cc.compile()
        built = work / cc.output_file
        for old in path.parent.glob("rowcast_kernels_*"):
            old.unlink(missing_ok=True)
        os.replace(built, path)
    finally:
        shutil.rmtree(work, ignore_errors=True)
