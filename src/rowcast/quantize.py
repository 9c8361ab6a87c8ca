"""Integer models: export from a trained network, model files, identity and the exactness bound.

A model file is one safetensors file: int8 weights, int32 biases and requantisation
multipliers per layer, and a JSON card in the metadata (architecture, shifts, the accumulator
bound of every layer, training summary); loading it runs no code. The model's identity is the
SHA-256 of its canonical bytes: the card as sorted compact JSON, then each tensor in name order.
"""

from __future__ import annotations

import hashlib
import json
import math
from dataclasses import dataclass
from importlib import resources
from pathlib import Path
from typing import TYPE_CHECKING

import numpy as np
from safetensors import SafetensorError
from safetensors.numpy import load, save

from rowcast import family as fam

if TYPE_CHECKING:  # training only: loading and running a model needs no torch
    from rowcast.network import Predictor

FORMAT = "rowcast-model"
VERSION = 1
# A card whose network corrects another base than the median one (`family.MODEL_BASES`)
# names it and has this version, so that rowcast 0.13 and older refuse the file instead
# of decoding with the wrong base.
BASE_VERSION = 2
MULT_BITS = 16  # requantisation multipliers are below 2**16
MAX_SHIFT = 52  # so that requantisation's rounding term and sum stay exact in float64
EXACT_F32 = 1 << 24  # integers below this add exactly in float32
EXACT_F64 = 1 << 53
DEFAULT_MODEL = "default.safetensors"


class ModelError(Exception):
    """A model file that cannot be used; the message names the file and the reason."""


@dataclass(frozen=True, eq=False)
class IntLayer:
    """One integer layer: acc = conv(a, weight) + bias; out = (acc * mult + half) >> shift."""

    weight: np.ndarray  # int8 (cout, cin, kh, kw)
    bias: np.ndarray  # int64 (cout,)
    mult: np.ndarray  # int64 (cout,)
    shift: int
    relu: bool

    @property
    def bound(self) -> int:
        """Largest |accumulator| any input in 0..255 can produce: the exactness bound."""
        w = np.abs(self.weight.astype(np.int64)).reshape(len(self.weight), -1).sum(1)
        return int((w * 255 + np.abs(self.bias)).max())


@dataclass(frozen=True, eq=False)
class IntModel:
    """An integer predictor: row-stack layers, two head layers, the output layer."""

    name: str
    card: dict
    layers: tuple[IntLayer, ...]
    sha256: bytes
    file: bytes = b""  # the model file's bytes, as an archive embeds them

    @property
    def depth(self) -> int:
        return self.card["architecture"]["depth"]

    @property
    def width(self) -> int:
        return self.card["architecture"]["width"]

    @property
    def left(self) -> int:
        return self.card["architecture"]["left"]

    @property
    def activity(self) -> bool:
        return self.card["architecture"].get("activity") is True  # as the loader counts it

    @property
    def base(self) -> str:
        """What the network's means correct (`family.MODEL_BASES`)."""
        return self.card["architecture"].get("base", "median")


def _round(x: np.ndarray) -> np.ndarray:
    return np.floor(x + 0.5)


def export(net: Predictor, name: str, extra: dict | None = None) -> tuple[dict, dict]:
    """(card, tensors) of the integer network that quantised training simulated."""
    import torch

    with torch.no_grad():
        steps = [s.double().numpy() for s in net.in_steps()]
        layers = net.layers()
        out_steps = [layer.step.double().item() if layer.relu else None for layer in layers]
        gains = np.array(fam.output_gains(net.components), dtype=np.float64)
        tensors, specs = {}, []
        for i, (layer, step) in enumerate(zip(layers, steps, strict=True)):
            w_eff = layer.weight.double().numpy() * step.reshape(1, -1, 1, 1)
            s = np.maximum(np.abs(w_eff).reshape(len(w_eff), -1).max(1), 1e-12) / 127.0
            w_int = _round(w_eff / s.reshape(-1, 1, 1, 1))
            b_int = _round(layer.bias.double().numpy() / s)
            ratio = s / out_steps[i] if layer.relu else s * gains
            shift = int(math.floor(math.log2((2**MULT_BITS - 1) / ratio.max())))
            mult = _round(ratio * 2.0**shift)
            if not 1 <= shift <= MAX_SHIFT:
                raise ModelError(f"{name}: layer {i} needs shift {shift}, outside 1..{MAX_SHIFT}")
            tensors[f"layer{i}.weight"] = w_int.astype(np.int8)
            tensors[f"layer{i}.bias"] = b_int.astype(np.int32)
            tensors[f"layer{i}.mult"] = mult.astype(np.int32)
            lay = IntLayer(w_int.astype(np.int8), b_int.astype(np.int64), mult.astype(np.int64),
                           shift, layer.relu)
            specs.append({"kernel": list(w_int.shape[2:]), "relu": layer.relu, "shift": shift,
                          "bound": lay.bound})
    card = {
        "format": FORMAT,
        "version": VERSION if net.base == "median" else BASE_VERSION,
        "name": name,
        "architecture": {"width": net.width, "hidden": net.hidden, "depth": net.depth,
                         "left": net.left, "outputs": fam.outputs(net.components),
                         **({"activity": True} if net.activity else {}),
                         **({"components": 2} if net.components == 2 else {}),
                         **({"base": net.base} if net.base != "median" else {})},
        "layers": specs,
        **(extra or {}),
    }
    return card, tensors


def to_network(model: IntModel) -> Predictor:
    """A quantisation-aware float network that exports back to `model`'s integers, so that
    training can continue from any model file (a bundled one, or one a user trained).

    Only ratios of steps are fixed by the integers; every activation step is set to the
    pixels' step, so real activations lie in 0..1 as after calibration and the weights keep
    the scale that training gave them (Adam's steps are relative to it).
    """
    import torch

    from rowcast.network import PIXEL_STEP, Predictor

    arch = model.card["architecture"]
    net = Predictor(arch["width"], arch["hidden"], arch["depth"], arch["left"],
                    arch.get("activity") is True, arch.get("components", 1),
                    arch.get("base", "median"))
    gains = np.array(fam.output_gains(net.components), dtype=np.float64)
    with torch.no_grad():
        for i, (layer, ints) in enumerate(zip(net.layers(), model.layers, strict=True)):
            in_step = net.in_steps()[i].double().numpy().reshape(1, -1, 1, 1)
            w_int = ints.weight.astype(np.float64)
            ratio = ints.mult.astype(np.float64) * 2.0**-ints.shift  # s / step, or s * gain
            if layer.relu:
                layer.log_step.fill_(math.log(PIXEL_STEP))
                s = ratio * PIXEL_STEP
            else:
                s = ratio / gains
            layer.weight.copy_(torch.from_numpy(w_int * s.reshape(-1, 1, 1, 1) / in_step))
            layer.bias.copy_(torch.from_numpy(ints.bias * s))
    net.quant = True
    return net


def canonical_bytes(card: dict, tensors: dict[str, np.ndarray]) -> bytes:
    """The bytes whose SHA-256 is the model identity (independent of the file container)."""
    card_json = json.dumps(card, sort_keys=True, separators=(",", ":"))
    parts = [FORMAT.encode(), b"\n", card_json.encode()]
    for key in sorted(tensors):
        t = np.ascontiguousarray(tensors[key])
        parts += [b"\n", key.encode(), str(t.dtype).encode(), str(list(t.shape)).encode()]
        parts.append(t.astype(t.dtype.newbyteorder("<")).tobytes())
    return b"".join(parts)


def to_bytes(card: dict, tensors: dict[str, np.ndarray]) -> bytes:
    """A model file's bytes."""
    return save(tensors, metadata={"rowcast": json.dumps(card, sort_keys=True)})


def save_model(path: Path, card: dict, tensors: dict[str, np.ndarray]) -> None:
    """Write a model file atomically."""
    tmp = path.with_suffix(path.suffix + ".tmp")
    tmp.write_bytes(to_bytes(card, tensors))
    tmp.replace(path)


def model_from_bytes(data: bytes, origin: str) -> IntModel:
    """Parse and check a model file: structure, dtypes, and every layer's stored bound."""
    try:
        tensors = load(data)
        header_len = int.from_bytes(data[:8], "little")
        meta = json.loads(data[8 : 8 + header_len]).get("__metadata__", {})
        card = json.loads(meta["rowcast"])
    except (SafetensorError, ValueError, KeyError, TypeError) as exc:
        raise ModelError(f"{origin}: not a rowcast model file ({exc.__class__.__name__})") from None
    if card.get("format") != FORMAT or card.get("version") not in (VERSION, BASE_VERSION):
        raise ModelError(f"{origin}: not a rowcast model file of version {VERSION} or "
                         f"{BASE_VERSION}")
    try:
        layers = tuple(_layer(tensors, i, spec) for i, spec in enumerate(card["layers"]))
        arch = card["architecture"]
        expected = arch["depth"] + 3
        head_inputs = arch["width"] + 4 * arch["left"] + 3 * (arch.get("activity") is True)
        components = arch.get("components", 1)
        base = arch.get("base")  # named from version 2 on, and never "median"
        if (card["version"] == BASE_VERSION) != (base is not None) or base not in (
                None, *fam.MODEL_BASES[1:]):
            raise ModelError(f"{origin}: a version {card['version']} card with base {base!r}")
        if (len(layers) != expected or components not in (1, 2)
                or arch["outputs"] != fam.outputs(components)
                or layers[-1].weight.shape[0] != arch["outputs"]
                or layers[arch["depth"]].weight.shape[1] != head_inputs):
            raise ModelError(f"{origin}: architecture does not match this version of rowcast")
    except (KeyError, TypeError, ValueError) as exc:
        raise ModelError(f"{origin}: malformed model card ({exc})") from None
    for i, (layer, spec) in enumerate(zip(layers, card["layers"], strict=True)):
        if layer.bound != spec["bound"] or layer.bound >= EXACT_F64:
            raise ModelError(f"{origin}: layer {i} breaks its stored accumulator bound")
        if layer.bound * int(layer.mult.max()) >= EXACT_F64 // 2:  # see requantise
            raise ModelError(f"{origin}: layer {i}'s requantisation is not exact in float64")
    sha = hashlib.sha256(canonical_bytes(card, tensors)).digest()
    return IntModel(card["name"], card, layers, sha, bytes(data))



def _layer(tensors: dict[str, np.ndarray], i: int, spec: dict) -> IntLayer:
    w, b, m = (tensors[f"layer{i}.{k}"] for k in ("weight", "bias", "mult"))
    if w.dtype != np.int8 or b.dtype != np.int32 or m.dtype != np.int32 or w.ndim != 4:
        raise ValueError(f"layer {i} has wrong dtypes")
    shift_ok = 1 <= int(spec["shift"]) <= MAX_SHIFT
    if not (len(b) == len(m) == len(w)) or not shift_ok or (m < 0).any():
        raise ValueError(f"layer {i} has inconsistent shapes or shift")
    return IntLayer(w, b.astype(np.int64), m.astype(np.int64), int(spec["shift"]),
                    bool(spec["relu"]))


def bundled_model(sha256: bytes) -> IntModel | None:
    """The model shipped in the package (current default or an earlier one) with this
    identity, so archives made with an earlier default keep decoding after an upgrade."""
    for ref in sorted(resources.files("rowcast").joinpath("models").iterdir(),
                      key=lambda r: r.name):
        if ref.name.endswith(".safetensors"):
            model = model_from_bytes(ref.read_bytes(), f"bundled model {ref.name}")
            if model.sha256 == sha256:
                return model
    return None


def bundled_names() -> list[str]:
    """Names of the models shipped in the package (file names without .safetensors)."""
    return sorted(r.name.removesuffix(".safetensors")
                  for r in resources.files("rowcast").joinpath("models").iterdir()
                  if r.name.endswith(".safetensors"))


def load_model(path: Path | None = None) -> IntModel:
    """A model file, or the bundled model of that name when no such file exists (the
    bundled default when `path` is None, whatever the working directory holds)."""
    path = Path(path) if path is not None else None
    if path is None or (not path.exists() and path.name == str(path)
                        and path.name in bundled_names()):
        name = DEFAULT_MODEL if path is None else f"{path.name}.safetensors"
        ref = resources.files("rowcast").joinpath(f"models/{name}")
        return model_from_bytes(ref.read_bytes(), f"bundled model {name}")
    try:
        data = path.read_bytes()
    except OSError as exc:
        names = f"; bundled models: {', '.join(bundled_names())}" if path.name == str(path) else ""
        raise ModelError(f"{path}: cannot read model file ({exc.strerror}){names}") from None
    return model_from_bytes(data, str(path))
