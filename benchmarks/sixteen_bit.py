"""Ways of coding 16-bit gray images with the 8-bit predictor, against conventional codecs.

Reads the 16-bit gray PNG thumbnails under ../shared/corpus/thumbs/sci (imagecodecs), codes
each one every way below in this one process, and writes benchmarks/sixteen_bit.md and
benchmarks/sixteen_bit.json. Bits per subpixel = 8 x bytes / pixels, side parameters
included. The design subset (every 4th file of the sorted list) is what choices were made
on; the figures are also given on all files.

  python benchmarks/sixteen_bit.py [--limit N] [--verify N]
"""

from __future__ import annotations

import argparse
import json
import platform
import time
from collections import defaultdict
from pathlib import Path

import imagecodecs
import numpy as np

from rowcast import codec, deep, predictor, quantize

CORPUS = Path(__file__).resolve().parents[2] / "shared" / "corpus" / "thumbs" / "sci"
HERE = Path(__file__).resolve().parent
SCHEMES = {
    "png": "PNG, level 9 (imagecodecs)",
    "jpegls": "JPEG-LS (imagecodecs)",
    "jxl": "JPEG XL lossless, effort 9 (imagecodecs)",
    "hilo": "high byte, then low byte, each a predictor plane",
    "fine_plane": "range split; fine bits a second predictor plane",
    "fine_uniform": "range split; fine bits literal (k bits each)",
    "fine_coded": "range split; fine bits range-coded given the coarse plane (deep.split)",
    "fine_coded_k1": "as fine_coded with k one larger (deep.split(extra=1))",
    "fine_coded_best": "per image the shorter of fine_coded and fine_coded_k1 (+0 bytes)",
    "cross_entropy": "fine_coded with the coarse plane at the model's cross-entropy",
}
BASELINES = {
    "png": (lambda a: imagecodecs.png_encode(a, level=9), imagecodecs.png_decode),
    "jpegls": (imagecodecs.jpegls_encode, imagecodecs.jpegls_decode),
    "jxl": (lambda a: imagecodecs.jpegxl_encode(a, lossless=True, effort=9),
            imagecodecs.jpegxl_decode),
}


def images(limit: int | None) -> list[tuple[str, np.ndarray]]:
    """(name, (H, W) uint16) of the 16-bit gray thumbnails, sorted by path."""
    out = []
    for path in sorted(CORPUS.rglob("*.png")):
        a = imagecodecs.imread(path)
        if a.dtype == np.uint16 and a.ndim == 2:
            out.append((str(path.relative_to(CORPUS)), a))
    return out[:limit] if limit else out


def baselines(a: np.ndarray) -> dict[str, int]:
    """Bytes of each conventional codec, each decoded back and compared value for value."""
    sizes = {}
    for name, (enc, dec) in BASELINES.items():
        data = enc(a)
        back = dec(data)
        if back.dtype != a.dtype or not np.array_equal(back.reshape(a.shape), a):
            raise RuntimeError(f"{name} did not give the image back")
        sizes[name] = len(data)
    return sizes


def planes_of(a: np.ndarray) -> dict[str, np.ndarray | None]:
    """The predictor planes each scheme needs, (1, H, W) uint8, and the other pieces."""
    v = a.astype(np.int64)
    hi, lo = (v >> 8).astype(np.uint8)[None], (v & 255).astype(np.uint8)[None]
    out: dict = {"hi": hi, "lo": lo}
    for extra in (0, 1):
        t = time.perf_counter()
        params, (coarse,), code = deep.split(a[None], extra)
        out[f"split_s{extra}"] = time.perf_counter() - t
        out[f"params{extra}"], out[f"coarse{extra}"], out[f"code{extra}"] = params, coarse, code
    k = out["params0"][3] & 15
    base = (v - v.min()) >> (out["params0"][3] >> 4)
    out["fine"] = (base & ((1 << k) - 1)).astype(np.uint8)[None] if k else None
    out["k"] = k
    return out


def measure(engine, items: list[tuple[str, np.ndarray]], verify: int) -> dict[str, dict]:
    """Per image: bytes of every scheme, cross-entropy, times."""
    rows: dict[str, dict] = {}
    by_shape: dict[tuple, list] = defaultdict(list)
    for name, a in items:
        t = time.perf_counter()
        rows[name] = {"pixels": a.size, **baselines(a),
                      "baselines_s": time.perf_counter() - t}
        by_shape[a.shape].append((name, a, planes_of(a)))
    for group in by_shape.values():
        coded = {}
        for key in ("hi", "lo", "coarse0", "coarse1", "fine"):
            have = [(name, p[key]) for name, _, p in group if p[key] is not None]
            if not have:
                continue
            t = time.perf_counter()
            result = codec.encode_batch(engine, [x for _, x in have], "adaptive", workers=1)
            each = (time.perf_counter() - t) / len(have)
            for (name, _), c in zip(have, result, strict=True):
                coded[name, key] = (c, each)
        for name, a, p in group:
            row = rows[name]

            def size(key: str, name=name, coded=coded) -> int:
                return len(coded[name, key][0].payload) if (name, key) in coded else 0

            code = [0 if p[f"code{e}"] is None else len(p[f"code{e}"]) for e in (0, 1)]
            row["k"] = p["k"]
            row["hilo"] = size("hi") + size("lo")
            row["fine_plane"] = deep.MAX_PARAMS + size("coarse0") + size("fine")
            row["fine_uniform"] = deep.MAX_PARAMS + size("coarse0") + -(-p["k"] * a.size // 8)
            row["fine_coded"] = deep.MAX_PARAMS + size("coarse0") + code[0]
            row["fine_coded_k1"] = deep.MAX_PARAMS + size("coarse1") + code[1]
            row["fine_coded_best"] = min(row["fine_coded"], row["fine_coded_k1"])
            row["cross_entropy"] = (deep.MAX_PARAMS + code[0]
                                    + coded[name, "coarse0"][0].cross_entropy / 8)
            row["split_s"] = p["split_s0"]
            row["coarse_encode_s"] = coded[name, "coarse0"][1]
            t = time.perf_counter()
            back = deep.join(p["params0"], [p["coarse0"]], p["code0"], (1, *a.shape))
            row["join_s"] = time.perf_counter() - t
            if not np.array_equal(back[0], a):
                raise RuntimeError(f"{name}: deep.join did not give the values back")
    decode_check(engine, items[::4][:verify], rows)
    return rows


def decode_check(engine, items: list[tuple[str, np.ndarray]], rows: dict) -> None:
    """The whole way back for a few images: the coarse payload through the predictor's
    decoder, then `deep.join`."""
    for name, a in items:
        params, planes, code = deep.split(a[None])
        (c,) = codec.encode_batch(engine, planes, "adaptive", workers=1)
        t = time.perf_counter()
        got = codec.decode_batch(engine, [c.payload], 1, *a.shape, methods=[c.method],
                                 workers=1)
        rows[name]["coarse_decode_s"] = time.perf_counter() - t
        if not np.array_equal(deep.join(params, [got[0]], code, (1, *a.shape))[0], a):
            raise RuntimeError(f"{name}: the decoded image differs")


def summary(rows: dict[str, dict], names: list[str]) -> dict[str, float]:
    pixels = sum(rows[n]["pixels"] for n in names)
    return {s: 8 * sum(rows[n][s] for n in names) / pixels for s in SCHEMES}


def report(rows: dict[str, dict], names: list[str], seconds: float) -> str:
    design = names[::4]
    parts = {"design": design, "all": names}
    sums = {k: summary(rows, v) for k, v in parts.items()}
    sources = sorted({n.split("/")[0] for n in names})
    lines = ["# 16-bit gray images: ways to use the 8-bit predictor", "",
             f"{len(names)} 16-bit gray PNG thumbnails of ../shared/corpus/thumbs/sci "
             f"({sum(rows[n]['pixels'] for n in names)} pixels); the design subset is every "
             f"4th file of the sorted list ({len(design)} files), on which the choices were "
             "made. Bits per subpixel (8 x bytes / pixels) over each set, parameters "
             "included; every baseline decoded back and compared value for value, and "
             "`deep.join` checked on every image.", "",
             "| scheme | design | all | what |", "|---|---|---|---|"]
    for s, what in SCHEMES.items():
        lines.append(f"| {s} | {sums['design'][s]:.4f} | {sums['all'][s]:.4f} | {what} |")
    lines += ["", "By source (all files):", "",
              "| source | files | " + " | ".join(SCHEMES) + " |",
              "|---|---|" + "---|" * len(SCHEMES)]
    for src in sources:
        these = [n for n in names if n.startswith(src + "/")]
        got = summary(rows, these)
        lines.append(f"| {src} | {len(these)} | "
                     + " | ".join(f"{got[s]:.3f}" for s in SCHEMES) + " |")
    timed = [n for n in names if "coarse_decode_s" in rows[n]]
    ms = {key: 1000 * np.mean([rows[n][key] for n in names])
          for key in ("split_s", "join_s", "coarse_encode_s")}
    mp = np.mean([rows[n]["pixels"] for n in names])
    lines += ["", f"Time per image (mean {mp:.0f} pixels, one process, {platform.machine()}): "
              f"`deep.split` {ms['split_s']:.1f} ms, `deep.join` {ms['join_s']:.1f} ms, the "
              f"coarse plane's predictor encoding {ms['coarse_encode_s']:.1f} ms (in batches of "
              "same-sized images)"]
    if timed:
        dec = np.sum([rows[n]["coarse_decode_s"] for n in timed])
        px = np.sum([rows[n]["pixels"] for n in timed])
        lines[-1] += (f"; decoding the coarse plane one image at a time "
                      f"{1e6 * dec / px:.1f} us per pixel ({len(timed)} images decoded "
                      "all the way back and compared)")
    lines[-1] += f". The whole run took {seconds:.0f} s."
    return "\n".join(lines) + "\n"


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--limit", type=int, default=None, help="first N files only")
    parser.add_argument("--verify", type=int, default=16,
                        help="design files decoded through the predictor")
    args = parser.parse_args()
    start = time.perf_counter()
    items = images(args.limit)
    engine = predictor.Engine(quantize.load_model())
    rows = measure(engine, items, args.verify)
    names = [n for n, _ in items]
    text = report(rows, names, time.perf_counter() - start)
    (HERE / "sixteen_bit.md").write_text(text)
    (HERE / "sixteen_bit.json").write_text(json.dumps(
        {"design": summary(rows, names[::4]), "all": summary(rows, names),
         "images": rows}, indent=1, default=float) + "\n")
    print(text)


if __name__ == "__main__":
    main()
