"""Specification of model files: no pickle, a stable identity, a checked exactness bound,
and a bundled default model that meets its size and quantisation-gap promises."""

import hashlib
from importlib import resources

import numpy as np
import pytest
import torch
from conftest import TINY
from safetensors.numpy import load

from rowcast import family as fam
from rowcast.codec import image_tables
from rowcast.entropy import cross_entropy_bits
from rowcast.network import Predictor, log2_likelihood, parameters_from_output
from rowcast.predictor import Engine
from rowcast.quantize import (
    ModelError,
    bundled_model,
    bundled_names,
    canonical_bytes,
    export,
    load_model,
    model_from_bytes,
    to_bytes,
    to_network,
)
from rowcast.train import calibrate


def bundled_bytes() -> bytes:
    return resources.files("rowcast").joinpath("models/default.safetensors").read_bytes()


def test_model_identity_is_the_sha256_of_canonical_bytes():
    """Identity = SHA-256 of the card and tensors in canonical order; stable across loads."""
    data = TINY.read_bytes()
    model = model_from_bytes(data, "tiny")
    tensors = load(data)
    assert model.sha256 == hashlib.sha256(canonical_bytes(model.card, tensors)).digest()
    assert load_model(TINY).sha256 == model.sha256


def test_changing_one_weight_changes_the_identity_or_breaks_the_stored_bound():
    """Flipping a weight's sign keeps the bound but changes the identity; growing a weight of
    the channel with the largest accumulator bound breaks the bound stored in the card, and
    the file is refused (the engine always recomputes bounds from the weights it runs)."""
    model = load_model(TINY)
    tensors = load(TINY.read_bytes())
    w = tensors["layer0.weight"].copy()
    i = int(np.flatnonzero((np.abs(w) > 0) & (np.abs(w) < 100))[0])
    w.flat[i] = -w.flat[i]
    flipped = {**tensors, "layer0.weight": w.copy()}
    assert model_from_bytes(to_bytes(model.card, flipped), "flipped").sha256 != model.sha256
    per_channel = np.abs(w.astype(np.int64)).reshape(len(w), -1).sum(1)
    top = w[int(per_channel.argmax())]
    top.flat[int(np.abs(top).argmin())] = 127  # raises the largest channel's bound
    with pytest.raises(ModelError, match="bound"):
        model_from_bytes(to_bytes(model.card, {**tensors, "layer0.weight": w}), "tampered")


def test_a_multiplier_that_would_make_requantisation_inexact_is_refused():
    """Requantisation multiplies accumulators by their layer's multipliers in float64; a file
    whose bound x multiplier reaches 2**52 would round there (IEEE 754 doubles carry 53
    significant bits), so it is refused."""
    model = load_model(TINY)
    tensors = load(TINY.read_bytes())
    bias = tensors["layer0.bias"].copy()
    bias[0] = 2**30  # a bound near 2**30, stated truly in the card
    big = {**tensors, "layer0.bias": bias,
           "layer0.mult": np.full_like(tensors["layer0.mult"], 2**22)}
    weight = np.abs(tensors["layer0.weight"].astype(np.int64)).reshape(len(bias), -1).sum(1)
    card = {**model.card, "layers": [dict(spec) for spec in model.card["layers"]]}
    card["layers"][0]["bound"] = int((weight * 255 + np.abs(bias.astype(np.int64))).max())
    assert card["layers"][0]["bound"] * 2**22 >= 2**52
    with pytest.raises(ModelError, match="requantisation is not exact"):
        model_from_bytes(to_bytes(card, big), "tampered")


def test_a_file_that_is_not_a_model_is_refused():
    with pytest.raises(ModelError, match="not a rowcast model"):
        model_from_bytes(b"\x80\x04pickle-looking bytes", "junk")


def test_model_files_hold_no_pickle():
    """The bundled model is safetensors: an 8-byte length, a JSON header, raw tensors."""
    data = bundled_bytes()
    n = int.from_bytes(data[:8], "little")
    assert data[8:9] == b"{" and data[8 + n - 1 : 8 + n].strip() in (b"}", b"")
    assert b"\x80\x04\x95" not in data[: 8 + n]  # the opening of a protocol-4 pickle


@pytest.mark.parametrize(("left", "activity", "components"), [(3, False, 1), (5, True, 1),
                                                              (5, True, 2)])
def test_integer_network_matches_what_quantised_training_computed(left, activity, components):
    """The exported integer network reproduces the quantised float forward pass on >= 99.5%
    of its outputs, and never differs by more than one step (rounding ties); with the plain
    head, with a longer left window plus the activity input, and with two components."""
    torch.manual_seed(3)
    net = Predictor(width=16, hidden=16, depth=3, left=left, activity=activity,
                    components=components)
    rng = np.random.default_rng(3)
    x = rng.integers(0, 256, (2, 3, 12, 14)).astype(np.uint8)
    calibrate(net, torch.from_numpy(x).float())
    net.quant = True
    card, tensors = export(net, "check")
    engine = Engine(model_from_bytes(to_bytes(card, tensors), "check"))
    with torch.no_grad():
        y = net(torch.from_numpy(x).float())
        gains = torch.tensor(fam.output_gains(components)).view(1, -1, 1, 1)
        expected = torch.floor(y * gains + 0.5).permute(0, 2, 3, 1).numpy()
    got = engine.parallel(x)
    assert (got != expected).mean() <= 0.005
    assert np.abs(got - expected).max() <= 1
    params = parameters_from_output(y, torch.from_numpy(x).float(), True)
    assert params["mu4"].shape == (2, 3, 12, 14)


@pytest.mark.parametrize(("components", "base"), [(1, "median"), (2, "median"),
                                                  (1, "difference")])
def test_training_loss_is_what_the_coder_pays(rgb64, components, base):
    """The loss that training minimises (bits under the float family, quantised network)
    matches the cross-entropy of the integer tables that the coder uses, within 0.5%, for one
    and two components and for a network that corrects the colour-difference base:
    training optimises the real code length."""
    torch.manual_seed(4)
    net = Predictor(width=16, hidden=16, depth=3, components=components, base=base)
    x = np.stack(rgb64[:4])
    calibrate(net, torch.from_numpy(x).float())
    net.quant = True
    if components == 2:
        with torch.no_grad():
            net.out.bias[fam.OUTPUTS + 2 :: 3] = 0.6  # mixed weights
    engine = Engine(model_from_bytes(to_bytes(*export(net, "check")), "check"))
    with torch.no_grad():
        xt = torch.from_numpy(x).float()
        trained = -log2_likelihood(parameters_from_output(net(xt), xt, True, base),
                                   xt).sum().item()
    paid = sum(cross_entropy_bits(*image_tables(out, im, fam.model_base(im, base), 3))
               for out, im in zip(engine.parallel(x), x, strict=True))
    assert engine.model.base == base
    assert abs(paid / trained - 1) < 0.005


def test_a_card_names_its_base_from_version_2_on_and_nothing_else_is_accepted():
    """A model of the median base keeps version 1 and no `base` (so the bundled models'
    identities stay); one of the colour-difference base is version 2 and names it, which
    rowcast 0.13 refuses as a version it does not know. A version 1 card naming a base, a
    version 2 one naming none or "median", and an unknown base are refused."""
    torch.manual_seed(6)
    cards = {}
    for base in fam.MODEL_BASES:
        net = Predictor(width=8, hidden=8, depth=2, base=base)
        calibrate(net, torch.randint(0, 256, (2, 3, 8, 8)).float())
        net.quant = True
        cards[base] = export(net, base)
        model = model_from_bytes(to_bytes(*cards[base]), base)
        assert model.base == base and to_network(model).base == base
    assert cards["median"][0]["version"] == 1 and "base" not in cards["median"][0][
        "architecture"]
    assert cards["difference"][0]["version"] == 2
    assert cards["difference"][0]["architecture"]["base"] == "difference"
    card, tensors = cards["difference"]
    for version, arch in ((1, {"base": "difference"}), (2, {"base": "median"}), (2, {}),
                          (2, {"base": "sideways"})):
        bad = {**card, "version": version,
               "architecture": {k: v for k, v in card["architecture"].items() if k != "base"}
               | arch}
        with pytest.raises(ModelError):
            model_from_bytes(to_bytes(bad, tensors), "bad")


def test_bundled_model_is_small_and_its_integer_form_keeps_within_two_percent():
    """Under 5 MB; trained on the project's corpus; integer within 2% of float on held-out
    corpus photos, as measured at export and recorded in the card."""
    assert len(bundled_bytes()) < 5 * 2**20
    card = load_model().card
    training = card["training"]
    assert "shared/corpus" in training["data"]
    assert training["val_integer_bpsp"] <= 1.02 * training["val_float_bpsp"]


def test_bundled_models_load_by_name_and_files_win(tmp_path, monkeypatch):
    """--model takes a file or the name of a bundled model; an existing file of that name
    wins; an unknown name lists the bundled ones."""
    assert load_model("default").sha256 == load_model().sha256
    for name in bundled_names():
        assert load_model(name).sha256 == bundled_model(load_model(name).sha256).sha256
    monkeypatch.chdir(tmp_path)
    (tmp_path / "default").write_bytes(TINY.read_bytes())
    assert load_model("default").name == "golden-tiny"
    assert load_model().sha256 == bundled_model(load_model().sha256).sha256  # no name: bundled
    assert load_model().name == "default"
    with pytest.raises(ModelError, match="nothere: cannot read .*bundled models: default"):
        load_model("nothere")
