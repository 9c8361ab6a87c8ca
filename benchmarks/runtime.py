"""Speed of rowcast's run-time against JPEG XL (effort 9) and PNG, as a user runs it.

    python benchmarks/runtime.py [--counts 32,178,2000] [--threads 2]

Folders of 32, 178 and 2000 RGB thumbnails of 64 px (seeded random squares of scikit-image's
photographs, box-reduced: never used in training) and one 1024 x 768 photograph (a crop of
../shared/corpus/photos/bythewater.png when present, else scikit-image's coffee enlarged).
For each:

* rowcast as a user runs it: `rowcast compress DIR -o A` and `rowcast decompress A -o OUT`
  as processes, wall and CPU time (the children's rusage), start-up and file I/O included;
  every decoded PNG is compared with its input;
* rowcast in this process (start-up excluded): `codec.encode_batch` / `decode_batch` on the
  pixels, as the commands batch them;
* JPEG XL (lossless, effort 9) and PNG (zlib level 9) from imagecodecs on the same pixels,
  the images shared by a pool of as many processes as rowcast has workers, every result
  decoded and compared.

Also: start-up (`rowcast --help`, `rowcast list` and `rowcast decompress` of a one-image
archive), the model's multiply-adds per pixel, the machine's measured matrix throughput
(float32 BLAS, the decoder's int8 products) and the share of it the decoder reaches.
Prints the figures and writes benchmarks/RUNTIME.md and benchmarks/runtime.json.
"""

from __future__ import annotations

import compileall
import json
import multiprocessing as mp
import os
import platform
import resource
import shutil
import subprocess
import sys
import tempfile
import time
from datetime import date
from pathlib import Path

import imagecodecs
import numpy as np
import typer
from PIL import Image

import rowcast
from rowcast import codec, entrycodec, native, workers
from rowcast.entrycodec import Wanted
from rowcast.heldout import RGB_PHOTOS, data_dir
from rowcast.picture import Picture
from rowcast.predictor import Engine
from rowcast.quantize import load_model

HERE = Path(__file__).parent
LARGE = HERE.parent.parent / "shared" / "corpus" / "photos" / "bythewater.png"
TARGETS = {"decode_mps": 0.5, "encode_vs_jxl9": 1.0, "startup_s": 0.5, "peak_mib": 1024}


def thumbnails(count: int, seed: int = 0) -> list[np.ndarray]:
    """`count` 64-px RGB thumbnails (3, 64, 64): random squares of 64 to 256 px of the held-out
    photographs, box-reduced."""
    rng = np.random.default_rng(seed)
    photos = []
    for name in RGB_PHOTOS:
        with Image.open(data_dir() / name) as im:
            photos.append(im.convert("RGB"))
    out = []
    for i in range(count):
        img = photos[i % len(photos)]
        side = int(rng.integers(64, min(256, *img.size) + 1))
        x, y = (int(rng.integers(0, n - side + 1)) for n in img.size)
        small = img.crop((x, y, x + side, y + side)).resize((64, 64), Image.Resampling.BOX)
        out.append(np.ascontiguousarray(np.asarray(small).transpose(2, 0, 1)))
    return out


def large_image() -> tuple[np.ndarray, str]:
    """One 1024 x 768 RGB photograph (3, 768, 1024) and where it came from."""
    if LARGE.exists():
        with Image.open(LARGE) as im:
            img, origin = im.convert("RGB"), "crop of shared/corpus/photos/bythewater.png"
    else:
        with Image.open(data_dir() / "coffee.png") as im:
            img = im.convert("RGB").resize((1200, 800), Image.Resampling.LANCZOS)
            origin = "scikit-image's coffee.png enlarged"
    w, h = img.size
    box = ((w - 1024) // 2, (h - 768) // 2, (w - 1024) // 2 + 1024, (h - 768) // 2 + 768)
    return np.ascontiguousarray(np.asarray(img.crop(box)).transpose(2, 0, 1)), origin


def write_folder(images: list[np.ndarray], folder: Path) -> None:
    folder.mkdir(parents=True)
    for i, planes in enumerate(images):
        Image.fromarray(planes.transpose(1, 2, 0)).save(folder / f"{i:05d}.png")


def timed_process(args: list[str]) -> tuple[float, float]:
    """(wall, CPU) seconds of a command run to its end; fails loudly if it fails."""
    before = resource.getrusage(resource.RUSAGE_CHILDREN)
    start = time.perf_counter()
    subprocess.run(args, check=True, stdout=subprocess.DEVNULL)
    wall = time.perf_counter() - start
    after = resource.getrusage(resource.RUSAGE_CHILDREN)
    return wall, (after.ru_utime - before.ru_utime) + (after.ru_stime - before.ru_stime)


def rowcast_cli(images: list[np.ndarray], tmp: Path, threads: int) -> dict:
    """compress and decompress a folder of the images as the commands run, checked."""
    folder, archive, out = tmp / "in", tmp / "a.rowcast", tmp / "out"
    write_folder(images, folder)
    exe = [sys.executable, "-m", "rowcast"]
    enc = timed_process([*exe, "compress", str(folder), "-o", str(archive), "--quiet",
                         "--threads", str(threads)])
    dec = timed_process([*exe, "decompress", str(archive), "-o", str(out), "--quiet",
                         "--threads", str(threads)])
    for i, planes in enumerate(images):
        back = np.asarray(Image.open(out / f"{i:05d}.png").convert("RGB"))
        assert np.array_equal(back.transpose(2, 0, 1), planes), f"image {i} differs"
    return {"encode": enc, "decode": dec, "bytes": archive.stat().st_size}


def rowcast_in_process(engine: Engine, images: list[np.ndarray], threads: int) -> dict:
    """The commands' coding without start-up or files: `entrycodec.encode_pictures` and
    `decode_values` (in the commands' batches, tiles for large pictures) on `threads` processes, and
    the decoding again on one, checked."""
    pictures = [Picture(im, "RGB") for im in images]
    workers.set_threads(threads)
    cpu, start = _cpu(), time.perf_counter()
    coded = entrycodec.encode_pictures(engine, pictures)
    enc = (time.perf_counter() - start, _cpu() - cpu)
    wanted = [Wanted(p.pixel_format, p.width, p.height, c.method, c.payload)
              for p, c in zip(pictures, coded, strict=True)]
    out = {"encode": enc, "bytes": sum(len(c.payload) for c in coded)}
    for key, count in (("decode", threads), ("decode_one_thread", 1)):
        workers.set_threads(count)
        cpu, start = _cpu(), time.perf_counter()
        decoded = entrycodec.decode_values(engine, wanted)
        out[key] = (time.perf_counter() - start, _cpu() - cpu)
        assert all(np.array_equal(d, im) for d, im in zip(decoded, images, strict=True))
    workers.set_threads(threads)
    return out


def _cpu() -> float:
    """CPU seconds of this process and its reaped children."""
    return sum(getattr(resource.getrusage(who), f) for who in (resource.RUSAGE_SELF,
                                                               resource.RUSAGE_CHILDREN)
               for f in ("ru_utime", "ru_stime"))


def _jxl_encode(planes: np.ndarray) -> bytes:
    return bytes(imagecodecs.jpegxl_encode(np.ascontiguousarray(planes.transpose(1, 2, 0)),
                                           lossless=True, effort=9,
                                           numthreads=1))


def _jxl_decode(data: bytes) -> np.ndarray:
    return imagecodecs.jpegxl_decode(data, numthreads=1)


def _png_encode(planes: np.ndarray) -> bytes:
    return bytes(imagecodecs.png_encode(np.ascontiguousarray(planes.transpose(1, 2, 0)),
                                        level=9))


def _png_decode(data: bytes) -> np.ndarray:
    return imagecodecs.png_decode(data)


def pooled(fn, items: list, processes: int) -> tuple[list, float, float]:
    """(results, wall, CPU) of fn over items shared by a pool of processes."""
    cpu, start = _cpu(), time.perf_counter()
    with mp.get_context("fork").Pool(processes) as pool:
        out = pool.map(fn, items, chunksize=max(1, len(items) // (4 * processes)))
        pool.close()
        pool.join()
    return out, time.perf_counter() - start, _cpu() - cpu


def conventional(images: list[np.ndarray], processes: int) -> dict:
    """JPEG XL effort 9 and PNG: encode and decode times and bytes, checked."""
    figures = {}
    for name, enc, dec in (("jxl9", _jxl_encode, _jxl_decode), ("png", _png_encode,
                                                                 _png_decode)):
        coded, e_wall, e_cpu = pooled(enc, images, processes)
        decoded, d_wall, d_cpu = pooled(dec, coded, processes)
        for planes, back in zip(images, decoded, strict=True):
            assert np.array_equal(back.transpose(2, 0, 1), planes), name
        figures[name] = {"encode": (e_wall, e_cpu), "decode": (d_wall, d_cpu),
                         "bytes": sum(map(len, coded))}
    return figures


def startup(tmp: Path) -> dict:
    """Seconds to the end of `--help`, `list` and `decompress` of a one-image archive."""
    folder = tmp / "one"
    write_folder(thumbnails(1, seed=9), folder)
    archive = tmp / "one.rowcast"
    exe = [sys.executable, "-m", "rowcast"]
    subprocess.run([*exe, "compress", str(folder), "-o", str(archive), "--quiet"], check=True)
    out = {}
    for name, args in (("help", ["--help"]), ("list", ["list", str(archive)]),
                       ("decompress", ["decompress", str(archive), "-o", str(tmp / "o"),
                                       "--quiet", "--force"])):
        out[name] = min(timed_process([*exe, *args])[0] for _ in range(3))
    return out


def throughput() -> dict:
    """The machine's matrix throughput on one core, GMAC/s: float32 BLAS on 512 x 512
    products, and the decoder's int8 products (`intkernels.dense`, as `native` compiled
    it) on head 2's shape for a batch of 64 images."""
    from rowcast.intkernels import packed, vnni

    dense = native.kernels().dense
    rng = np.random.default_rng(0)
    a = rng.integers(0, 256, (512, 512)).astype(np.float32)
    reps, start = 20, time.perf_counter()
    for _ in range(reps):
        a @ a
    blas = reps * 512**3 / (time.perf_counter() - start) / 1e9
    x = rng.integers(0, 256, (64, 256)).astype(np.uint8)
    w = packed(rng.integers(-127, 128, (256, 256)).astype(np.int8))
    out = np.empty((64, 256), np.int32)
    dense(x, w, out)
    reps, start = 2000, time.perf_counter()
    for _ in range(reps):
        dense(x, w, out)
    dot = reps * 64 * 256 * 256 / (time.perf_counter() - start) / 1e9
    return {"blas_float32_gmacs": blas, "int8_dot_gmacs": dot, "vnni": vnni(),
            "kernels": native.kind()}


def macs_per_pixel(engine: Engine) -> int:
    """Multiply-adds per pixel of the model: every layer's weights once per pixel."""
    return int(sum(layer.weight.size for layer in engine.model.layers))


def main(counts: str = "32,178,2000", threads: int = 2, large: bool = True) -> None:
    """Run everything, print the figures, write RUNTIME.md and runtime.json."""
    workers.set_threads(1)
    # as an install leaves it: the package's bytecode compiled (PYTHONDONTWRITEBYTECODE or
    # an editable install would leave every command compiling it, about 75 ms here) and the
    # kernels prebuilt for this machine (`native`: built once, on first use)
    compileall.compile_dir(Path(rowcast.__file__).parent, quiet=1)
    native.kernels()
    engine = Engine(load_model())
    sets = [(f"{n} thumbnails of 64 px", thumbnails(n)) for n in map(int, counts.split(","))]
    if large:
        image, origin = large_image()
        sets.append((f"one 1024 x 768 image ({origin})", [image]))
    codec.decode_batch(engine, [codec.encode_batch(engine, sets[0][1][:1])[0].payload], 3,
                       64, 64, methods="adaptive")  # compile or load the decoder's loop
    rows = []
    with tempfile.TemporaryDirectory() as tmpdir:
        tmp = Path(tmpdir)
        start_up = startup(tmp)
        for i, (name, images) in enumerate(sets):
            mp_ = sum(im.shape[1] * im.shape[2] for im in images) / 1e6
            cli = rowcast_cli(images, tmp / f"set{i}", threads)
            inproc = rowcast_in_process(engine, images, threads)
            others = conventional(images, threads)
            rows.append({"set": name, "images": len(images), "megapixels": mp_, "cli": cli,
                         "in_process": inproc, **others})
            print(_row_text(rows[-1]), flush=True)
            shutil.rmtree(tmp / f"set{i}")
    machine = throughput()
    macs = macs_per_pixel(engine)
    figures = {"date": date.today().isoformat(), "rowcast": rowcast.__version__,
               "model": engine.model.name, "machine": platform.processor() or platform.machine(),
               "cpus": os.cpu_count(), "threads": threads, "startup_s": start_up,
               "macs_per_pixel": macs, **machine, "sets": rows, "targets": TARGETS,
               "peak_mib": resource.getrusage(resource.RUSAGE_CHILDREN).ru_maxrss / 1024}
    (HERE / "runtime.json").write_text(json.dumps(figures, indent=1) + "\n")
    (HERE / "RUNTIME.md").write_text(report(figures))
    print(report(figures))


def _mps(figure: tuple[float, float], mp_: float) -> tuple[float, float]:
    """(MP/s of wall time, MP/s per CPU-second)."""
    return mp_ / figure[0], mp_ / figure[1]


def _row_text(row: dict) -> str:
    mp_ = row["megapixels"]
    parts = [row["set"]]
    for key, label in (("cli", "rowcast CLI"), ("in_process", "rowcast"), ("jxl9", "JXL e9"),
                       ("png", "PNG")):
        enc, dec = _mps(row[key]["encode"], mp_), _mps(row[key]["decode"], mp_)
        parts.append(f"{label}: enc {enc[0]:.3f} dec {dec[0]:.3f} MP/s")
    return " | ".join(parts)


def report(f: dict) -> str:
    """RUNTIME.md from the figures."""
    lines = [
        "# Run-time speed: rowcast against JPEG XL (effort 9) and PNG",
        "",
        f"`python benchmarks/runtime.py` on {f['date']}, rowcast {f['rowcast']}, model "
        f"`{f['model']}`, {f['cpus']} CPUs, {f['threads']} threads (rowcast's worker processes;"
        f" the conventional codecs in a pool of as many single-threaded processes). MP/s is "
        "megapixels per second of wall time; per CPU-s divides by the CPU time of all "
        "processes. The CLI rows run `rowcast compress` / `rowcast decompress` as processes "
        "(start-up, reading and writing PNG files included); the in-process rows time the "
        "coder alone. Every result was decoded and compared with its input.",
        "",
        "| images | codec | encode MP/s | per CPU-s | decode MP/s | per CPU-s | bpsp |",
        "|---|---|---:|---:|---:|---:|---:|",
    ]
    for row in f["sets"]:
        mp_ = row["megapixels"]
        for key, label in (("cli", "rowcast, CLI"), ("in_process", "rowcast, in process"),
                           ("jxl9", "JPEG XL e9"), ("png", "PNG")):
            enc, dec = _mps(row[key]["encode"], mp_), _mps(row[key]["decode"], mp_)
            bpsp = 8 * row[key]["bytes"] / (mp_ * 1e6 * 3)
            lines.append(f"| {row['set']} | {label} | {enc[0]:.3f} | {enc[1]:.3f} | "
                         f"{dec[0]:.3f} | {dec[1]:.3f} | {bpsp:.3f} |")
    lines += ["", "Ratios (rowcast CLI against the codec, wall time; above 1 is faster):", "",
              "| images | encode vs JXL e9 | decode vs JXL e9 | encode vs PNG | decode vs PNG |",
              "|---|---:|---:|---:|---:|"]
    for row in f["sets"]:
        cli = row["cli"]
        ratio = [row[c][k][0] / cli[k][0] for c in ("jxl9", "png") for k in ("encode",
                                                                              "decode")]
        lines.append(f"| {row['set']} | {ratio[0]:.2f} | {ratio[1]:.3f} | {ratio[2]:.3f} | "
                     f"{ratio[3]:.4f} |")
    lines += ["", "Both cores (in process, decode): one thread against "
              f"{f['threads']} worker processes:", "",
              "| images | 1 thread MP/s | workers MP/s | gain |", "|---|---:|---:|---:|"]
    for row in f["sets"]:
        one = row["megapixels"] / row["in_process"]["decode_one_thread"][0]
        both = row["megapixels"] / row["in_process"]["decode"][0]
        lines.append(f"| {row['set']} | {one:.3f} | {both:.3f} | {both / one:.2f} x |")
    s = f["startup_s"]
    thumbs = [r for r in f["sets"] if r["images"] > 1]
    best = max(thumbs, key=lambda r: r["megapixels"]) if thumbs else f["sets"][0]
    per_cpu = best["megapixels"] / best["in_process"]["decode"][1]  # MP per CPU-second
    reached = f["macs_per_pixel"] * per_cpu * 1e6 / 1e9
    lines += [
        "",
        f"Start-up (best of 3): `rowcast --help` {s['help']:.2f} s, `rowcast list` of a "
        f"one-image archive {s['list']:.2f} s, `rowcast decompress` of it {s['decompress']:.2f}"
        " s (to the written file).",
        "",
        f"Arithmetic: the model does {f['macs_per_pixel']:,} multiply-adds per pixel. One "
        f"core of this machine does {f['blas_float32_gmacs']:.1f} GMAC/s in float32 BLAS and "
        f"{f['int8_dot_gmacs']:.1f} GMAC/s in the decoder's int8 products (`intkernels.dense`, "
        f"{'AVX-512 VNNI' if f.get('vnni') else 'portable vector code'}, "
        f"{f.get('kernels', 'jit')} kernels); the decoder "
        f"({best['set']}, in process) reaches {reached:.1f} GMAC/s per CPU-second, "
        f"{reached / f['int8_dot_gmacs']:.0%} of the int8 rate: the rest of its time is the "
        "work around the products (windows, requantisation, tables, range decoding).",
        "",
        f"Targets (issue 18): decode >= {TARGETS['decode_mps']} MP/s on 2 cores as the CLI "
        f"runs it; encode >= {TARGETS['encode_vs_jxl9']} x JPEG XL effort 9; start-up < "
        f"{TARGETS['startup_s']} s; peak memory <= {TARGETS['peak_mib']} MiB (this run's "
        f"largest child: {f['peak_mib']:.0f} MiB).",
        "",
    ]
    return "\n".join(lines)


if __name__ == "__main__":
    typer.run(main)
