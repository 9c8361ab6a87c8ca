"""Specification of packed models: an archive carries its model in few bytes, as the
differences from a bundled model, and refuses anything malformed before allocating."""

import json
import lzma
from dataclasses import replace

import numpy as np
import pytest
from conftest import TINY

from rowcast import modelpack
from rowcast.quantize import IntModel, ModelError, load_model, model_from_bytes, to_bytes


def nudged(model: IntModel, share: float, seed: int = 0) -> IntModel:
    """The model with `share` of its weights moved by one step, as fine-tuning moves them."""
    rng = np.random.default_rng(seed)
    tensors = modelpack.tensors_of(model)
    for name, t in tensors.items():
        if name.endswith(".weight"):
            step = (rng.random(t.shape) < share) * rng.choice([-1, 1], t.shape)
            tensors[name] = np.clip(t.astype(np.int64) + step, -127, 127).astype(np.int8)
    layers = [replace(layer, weight=tensors[f"layer{i}.weight"])
              for i, layer in enumerate(model.layers)]
    card = model.card | {"name": "nudged", "layers": [
        spec | {"bound": layer.bound} for spec, layer in zip(model.card["layers"], layers,
                                                              strict=True)]}
    return model_from_bytes(to_bytes(card, tensors), "nudged")


def test_packing_keeps_the_model_identity_with_or_without_a_base():
    default, tiny = load_model(), load_model(TINY)
    for model, base in ((default, None), (default, default), (tiny, None)):
        packed = modelpack.pack(model, base)
        assert modelpack.unpack(packed, "packed").sha256 == model.sha256


def test_a_fine_tuned_model_packs_to_a_few_percent_of_its_file():
    """5% of the weights moved by a step: against the default it was tuned from, the packed
    model is under a tenth of the model file, and `smallest` finds that base."""
    default = load_model()
    tuned = nudged(default, 0.05)
    packed = modelpack.smallest(tuned)
    assert packed[len(modelpack.MAGIC) :][:32] == default.sha256
    assert len(packed) < len(tuned.file) / 10
    assert modelpack.unpack(packed, "packed").sha256 == tuned.sha256


def test_a_model_without_a_bundled_base_packs_smaller_than_its_file():
    tiny = load_model(TINY)
    assert len(modelpack.smallest(tiny)) < len(tiny.file)


def body_of(card: dict, specs: list, data: bytes = b"") -> bytes:
    text = json.dumps(card).encode()
    lines = b"".join(json.dumps(s).encode() + b"\n" for s in specs)
    return len(text).to_bytes(4, "big") + text + lines + data


@pytest.mark.parametrize(("packed", "reason"), [
    (b"junk", "not a packed rowcast model"),
    (modelpack.MAGIC + b"\x01" * 32 + b"x", "does not bundle"),
    (modelpack.MAGIC + bytes(32) + b"not lzma", "does not inflate"),
    (modelpack.MAGIC + bytes(32) + lzma.compress(b"abc")[:-3], "truncated"),
    (modelpack.MAGIC + bytes(32) + lzma.compress(body_of({}, [["w", "int8", [2**40]]])),
     "runs past"),
    (modelpack.MAGIC + bytes(32) + lzma.compress(body_of({}, [["w", "float32", [1]]])),
     "dtype"),
])
def test_a_malformed_packed_model_is_refused_with_its_reason(packed, reason):
    """Each refusal is a ModelError naming the origin; a tensor larger than the bytes that
    hold it is refused before any array of its size exists."""
    with pytest.raises(ModelError) as caught:
        modelpack.unpack(packed, "archive.rca: embedded model")
    assert reason in str(caught.value) and "archive.rca" in str(caught.value)


def test_an_lzma_bomb_is_cut_off_at_the_limit():
    bomb = modelpack.MAGIC + bytes(32) + lzma.compress(bytes(modelpack.MAX_UNPACKED + 10))
    with pytest.raises(ModelError, match="too large"):
        modelpack.unpack(bomb, "bomb")
