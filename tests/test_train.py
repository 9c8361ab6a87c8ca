"""Specification of training and export: a short run on a user's own directory yields a model
file that loads, codes exactly, and records its validation figures."""

import json
import shlex

import imagecodecs
import numpy as np
import pytest
import tifffile
import torch
import typer
from PIL import Image
from test_train_command import mosaic
from typer.testing import CliRunner

from rowcast import deep
from rowcast import family as fam
from rowcast.codec import decode_batch, encode_batch
from rowcast.errors import DataError, UsageError
from rowcast.network import Predictor, parameters_from_output
from rowcast.predictor import Engine
from rowcast.quantize import bundled_names, export, load_model, to_network
from rowcast.train import (
    PRESETS,
    Config,
    bits_per_subpixel,
    calibrate,
    command,
    evaluate,
    export_checkpoint,
    grow,
    load_checkpoint,
    load_pools,
    main,
    narrow,
    own_validation_set,
    read_image,
    sample_batch,
    sensor_frame,
    train,
    training_device,
)


def smooth_image(seed: int, size: int = 128) -> np.ndarray:
    """A photo-like test image: smooth gradients plus mild noise."""
    rng = np.random.default_rng(seed)
    yy, xx = np.mgrid[:size, :size] / size
    base = np.stack([np.sin(3 * xx + seed), np.cos(2 * yy), xx * yy], axis=2) * 100 + 120
    return np.clip(base + rng.normal(0, 3, base.shape), 0, 255).astype(np.uint8)


def test_a_sensor_frame_is_faint_noisy_and_sits_on_a_black_level():
    """A black scene becomes noise around a black level of at most 27 per channel; a white
    one at most half as bright plus that level; both stay whole 8-bit values, and the run's
    command line records the fraction of such crops."""
    rng = np.random.default_rng(3)
    black = sensor_frame(rng, np.zeros((32, 32, 3), np.uint8))
    assert black.dtype == np.uint8 and black.std() > 0.2
    assert (np.median(black, axis=(0, 1)) <= 27).all()
    white = sensor_frame(rng, np.full((32, 32, 3), 255, np.uint8))
    assert white.mean() <= 0.5 * 255 + 27 + 3
    assert command(Config("d", "o", sensor_fraction=0.1)).endswith(" --sensor 0.1")
    assert "--sensor" not in command(Config("d", "o"))


@pytest.mark.parametrize("options", [
    "--minutes 3",
    "--minutes 2.5 --lr 0.0007 --batch 16 --seed 11 --sensor 0.1",
    "--minutes 1 --resume default --lr 0.0005 --seed 3 --hidden 256 --left 6 --activity",
    "--minutes 2 --resume default --lr 0.002 --biases-only",
])
def test_a_runs_recorded_command_line_runs_that_run_again(monkeypatch, options):
    """What a checkpoint records as its command (`command`) gives, run again through the
    command line, the same run settings: learning rate, batch, seed and sizes included."""
    seen = []
    monkeypatch.setattr("rowcast.train.train", lambda cfg, log: seen.append(cfg))
    app = typer.Typer()
    app.command()(main)
    assert CliRunner().invoke(app, shlex.split(f"d o {options}")).exit_code == 0
    again = shlex.split(command(seen[0]))[3:]  # after "python -m rowcast.train"
    assert CliRunner().invoke(app, again).exit_code == 0, again
    assert seen[0] == seen[1], command(seen[0])


@pytest.mark.parametrize("quant", [False, True])
def test_a_second_component_starts_as_a_heavier_tail_of_the_first(quant):
    """Growing a second component keeps every first-component parameter; the new one has
    the same means, e times the scale and 3/64 of the weight (a tail, no new mode yet)."""
    torch.manual_seed(6)
    net = Predictor(width=8, hidden=8, depth=2, left=3, activity=True)
    x = torch.randint(0, 256, (2, 3, 12, 12)).float()
    calibrate(net, x)
    net.quant = quant
    big = grow(net, hidden=8, left=3, activity=True, components=2)
    with torch.no_grad():
        one = parameters_from_output(net(x), x, quant)
        two = parameters_from_output(big(x), x, quant)
    assert torch.equal(one["mu4"], two["mu4"]) and torch.equal(one["ls8"], two["ls8"])
    assert torch.equal(two["mu4b"], two["mu4"])
    wider = torch.clamp(two["ls8"] + fam.LS_SCALE, max=fam.LS_HI)
    assert torch.allclose(two["ls8b"], wider, atol=1 if quant else 1e-4)
    assert torch.allclose(two["w"], torch.full_like(two["w"], 61.0), atol=0.5)


def test_a_short_run_trains_resumes_and_exports_a_working_model(tmp_path):
    data = tmp_path / "images"
    data.mkdir()
    for i in range(3):
        Image.fromarray(smooth_image(i)).save(data / f"cam{i}.png")
    Image.fromarray(smooth_image(9, 256)).save(data / "held.png")  # one 64-px tile at 1/4
    cfg = Config(data=str(data), out=str(tmp_path / "run"), minutes=0.1, batch=4, width=8,
                 hidden=80, depth=2, qat_at=0.3, validation=("held.png",))
    train(cfg)
    net, meta = load_checkpoint(tmp_path / "run")
    assert net.quant and meta["state"]["summary"]["steps"] > 0

    first = meta["state"]["summary"]["steps"]
    train(Config(data=str(data), out=str(tmp_path / "more"), minutes=0.05, batch=4, lr=1e-4,
                 validation=("held.png",), resume=str(tmp_path / "run")))
    _, more = load_checkpoint(tmp_path / "more")
    assert more["state"]["summary"]["steps"] > first
    assert len(more["state"]["commands"]) == 2 and "--resume" in more["state"]["commands"][1]
    assert "--hidden 80" in more["state"]["commands"][1]  # the size it continued, not 64

    main(str(data), str(tmp_path / "again"), minutes=0.05, batch=4, resume=str(tmp_path / "run"))
    again, _ = load_checkpoint(tmp_path / "again")  # the command line keeps the run's sizes
    assert (again.hidden, again.depth, again.left) == (80, 2, 3)

    summary = export_checkpoint(tmp_path / "more", tmp_path / "mine.safetensors", "mine")
    for key in ("val_float_bpsp", "val_quant_bpsp", "val_integer_bpsp"):
        assert 0 < summary[key] < 16
    model = load_model(tmp_path / "mine.safetensors")
    assert model.name == "mine" and model.card["training"]["steps"] == summary["steps"]

    engine = Engine(model)
    image = smooth_image(5, 24).transpose(2, 0, 1).copy()
    (coded,) = encode_batch(engine, [image])
    decoded = decode_batch(engine, [coded.payload], 3, 24, 24, methods=[coded.method])
    assert np.array_equal(decoded[0], image)


def test_a_run_that_stops_improving_stops_early_and_keeps_its_best(tmp_path):
    """With patience, a run checks its held-out bits ten times over its budget; once they
    fail to improve that many times in a row it stops before the budget, and the network
    it ends with is the best it measured (a learning rate of 1 soon wrecks it; how soon
    varies with the machine's speed, so the checks are read from the log)."""
    data = tmp_path / "images"
    data.mkdir()
    for i in range(3):
        Image.fromarray(smooth_image(i)).save(data / f"cam{i}.png")
    Image.fromarray(smooth_image(9, 256)).save(data / "held.png")
    lines: list[str] = []
    cfg = Config(data=str(data), out=str(tmp_path / "run"), minutes=0.5, batch=4, width=8,
                 hidden=16, depth=2, qat_at=0.0, lr=1.0, patience=1, validation=("held.png",))
    train(cfg, log=lines.append)
    _, meta = load_checkpoint(tmp_path / "run")
    summary = meta["state"]["summary"]
    assert any("stopped improving" in line for line in lines)
    assert summary["minutes"] < cfg.minutes
    checks = [float(line.split("held out ")[1].split()[0]) for line in lines
              if "(best " in line]
    assert all(b < min(checks[:i]) for i, b in enumerate(checks[:-1]) if i)  # improving...
    assert checks[-1] >= min(checks[:-1])  # ... until the one that stopped it
    best = min(float(line.split("best ")[1].rstrip(")")) for line in lines if "(best " in line)
    assert summary["val_quant_bpsp"] == pytest.approx(best, abs=1e-4)
    assert "--patience 1" in meta["state"]["commands"][-1]


def test_narrowing_the_head_keeps_its_strongest_units_and_trains_on(tmp_path):
    """A smaller --hidden on resuming cuts each head layer to the units whose outgoing
    weights are largest, with their own weights, and training continues from there."""
    torch.manual_seed(0)
    net = Predictor(width=8, hidden=12, depth=2, left=3)
    with torch.no_grad():
        net.head2.weight[:, [2, 5, 7]] *= 50  # head 1's strongest units
        net.out.weight[:, [1, 4, 9]] *= 50  # head 2's
    small = narrow(net, 3)
    assert small.hidden == 3 and narrow(net, 12) is net
    assert torch.equal(small.head1.weight, net.head1.weight[[2, 5, 7]])
    assert torch.equal(small.head2.weight, net.head2.weight[[1, 4, 9]][:, [2, 5, 7]])
    assert torch.equal(small.out.weight, net.out.weight[:, [1, 4, 9]])
    assert torch.equal(small.rows[0].weight, net.rows[0].weight)

    data = tmp_path / "images"
    data.mkdir()
    for i in range(2):
        Image.fromarray(smooth_image(i)).save(data / f"cam{i}.png")
    train(Config(data=str(data), out=str(tmp_path / "run"), minutes=0.03, batch=2, width=8,
                 hidden=12, depth=2))
    main(str(data), str(tmp_path / "cut"), minutes=0.03, batch=2, hidden=6,
         resume=str(tmp_path / "run"))
    cut, meta = load_checkpoint(tmp_path / "cut")
    assert cut.hidden == 6 and "--hidden 6" in meta["state"]["commands"][-1]


@pytest.mark.parametrize("quant", [False, True])
def test_growing_the_head_keeps_what_the_network_computes(quant):
    """A wider head, a longer left window, the activity input and a deeper and wider row
    stack added to a trained network change none of its outputs, float or quantised, so a
    run can continue from it."""
    torch.manual_seed(2)
    net = Predictor(width=8, hidden=8, depth=2)
    x = torch.randint(0, 256, (2, 3, 12, 12)).float()
    calibrate(net, x)
    net.quant = quant
    with torch.no_grad():
        net.out.bias.normal_()  # outputs that depend on everything
    big = grow(net, hidden=16, left=5, activity=True, depth=4, width=12)
    assert (big.hidden, big.left, big.activity, big.depth, big.width) == (16, 5, True, 4, 12)
    with torch.no_grad():
        assert torch.equal(net(x), big(x))
        wider = grow(big, hidden=16, left=5, activity=True, depth=4, width=20)
        assert torch.equal(net(x), wider(x))  # with the activity input already in place
    assert wider.rows[1].weight[12:].abs().sum() > 0  # new units start at random, not zero
    with pytest.raises(UsageError, match="shallower"):
        grow(big, hidden=16, left=5, activity=True, depth=3)
    with pytest.raises(UsageError, match="narrower"):
        grow(big, hidden=16, left=5, activity=True, depth=4, width=10)


@pytest.mark.parametrize("name", bundled_names())
def test_a_model_file_becomes_a_network_that_exports_back_to_its_integers(name):
    """Every bundled model turns into a quantisation-aware network whose export has the same
    weights, biases, multipliers and shifts: training can continue from a model file."""
    model = load_model(name)
    card, tensors = export(to_network(model), model.name)
    for i, layer in enumerate(model.layers):
        assert np.array_equal(tensors[f"layer{i}.weight"], layer.weight)
        assert np.array_equal(tensors[f"layer{i}.bias"], layer.bias)
        assert np.array_equal(tensors[f"layer{i}.mult"], layer.mult)
        assert card["layers"][i]["shift"] == layer.shift
    assert card["architecture"] == model.card["architecture"]


def test_a_run_may_switch_the_base_its_network_corrects_and_keeps_it(tmp_path):
    """`--base difference` continues a median-base run on the colour-difference base: the
    run records it, a resume without --base keeps it, the exported model's card names it
    and its archives round-trip; an unknown base is refused."""
    data = tmp_path / "images"
    data.mkdir()
    for i in range(2):
        Image.fromarray(smooth_image(i)).save(data / f"cam{i}.png")
    train(Config(data=str(data), out=str(tmp_path / "run"), minutes=0.03, batch=2, width=8,
                 hidden=16, depth=2, qat_at=0.0))
    main(str(data), str(tmp_path / "diff"), minutes=0.03, batch=2, resume=str(tmp_path / "run"),
         base="difference")
    net, meta = load_checkpoint(tmp_path / "diff")
    assert net.base == "difference" and "--base difference" in meta["state"]["commands"][-1]
    main(str(data), str(tmp_path / "more"), minutes=0.03, batch=2, resume=str(tmp_path / "diff"),
         export=str(tmp_path / "d.safetensors"))
    assert load_checkpoint(tmp_path / "more")[0].base == "difference"
    model = load_model(tmp_path / "d.safetensors")
    assert model.base == "difference" and model.card["version"] == 2
    image = smooth_image(3, 20).transpose(2, 0, 1).copy()
    (coded,) = encode_batch(Engine(model), [image])
    decoded = decode_batch(Engine(model), [coded.payload], 3, 20, 20, methods=[coded.method])
    assert np.array_equal(decoded[0], image)
    with pytest.raises(SystemExit, match="--base must be one of median, difference"):
        main(str(data), str(tmp_path / "x"), minutes=0.01, base="sideways")


def test_training_continues_from_the_bundled_model_on_a_users_images(tmp_path):
    """`--resume default --export FILE` adapts the bundled model to a directory without
    validation images and writes a model file that codes exactly: same sizes, its steps and
    commands carried on; a resume that names neither a run nor a model file is refused."""
    data = tmp_path / "images"
    data.mkdir()
    for i in range(2):
        Image.fromarray(smooth_image(i)).save(data / f"cam{i}.png")
    mine = tmp_path / "orchard.safetensors"
    main(str(data), str(tmp_path / "mine"), minutes=0.03, batch=2, resume="default",
         export=str(mine))
    net, meta = load_checkpoint(tmp_path / "mine")
    default = load_model()
    arch = default.card["architecture"]
    assert (net.hidden, net.depth, net.left, net.activity) == (
        arch["hidden"], arch["depth"], arch["left"], True) and net.quant
    done = default.card["training"]
    assert meta["state"]["summary"]["steps"] > done["steps"]
    assert meta["state"]["commands"][: len(done["commands"])] == done["commands"]
    assert "--resume default" in meta["state"]["commands"][-1]
    model = load_model(mine)
    assert model.name == "orchard" and model.card["architecture"] == arch
    assert model.card["training"]["validation"].startswith("none")
    assert "val_integer_bpsp" not in model.card["training"]
    image = smooth_image(7, 20).transpose(2, 0, 1).copy()
    (coded,) = encode_batch(Engine(model), [image])
    decoded = decode_batch(Engine(model), [coded.payload], 3, 20, 20, methods=[coded.method])
    assert np.array_equal(decoded[0], image)
    with pytest.raises(SystemExit, match="nowhere: cannot read model file"):
        main(str(data), str(tmp_path / "x"), minutes=0.01, resume=str(tmp_path / "nowhere"))


def test_thumbnail_sized_images_train_at_their_own_size(tmp_path):
    """A user's 64-px camera thumbnails give crops at 1x (a photograph is only reduced, as
    thumbnails of it would be made), so a directory of thumbnails is enough to train on;
    the corpus's large photographs are unaffected (checked on a 300-px one)."""
    data = tmp_path / "thumbs"
    data.mkdir()
    Image.fromarray(smooth_image(1, 64)).save(data / "cam.png")
    Image.fromarray(smooth_image(2, 300)).save(data / "big.png")
    photos, _, _ = load_pools(Config(data=str(data), out=str(tmp_path / "run"), validation=()))
    sizes = sorted(p.shape[0] for p in photos)
    assert 64 in sizes and 32 in sizes  # the thumbnail at 1x and 2x
    assert 300 not in sizes and 150 in sizes  # the photograph only reduced


def test_a_users_held_out_folder_is_validated_on_and_never_trained_on(tmp_path, capsys):
    """`--held-out DIR` (here a folder inside the data folder) holds its images out of
    training and validates on them at their own size; the run reports where it started
    from, and the exported figure is exactly the coder's cross-entropy on those tiles
    (the source-coding floor that the payloads approach)."""
    data = tmp_path / "images"
    later = data / "later"
    later.mkdir(parents=True)
    for i in range(3):
        Image.fromarray(smooth_image(i, 48)).save(data / f"cam{i}.png")
    for i in (8, 9):
        Image.fromarray(smooth_image(i, 48)).save(later / f"cam{i}.png")
    cfg = Config(data=str(data), out=str(tmp_path / "run"), held_out=str(later))
    photos, _, held = load_pools(cfg)
    everything, _, _ = load_pools(Config(data=str(data), out=str(tmp_path / "run")))
    assert len(held) == 2 and len(photos) == 3 * len(everything) // 5
    assert {a[..., :3].tobytes() for a in held} == {smooth_image(i, 48).tobytes() for i in (8, 9)}
    mine = tmp_path / "cams.safetensors"
    main(str(data), str(tmp_path / "run"), minutes=0.03, batch=2, resume="default",
         held_out=str(later), export=str(mine))
    printed = capsys.readouterr().out
    assert "validation at the start: " in printed and " at the start)" in printed
    model = load_model(mine)
    card = model.card["training"]
    assert card["validation"] == f"48-px tiles of the images in {later} (held out of training)"
    assert "--held-out" in card["commands"][-1] and "val_start_bpsp" in card
    tiles = [smooth_image(i, 48).transpose(2, 0, 1).copy() for i in (8, 9)]
    coded = encode_batch(Engine(model), tiles, "model")
    floor = sum(c.cross_entropy for c in coded) / sum(t.size for t in tiles)
    assert card["val_integer_bpsp"] == round(floor, 4)


def test_a_16_bit_image_trains_as_the_plane_the_predictor_codes_never_clipped(tmp_path):
    """Pillow turns 16-bit gray into 255 wherever a value passes 255; training reads it at
    full depth (imagecodecs wrote it) and learns from `deep.coarse`, what the archive hands
    the predictor for it. 16-bit colour keeps its three planes."""
    rng = np.random.default_rng(5)
    gray = (rng.integers(0, 40, (48, 40)) + 1000 * np.arange(40)).astype(np.uint16)
    colour = rng.integers(0, 60000, (40, 48, 3)).astype(np.uint16)
    (tmp_path / "ct.png").write_bytes(imagecodecs.png_encode(gray))
    (tmp_path / "rgb16.png").write_bytes(imagecodecs.png_encode(colour))
    plane = read_image(tmp_path / "ct.png")
    assert plane.dtype == np.uint8 and plane.shape == (48, 40)
    assert np.array_equal(plane, deep.split(gray[None])[1][0][0])
    assert (plane == 255).mean() < 0.05 and plane.min() == 0
    rgb = read_image(tmp_path / "rgb16.png")
    assert rgb.shape == (40, 48, 4) and (rgb[..., 3] == 255).all()
    assert np.array_equal(rgb[..., :3].transpose(2, 0, 1),
                          deep.coarse(colour.transpose(2, 0, 1)))


def test_an_image_the_archive_refuses_is_not_trained_on_as_something_else(tmp_path):
    """A floating-point TIFF (tifffile wrote it) would reach Pillow's convert as clipped
    integers; training stops instead, naming the file and the reason."""
    tifffile.imwrite(tmp_path / "depth.tif", np.linspace(0, 1, 64, dtype=np.float32)
                     .reshape(8, 8))
    with pytest.raises(DataError, match="depth.tif: floating-point images are not supported"):
        read_image(tmp_path / "depth.tif")


def test_gray_images_train_and_validate_as_one_coded_plane(tmp_path):
    """A gray file stays one plane: its crops are masked to the plane the archive codes
    for it (a gray picture is one plane, not three equal ones), and so are its
    validation tiles."""
    data = tmp_path / "gray"
    data.mkdir()
    Image.fromarray(smooth_image(1, 64)[..., 0]).save(data / "scope.png")
    cfg = Config(data=str(data), out=str(tmp_path / "run"), validation=(), batch=6,
                 gray_fraction=0.0, cutout_fraction=0.0)
    photos, _, _ = load_pools(cfg)
    assert photos and all(p.ndim == 2 for p in photos)
    x, mask = sample_batch(np.random.default_rng(0), cfg, photos, [])
    assert mask.tolist() == [[1.0, 0.0, 0.0]] * 6
    assert torch.equal(x[:, 0], x[:, 1]) and torch.equal(x[:, 0], x[:, 2])
    held = [read_image(data / "scope.png"), smooth_image(2, 64)]
    tiles = own_validation_set(held)
    assert tiles.mask.tolist() == [[1.0, 0.0, 0.0], [1.0, 1.0, 1.0]]
    model = Predictor(8, 8, 1, 3, False, 1)
    figure = evaluate(model, tiles, False)
    gray_bits = bits_per_subpixel(model, tiles.x[:1], tiles.mask[:1]).item()
    colour_bits = bits_per_subpixel(model, tiles.x[1:]).item()
    assert figure == pytest.approx((gray_bits + 3 * colour_bits) / 4, rel=1e-5)


def test_the_excess_is_zero_inside_the_familys_range_and_pulls_back_outside():
    """Raw outputs that put means and log-scales inside the range cost nothing; a scale
    past the top costs its excess, with a gradient that lowers it."""
    x = torch.full((1, 3, 4, 4), 100.0)
    gains = torch.tensor(fam.output_gains(1)).view(1, -1, 1, 1)
    inside = torch.zeros(1, fam.OUTPUTS, 4, 4)
    assert parameters_from_output(inside, x, False)["excess"].item() == 0.0
    wide = inside.clone()
    wide[:, 1] = (fam.LS_HI + 8) / gains[0, 1]  # R's log-scale 8 levels past the top
    wide.requires_grad_(True)
    excess = parameters_from_output(wide, x, False)["excess"]
    assert excess.item() == pytest.approx(8 / 3)  # the mean over the three channels
    excess.backward()
    assert wide.grad[:, 1].min() > 0 and wide.grad[:, 0].abs().max() == 0


def test_a_network_trained_from_scratch_on_raw_mosaic_frames_does_not_stall(tmp_path):
    """Raw colour-filter-array frames: the base prediction is far off, and a network trained
    from scratch once drove its scales to the top of the range and its means below 0 within
    a few dozen steps, where the clamps pass no gradient, and stayed at 8.65 bits per
    subpixel (more than 8 raw bits). The loss's `excess` term brings them back: 15
    seconds give 6.1-6.4 (measured)."""
    data, held = tmp_path / "frames", tmp_path / "held"
    data.mkdir()
    held.mkdir()
    for i in range(20):
        Image.fromarray(mosaic(i)).save((data if i < 16 else held) / f"f{i:02d}.png")
    lines = []
    train(Config(data=str(data), out=str(tmp_path / "run"), minutes=0.25, held_out=str(held),
                 **PRESETS["small"]), log=lines.append)
    assert json.loads(lines[-1])["val_quant_bpsp"] < 7.5


def test_a_held_out_folder_without_images_is_refused(tmp_path):
    """An empty --held-out folder would validate on nothing: the run stops and says so."""
    data = tmp_path / "images"
    (data / "empty").mkdir(parents=True)
    Image.fromarray(smooth_image(1, 48)).save(data / "cam.png")
    with pytest.raises(DataError, match="empty: no images to validate on"):
        load_pools(Config(data=str(data), out=str(tmp_path / "run"),
                          held_out=str(data / "empty")))


def test_training_runs_on_a_named_device_and_refuses_one_that_is_missing(tmp_path):
    """--device moves training (model, batches, validation) to a torch device; the checkpoint
    and model file are the same kind of CPU file wherever it ran. A CUDA device on a
    machine without one, or a name torch does not know, stops the run with the reason."""
    data = tmp_path / "images"
    data.mkdir()
    Image.fromarray(smooth_image(3, 48)).save(data / "cam.png")
    held = tmp_path / "later"
    held.mkdir()
    Image.fromarray(smooth_image(4, 48)).save(held / "cam.png")
    device = "cuda" if torch.cuda.is_available() else "cpu"
    mine = tmp_path / "dev.safetensors"
    main(str(data), str(tmp_path / "run"), minutes=0.02, batch=2, resume="default",
         held_out=str(held), export=str(mine), device=device)
    _, meta = load_checkpoint(tmp_path / "run")
    assert meta["config"]["device"] == device
    assert load_model(mine).card["training"]["val_integer_bpsp"] > 0
    if not torch.cuda.is_available():
        with pytest.raises(SystemExit, match="--device cuda: this machine has no CUDA device"):
            main(str(data), str(tmp_path / "x"), minutes=0.01, device="cuda")
    with pytest.raises(SystemExit, match="--device warp9: not a torch device name"):
        main(str(data), str(tmp_path / "x"), minutes=0.01, device="warp9")
    with pytest.raises(UsageError, match="--device warp9: not a torch device name"):
        training_device("warp9")  # the library raises our own error; main exits with it
