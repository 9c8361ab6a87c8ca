"""Size and speed of rowcast against conventional lossless codecs, on held-out thumbnails.

    python benchmarks/bench.py [--model FILE] [--threads 2] [--batch 128]

Images: 64-px thumbnails of the photographs in scikit-image's wheel (never used in training):
8 RGB photos x 4 crops = 32 RGB thumbnails, and 6 gray photos. Every codec runs in this
process on the same pixels; each result is checked to decode exactly. Prints the figures and
writes benchmarks/RESULTS.md and benchmarks/results.json.
"""

from __future__ import annotations

import io
import json
import platform
import resource
import sys
import tempfile
import threading
import time
from datetime import date
from pathlib import Path

import numpy as np
import typer
from PIL import Image

import rowcast
from rowcast import codec, entrycodec, workers
from rowcast.heldout import GRAY_PHOTOS, RGB_PHOTOS, thumbnails, write_pngs
from rowcast.predictor import Engine
from rowcast.quantize import load_model

HERE = Path(__file__).parent
TARGETS = {"size_vs_png": 0.72, "encode_mps": 0.1, "decode_mps": 0.05, "peak_mib": 1024}


def _hwc(planes: np.ndarray) -> np.ndarray:
    return planes[0] if planes.shape[0] == 1 else np.ascontiguousarray(planes.transpose(1, 2, 0))


def _pillow(fmt: str, **options):
    def encode(planes: np.ndarray) -> bytes:
        buf = io.BytesIO()
        Image.fromarray(_hwc(planes)).save(buf, format=fmt, **options)
        return buf.getvalue()

    def decode(data: bytes) -> np.ndarray:
        return np.asarray(Image.open(io.BytesIO(data)))

    return encode, decode


def _imagecodecs(name: str, **options):
    import imagecodecs

    enc, dec = getattr(imagecodecs, f"{name}_encode"), getattr(imagecodecs, f"{name}_decode")
    return (lambda planes: bytes(enc(_hwc(planes), **options))), dec


def baselines() -> dict:
    """The conventional lossless codecs available here, each as (encode, decode)."""
    codecs = {
        "PNG (Pillow, zlib level 9, optimize)": _pillow("PNG", optimize=True, compress_level=9),
        "WebP lossless (Pillow, method 6)": _pillow("WEBP", lossless=True, quality=100, method=6),
    }
    try:
        codecs["JPEG 2000 reversible (imagecodecs)"] = _imagecodecs("jpeg2k", level=0,
                                                                    reversible=True)
        codecs["JPEG-LS (imagecodecs)"] = _imagecodecs("jpegls", level=0)
        codecs["JPEG XL lossless, effort 9 (imagecodecs)"] = _imagecodecs(
            "jpegxl", lossless=True, effort=9)
    except ImportError:
        pass
    return codecs


def _same(decoded: np.ndarray, planes: np.ndarray) -> bool:
    """Exact equality; a gray image that a codec returns as RGB must have R = G = B = gray."""
    expected = _hwc(planes)
    if decoded.ndim == 3 and expected.ndim == 2:
        return all(np.array_equal(decoded[..., i], expected) for i in range(decoded.shape[2]))
    return np.array_equal(decoded.reshape(expected.shape), expected)


def baseline_bits(images: list[np.ndarray], encode, decode) -> float | None:
    """Bits per subpixel of one codec over images, or None if it fails on any of them."""
    total = 0
    for planes in images:
        try:
            data = encode(planes)
        except Exception:  # a codec that cannot take this image is reported as n/a
            return None
        if not _same(np.asarray(decode(data)), planes):
            raise SystemExit("a baseline codec was not lossless: benchmark invalid")
        total += len(data)
    return 8.0 * total / sum(p.size for p in images)


class MemoryPeak(threading.Thread):
    """Peak of this process's resident memory plus its children's private memory (pages
    they do not share with it), sampled every 50 ms from /proc: the footprint of a decode
    shared by forked processes, shared pages counted once. Linux only (else 0)."""

    def __init__(self) -> None:
        super().__init__(daemon=True)
        self.peak_kib, self.done = 0, threading.Event()

    @staticmethod
    def _field(path: str, names: tuple[str, ...]) -> int:
        try:
            text = Path(path).read_text()
        except OSError:  # a child that has just exited
            return 0
        return sum(int(line.split()[1]) for line in text.splitlines()
                   if line.split(":")[0] in names)

    def run(self) -> None:
        while not self.done.wait(0.05):
            kids = []
            for task in Path("/proc/self/task").iterdir():
                try:
                    kids += (task / "children").read_text().split()
                except OSError:
                    pass
            total = self._field("/proc/self/status", ("VmRSS",)) + sum(
                self._field(f"/proc/{pid}/smaps_rollup", ("Private_Clean", "Private_Dirty"))
                for pid in kids)
            self.peak_kib = max(self.peak_kib, total)


def decode_all(engine: Engine, coded: list, planes: int, h: int, w: int,
               batch: int) -> np.ndarray:
    """Decode the images together in batches, as the archive reader does."""
    return np.concatenate([
        codec.decode_batch(engine, [c.payload for c in coded[i : i + batch]], planes, h, w,
                           methods=[c.method for c in coded[i : i + batch]])
        for i in range(0, len(coded), batch)])


def rowcast_run(engine: Engine, images: list[np.ndarray], model: Path | None, tmp: Path,
                mode: str, batch: int) -> dict:
    """Archive size, cross-entropy, and timed encode/decode of images coded together."""
    start = time.perf_counter()
    coded = codec.encode_batch(engine, images)
    encode_s = time.perf_counter() - start
    planes, h, w = images[0].shape
    codec._models.cache_clear()  # the first run meets every table for the first time;
    decode_s = []  # later runs reuse the coder's models of them, as a long decoding job does
    for _ in range(3):
        start = time.perf_counter()
        decoded = decode_all(engine, coded, planes, h, w, batch)
        decode_s.append(time.perf_counter() - start)
        if not np.array_equal(decoded, np.stack(images)):
            raise SystemExit("rowcast round trip failed: benchmark invalid")
    folder = tmp / mode
    write_pngs([(f"{i:02d}", p) for i, p in enumerate(images)], folder, mode)
    summary = rowcast.compress([folder], tmp / f"{mode}.rowcast", model=model)
    subpixels = sum(p.size for p in images)
    payload = sum(len(c.payload) for c in coded)
    return {
        "images": len(images),
        "archive_bpsp": 8.0 * summary.archive_bytes / subpixels,
        "payload_bpsp": 8.0 * payload / subpixels,
        "cross_entropy_bpsp": sum(c.cross_entropy for c in coded) / subpixels,
        "tuning_bpsp": sum(c.tuning_bits for c in coded) / subpixels,
        "encode_mps": len(images) * h * w / encode_s / 1e6,
        "decode_mps": len(images) * h * w / decode_s[0] / 1e6,
        "decode_warm_mps": len(images) * h * w / float(np.median(decode_s[1:])) / 1e6,
    }


def _floor_ratio(figures: dict) -> float:
    """Payload over its floor: the pixels' cross-entropy plus the tuning fields' length."""
    return figures["payload_bpsp"] / (figures["cross_entropy_bpsp"] + figures["tuning_bpsp"])


def main(model: Path | None = None, threads: int = 2, batch: int = entrycodec.BATCH) -> None:
    """Run everything, print the figures, write RESULTS.md and results.json."""
    workers.set_threads(threads)
    memory = MemoryPeak()
    memory.start()
    engine = Engine(load_model(model))
    rgb = [p for _, p in thumbnails(RGB_PHOTOS, "RGB", 64, crops=4)]
    gray = [p for _, p in thumbnails(GRAY_PHOTOS, "L", 64)]
    codec.encode_batch(engine, rgb[:1])  # warm-up: table loading and kernel selection
    with tempfile.TemporaryDirectory() as tmp:
        ours = {"RGB": rowcast_run(engine, rgb, model, Path(tmp), "RGB", batch),
                "L": rowcast_run(engine, gray, model, Path(tmp), "L", batch)}
    sizes = {name: {"RGB": baseline_bits(rgb, *c), "L": baseline_bits(gray, *c)}
             for name, c in baselines().items()}
    memory.done.set()
    memory.join()
    peak_mib = max(memory.peak_kib, resource.getrusage(resource.RUSAGE_SELF).ru_maxrss) / 1024
    png = sizes["PNG (Pillow, zlib level 9, optimize)"]
    results = {
        "date": date.today().isoformat(),
        "command": "python benchmarks/bench.py " + " ".join(sys.argv[1:]),
        "machine": f"{platform.machine()}, {workers.threads()} threads, "
                   f"python {platform.python_version()}, numpy {np.__version__}",
        "model": engine.model.name,
        "model_sha256": engine.model.sha256.hex(),
        "batch": batch,
        "rowcast": ours,
        "baselines": sizes,
        "ratio_to_png": {m: ours[m]["archive_bpsp"] / png[m] for m in ("RGB", "L")},
        "peak_mib": peak_mib,
    }
    (HERE / "results.json").write_text(json.dumps(results, indent=2) + "\n")
    (HERE / "RESULTS.md").write_text(render(results))
    print(render(results))


def _fmt(x: float | None) -> str:
    return "n/a" if x is None else f"{x:.3f}"


def render(r: dict) -> str:
    """RESULTS.md: the size table, the floor, the speed, the targets."""
    ours, rgb_n, gray_n = r["rowcast"], r["rowcast"]["RGB"]["images"], r["rowcast"]["L"]["images"]
    lines = [
        "# Benchmark results",
        "",
        f"Produced by `{r['command'].strip()}` on {r['date']} ({r['machine']}); "
        f"model `{r['model']}` ({r['model_sha256'][:16]}).",
        f"Images: {rgb_n} RGB and {gray_n} gray 64x64 thumbnails of the photographs in "
        "scikit-image's wheel (held out of training). Lower is better; every codec was checked "
        "to round-trip exactly.",
        "",
        "| codec | RGB bits per subpixel | gray bits per subpixel |",
        "|---|---|---|",
        f"| **rowcast** (whole archive: header, index, payloads) | "
        f"**{ours['RGB']['archive_bpsp']:.3f}** | **{ours['L']['archive_bpsp']:.3f}** |",
    ]
    for name, s in r["baselines"].items():
        lines.append(f"| {name} | {_fmt(s['RGB'])} | {_fmt(s['L'])} |")
    lines += [
        "",
        "| rowcast detail | RGB | gray |",
        "|---|---|---|",
        "| model cross-entropy (the floor), bpsp | "
        f"{ours['RGB']['cross_entropy_bpsp']:.4f} | {ours['L']['cross_entropy_bpsp']:.4f} |",
        "| tuning fields, range-coded inside the payloads (their code length), bpsp | "
        f"{ours['RGB']['tuning_bpsp']:.4f} | {ours['L']['tuning_bpsp']:.4f} |",
        "| payloads only, bpsp | "
        f"{ours['RGB']['payload_bpsp']:.4f} | {ours['L']['payload_bpsp']:.4f} |",
        "| payload / (cross-entropy + tuning fields) | "
        + " | ".join(f"{_floor_ratio(ours[m]):.4f}" for m in ("RGB", "L")) + " |",
        f"| archive size / PNG size | {r['ratio_to_png']['RGB']:.3f} | "
        f"{r['ratio_to_png']['L']:.3f} |",
        f"| encode, megapixels/s ({r['machine'].split(', ')[1]}) | "
        f"{ours['RGB']['encode_mps']:.3f} | {ours['L']['encode_mps']:.3f} |",
        f"| decode, megapixels/s ({rgb_n} and {gray_n} images decoded together, batch "
        f"{r['batch']}; a batch shared by single-threaded processes, one per thread, once "
        f"each gets 65,536 pixels), first run | {ours['RGB']['decode_mps']:.3f} | "
        f"{ours['L']['decode_mps']:.3f} |",
        "| decode, megapixels/s, again in the same process (median of 2 runs) | "
        f"{ours['RGB']['decode_warm_mps']:.3f} | {ours['L']['decode_warm_mps']:.3f} |",
        "",
        f"Peak memory: resident memory of the benchmark process plus the private memory of "
        f"the processes it forks to code (sampled every 50 ms): {r['peak_mib']:.0f} MiB.",
        "",
        "## Targets",
        "",
        "| target | wanted | measured | met |",
        "|---|---|---|---|",
    ]
    checks = [
        ("RGB archive size vs PNG", f"<= {TARGETS['size_vs_png']}", r["ratio_to_png"]["RGB"],
         r["ratio_to_png"]["RGB"] <= TARGETS["size_vs_png"]),
        ("RGB encode MP/s", f">= {TARGETS['encode_mps']}", ours["RGB"]["encode_mps"],
         ours["RGB"]["encode_mps"] >= TARGETS["encode_mps"]),
        ("RGB decode MP/s", f">= {TARGETS['decode_mps']}", ours["RGB"]["decode_mps"],
         ours["RGB"]["decode_mps"] >= TARGETS["decode_mps"]),
        ("peak memory MiB", f"< {TARGETS['peak_mib']}", r["peak_mib"],
         r["peak_mib"] < TARGETS["peak_mib"]),
    ]
    jxl = r["baselines"].get("JPEG XL lossless, effort 9 (imagecodecs)", {}).get("RGB")
    if jxl is not None:
        checks.append(("stretch: RGB size vs JPEG XL effort 9", "<= 1.0",
                       ours["RGB"]["archive_bpsp"] / jxl, ours["RGB"]["archive_bpsp"] <= jxl))
    for name, wanted, value, met in checks:
        lines.append(f"| {name} | {wanted} | {value:.3f} | {'yes' if met else 'no'} |")
    return "\n".join(lines) + "\n"


if __name__ == "__main__":
    typer.run(main)
