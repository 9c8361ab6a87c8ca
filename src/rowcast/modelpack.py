"""A model in few bytes, for archives that carry their model: its tensors as differences
from a model bundled with rowcast (its *base*), entropy-coded.

A model fine-tuned from a bundled one moves few of its integer weights, and those by a
step or two, so the differences are mostly zeros: stored as zigzag integers split into
byte planes, they shrink under LZMA to a fraction of the model file (the default model
file is 170 KB). A model with no bundled base of its shapes is packed whole the same way.

Layout (all of it opaque to the archive container, docs/FORMAT.md "Packed model"):
MAGIC, the base's SHA-256 (32 zero bytes: no base), then one LZMA (.xz) stream of: the
card's JSON length (4 bytes, big-endian) and JSON, then each tensor in name order: its
name, dtype and shape as one JSON line, and its values minus the base's (or the values
when the base has no such tensor) as zigzag integers in little-endian byte planes.
"""

from __future__ import annotations

import json
import lzma

import numpy as np

from rowcast.quantize import (
    IntModel,
    ModelError,
    bundled_model,
    bundled_names,
    load_model,
    model_from_bytes,
    to_bytes,
)

MAGIC = b"rowcast-packed-model-1\n"
NO_BASE = bytes(32)
MAX_UNPACKED = 1 << 26  # bytes an unpacked model may take: far above any rowcast model
WIDE = {"int8": np.int16, "int32": np.int64}  # where a tensor's differences fit
PLANES = {"int8": 2, "int32": 5}  # byte planes of a difference's zigzag form (< 2**9, 2**33)


def tensors_of(model: IntModel) -> dict[str, np.ndarray]:
    """A model's tensors by their file names."""
    out = {}
    for i, layer in enumerate(model.layers):
        out[f"layer{i}.weight"] = layer.weight
        out[f"layer{i}.bias"] = layer.bias.astype(np.int32)
        out[f"layer{i}.mult"] = layer.mult.astype(np.int32)
    return out


def _zigzag_planes(d: np.ndarray, planes: int) -> bytes:
    z = ((d.astype(np.int64) << 1) ^ (d.astype(np.int64) >> 63)).astype("<u8")
    return z.view(np.uint8).reshape(-1, 8)[:, :planes].T.tobytes()


def _from_planes(data: bytes, count: int, planes: int) -> np.ndarray:
    raw = np.zeros((count, 8), np.uint8)
    raw[:, :planes] = np.frombuffer(data, np.uint8).reshape(planes, count).T
    z = raw.view("<u8").reshape(-1).astype(np.int64)
    return (z >> 1) ^ -(z & 1)


def pack(model: IntModel, base: IntModel | None) -> bytes:
    """The packed form of `model` against `base` (None: no base)."""
    mine, theirs = tensors_of(model), tensors_of(base) if base is not None else {}
    body = [json.dumps(model.card, sort_keys=True, separators=(",", ":")).encode()]
    body.insert(0, len(body[0]).to_bytes(4, "big"))
    for name in sorted(mine):
        t = mine[name]
        ref = theirs.get(name)
        d = t.astype(np.int64) - (ref.astype(np.int64) if ref is not None
                                  and ref.shape == t.shape else 0)
        body.append(json.dumps([name, str(t.dtype), list(t.shape)]).encode() + b"\n")
        body.append(_zigzag_planes(d.reshape(-1), PLANES[str(t.dtype)]))
    sha = base.sha256 if base is not None else NO_BASE
    return MAGIC + sha + lzma.compress(b"".join(body), preset=9 | lzma.PRESET_EXTREME)


def smallest(model: IntModel) -> bytes:
    """The shortest packed form of `model`: against each bundled model of its architecture,
    or none."""
    bundled = (load_model(name) for name in bundled_names())
    bases = [None] + [b for b in bundled if b.card["architecture"] == model.card["architecture"]]
    return min((pack(model, base) for base in bases), key=len)


def unpack(data: bytes, origin: str) -> IntModel:
    """The model a packed form holds; ModelError for anything malformed, for a base this
    rowcast does not bundle, and for a model that fails the model file's checks."""
    if not data.startswith(MAGIC) or len(data) < len(MAGIC) + 32:
        raise ModelError(f"{origin}: not a packed rowcast model")
    sha = data[len(MAGIC) : len(MAGIC) + 32]
    base = None
    if sha != NO_BASE:
        base = bundled_model(sha)
        if base is None:
            raise ModelError(f"{origin}: packed against model {sha.hex()[:16]}, which this "
                             "rowcast does not bundle")
    inflater = lzma.LZMADecompressor()
    try:
        body = inflater.decompress(data[len(MAGIC) + 32 :], MAX_UNPACKED + 1)
    except lzma.LZMAError:
        raise ModelError(f"{origin}: packed model does not inflate") from None
    if not inflater.eof or len(body) > MAX_UNPACKED or inflater.unused_data:
        raise ModelError(f"{origin}: packed model is truncated or too large")
    try:
        card, tensors = _parse(body, tensors_of(base) if base is not None else {})
    except (ValueError, KeyError, TypeError, IndexError) as exc:
        raise ModelError(f"{origin}: malformed packed model ({exc})") from None
    return model_from_bytes(to_bytes(card, tensors), origin)


def _parse(body: bytes, theirs: dict[str, np.ndarray]) -> tuple[dict, dict]:
    length = int.from_bytes(body[:4], "big")
    card = json.loads(body[4 : 4 + length])
    pos, tensors = 4 + length, {}
    while pos < len(body):
        end = body.index(b"\n", pos)
        name, dtype, shape = json.loads(body[pos:end])
        if dtype not in PLANES or not all(isinstance(n, int) and n >= 0 for n in shape):
            raise ValueError(f"tensor {name!r} of dtype {dtype} and shape {shape}")
        count, planes = int(np.prod(shape, dtype=np.int64)), PLANES[dtype]
        pos = end + 1
        if count * planes > len(body) - pos:
            raise ValueError(f"tensor {name!r} runs past the packed model")
        d = _from_planes(body[pos : pos + count * planes], count, planes).reshape(shape)
        pos += count * planes
        ref = theirs.get(name)
        if ref is not None and list(ref.shape) == shape:
            d = d + ref.astype(np.int64)
        info = np.iinfo(dtype)
        if d.size and (d.min() < info.min or d.max() > info.max):
            raise ValueError(f"tensor {name!r} leaves {dtype}")
        tensors[name] = d.astype(dtype)
    return card, tensors
