"""Specification of `rowcast train`: it trains on a folder's gray and colour images (16-bit
ones as the 8-bit planes the predictor codes for them), holds part of them out reproducibly
(or a whole `--held-out` folder), writes a model file that codes exactly, says which files
it did not use and why, and reports the held-out files' coded bytes with the new model, the
starting one, PNG and JPEG XL.

Most tests train the tiny test model for a few seconds, which changes its held-out bytes by
a fraction of a percent either way; what training gains is asserted on a domain of its own
(raw colour-filter-array frames, trained from the bundled default) at the end.
"""

from __future__ import annotations

import json
from pathlib import Path

import imagecodecs
import numpy as np
import pytest
from conftest import TINY
from PIL import Image
from typer.testing import CliRunner, Result

import rowcast
from rowcast import deep, measure, modelpack, trainjob
from rowcast.cli import app
from rowcast.errors import UsageError
from rowcast.heldout import RGB_PHOTOS, thumbnails, write_pngs
from rowcast.imagefile import read_picture
from rowcast.predictor import Engine
from rowcast.quantize import load_model

runner = CliRunner(env={"FORCE_COLOR": None, "TTY_COMPATIBLE": None})
MINUTES = "0.04"


def run(*args: object) -> Result:
    """`rowcast ARGS...` in-process, as a script sees it (no terminal)."""
    return runner.invoke(app, [str(a) for a in args])


def domain(seed: int, size: int = 32) -> np.ndarray:
    """A peculiar little domain: blocks of two gray levels on a fixed background, noisy."""
    rng = np.random.default_rng(seed)
    a = np.full((size, size), 200.0)
    for _ in range(4):
        y, x = rng.integers(0, size - 8, 2)
        h, w = rng.integers(4, 12, 2)
        a[y : y + h, x : x + w] = rng.choice([40, 90])
    return np.clip(np.rint(a + rng.normal(0, 3, a.shape)), 0, 255).astype(np.uint8)


def make_folder(folder: Path, count: int, others: bool = True) -> list[Path]:
    """`count` usable images (gray, and one RGBA whose colour planes are used) plus, with
    `others`, a usable 16-bit PNG, and a palette PNG and a text file that are not; returns
    the usable ones."""
    folder.mkdir(parents=True)
    usable = []
    for i in range(count - 1):
        usable.append(folder / f"cam{i:02d}.png")
        Image.fromarray(domain(i)).save(usable[-1])
    rgba = np.stack([domain(50), domain(51), domain(52), np.full((32, 32), 128, np.uint8)], 2)
    usable.append(folder / "sub" / "overlay.png")
    usable[-1].parent.mkdir()
    Image.fromarray(rgba, "RGBA").save(usable[-1])
    if others:
        usable.append(folder / "deep.png")
        usable[-1].write_bytes(imagecodecs.png_encode(domain(60).astype(np.uint16) * 257))
        Image.fromarray(domain(61) // 64).convert("P").save(folder / "map.png")
        (folder / "notes.txt").write_text("camera 3 log\n")
    return usable


@pytest.fixture(scope="module")
def trained(tmp_path_factory: pytest.TempPathFactory) -> tuple[Path, list[Path], Path, dict]:
    """One run with --json on a folder of 11 usable images (one 16-bit) and 2 unusable
    files."""
    root = tmp_path_factory.mktemp("train")
    usable = make_folder(root / "images", 10)
    model = root / "own.safetensors"
    result = run("train", root / "images", "-o", model, "--from", TINY, "--minutes", MINUTES,
                 "--json")
    assert result.exit_code == 0, (result.stdout, result.stderr)
    assert result.stderr == ""
    return root / "images", usable, model, json.loads(result.stdout)


def test_the_model_file_is_written_named_for_its_stem_and_codes_exactly(trained, tmp_path):
    folder, _, model, report = trained
    loaded = load_model(model)
    assert loaded.name == "own" == report["name"]
    assert loaded.sha256.hex() == report["sha256"]
    assert loaded.card["training"]["commands"][-1].startswith("rowcast train ")
    assert report["steps"] > 0 and report["from"] == str(TINY)
    archive = tmp_path / "a.rowcast"
    rowcast.compress([folder], archive, model=model)
    check = rowcast.verify(archive, against=folder, model=model)
    assert check.ok, check.problems


def test_the_held_out_split_is_every_fifth_file_and_disjoint_from_training(trained):
    _, usable, _, report = trained
    names = sorted(p.as_posix() for p in usable)
    assert report["held_out_files"] == [names[4], names[9]]
    assert set(report["trained"]).isdisjoint(report["held_out_files"])
    assert sorted(report["trained"] + report["held_out_files"]) == names
    again = trainjob.split(list(reversed(usable)))
    assert [p.as_posix() for p in again[1]] == report["held_out_files"]


def test_the_held_out_figures_are_the_bytes_each_codec_writes(trained):
    _, _, model, report = trained
    held = report["held_out"]
    pictures = [(n, measure.as_compressed(n, read_picture(Path(n))))
                for n in report["held_out_files"]]
    subpixels = sum(p.values.size for _, p in pictures)
    assert held["subpixels"] == subpixels and held["files"] == 2
    engines = {"start": Engine(load_model(TINY)), "new": Engine(load_model(model))}
    for key, engine in engines.items():
        assert held[key]["bytes"] == sum(measure.measure_rowcast(engine, p).bytes
                                         for _, p in pictures)
    for key in ("png", "jxl"):
        assert held[key]["bytes"] == sum(
            measure.measure_baseline(measure.BY_NAME[key], p).bytes for _, p in pictures)
    for key in ("start", "new", "png", "jxl"):
        assert held[key]["bits_per_subpixel"] == pytest.approx(
            8 * held[key]["bytes"] / subpixels)
    assert held["new_to_start"] == pytest.approx(held["new"]["bytes"] / held["start"]["bytes"])


def test_every_file_not_trained_on_is_reported_with_its_reason(trained):
    folder, _, _, report = trained
    reasons = {r["reason"]: (r["count"], r["files"]) for r in report["not_trained_on"]}
    assert reasons["not an image"] == (1, [(folder / "notes.txt").as_posix()])
    assert reasons["palette image (its values are indices, not intensities)"][0] == 1
    assert sum(r["count"] for r in report["not_trained_on"]) == 2


def test_a_16_bit_image_is_trained_on_as_the_plane_the_predictor_codes(trained, tmp_path):
    """Read at full depth (imagecodecs wrote it), never clipped at 255: its training plane
    is `deep.coarse` of its values, the plane `split` hands the predictor. Here it is the
    second held-out file, so the held-out figures code it at full depth as archives do."""
    folder, _, _, report = trained
    assert (folder / "deep.png").as_posix() == report["held_out_files"][1]
    picture = read_picture(folder / "deep.png")
    assert picture.format == "L16" and picture.values.max() > 255
    plane = trainjob.colour_planes(picture)
    assert np.array_equal(plane, deep.split(picture.values)[1][0][0])
    assert plane.min() == 0 and plane.max() > 100  # the scene, not a saturated frame


def test_a_held_out_folder_is_validated_on_whole_and_never_trained_on(tmp_path):
    usable = make_folder(tmp_path / "images", 6, others=False)
    check = make_folder(tmp_path / "images" / "check", 2, others=False)
    chosen = trainjob.select([tmp_path / "images"], tmp_path / "images" / "check")
    assert sorted(c.path for c in chosen.held) == sorted(check)
    assert sorted(c.path for c in chosen.train) == sorted(usable)
    assert sorted(p for p, _ in chosen.unused) == sorted(check)

    result = run("train", tmp_path / "images", "-o", tmp_path / "m.safetensors", "--from",
                 TINY, "--held-out", tmp_path / "images" / "check", "--minutes", MINUTES)
    assert result.exit_code == 0, (result.stdout, result.stderr)
    lines = result.stdout.splitlines()
    assert "trained on 6 files, held out 2 files" in lines[1]
    assert "not trained on 2 files: in the --held-out folder" in lines[2]
    (png,) = [line.split() for line in lines if line.split()[:1] == ["PNG"]]
    assert int(png[1]) > 0 and float(png[2]) > 0
    assert lines[-1].startswith("  new / start: ")
    assert load_model(tmp_path / "m.safetensors").name == "m"


def test_the_split_needs_two_files_and_holds_out_the_last_of_few():
    paths = [Path(f"d/{c}.png") for c in "cab"]
    assert trainjob.split(paths) == ([Path("d/a.png"), Path("d/b.png")], [Path("d/c.png")])
    with pytest.raises(UsageError, match="at least 2 images"):
        trainjob.split(paths[:1])


def test_an_existing_output_is_left_alone_without_force(tmp_path):
    make_folder(tmp_path / "images", 3, others=False)
    model = tmp_path / "own.safetensors"
    model.write_bytes(b"mine")
    result = run("train", tmp_path / "images", "-o", model, "--from", TINY)
    assert result.exit_code == 2
    assert result.stderr.splitlines() == [
        f"rowcast: error: {model}: already exists (use --force to replace it)"]
    assert model.read_bytes() == b"mine"


@pytest.mark.parametrize(("args", "words"), [
    (["--from", "default", "--from-scratch"], "--from-scratch"),
    (["--from", "no-such.safetensors"], "no-such.safetensors"),
    (["--held-out", "missing-dir"], "missing-dir"),
    (["--minutes", "0"], "--minutes"),
    (["--preset", "fast"], "only with --from-scratch"),
    (["--from-scratch", "--preset", "huge"], "not one of standard, fast, small"),
])
def test_a_wrong_request_is_one_usage_error_line(tmp_path, args, words):
    make_folder(tmp_path / "images", 3, others=False)
    result = run("train", tmp_path / "images", "-o", tmp_path / "m.safetensors", *args)
    assert result.exit_code == 2, (result.stdout, result.stderr)
    (line,) = result.stderr.splitlines()
    assert line.startswith("rowcast: error: ") and words in line
    assert not (tmp_path / "m.safetensors").exists()


def test_the_live_line_follows_the_training_log():
    state = trainjob.Progress(budget_s=120)
    assert state.line(0.0) == "reading images"
    for line in ("pools: 8 photo reductions, 0 cut-out reductions, 2 validation tiles",
                 "resuming tiny after 1000 steps, 3.0 min",
                 "validation at the start: 4.2500 bits per subpixel"):
        state.update(line, 10.0)
    state.update("step 1100 3.5 min train 3.900 bpsp", 40.0)
    assert state.line(40.0) == ("training, step 100, train 3.900 bpsp, held out 4.250 bpsp, "
                                "1:30 left")
    state.update(json.dumps({"steps": 1300, "train_bpsp": 3.8, "val_quant_bpsp": 4.1}), 130.0)
    state.update("measuring the held-out files with both models", 131.0)
    assert state.line(131.0) == ("measuring the held-out files with both models, step 300, "
                                 "train 3.800 bpsp, held out 4.100 bpsp, 0:00 left")


# ---- compress --adapt ---------------------------------------------------------------------

def test_adapting_trains_the_biases_alone_so_the_embedded_model_packs_small(tmp_path):
    """Every weight, multiplier and shift stays the starting model's; biases move. Packed
    against its start, such a model is a few hundred bytes where one with every weight
    moved costs tens of kilobytes."""
    pictures = [read_picture(p) for p in make_folder(tmp_path / "images", 6, others=False)]
    adapted = trainjob.adapt(pictures, str(TINY), 0.1, "tiny-adapted")
    start = load_model(TINY)
    assert adapted is not None
    for new, old in zip(adapted.layers, start.layers, strict=True):
        assert np.array_equal(new.weight, old.weight)
        assert np.array_equal(new.mult, old.mult) and new.shift == old.shift
    assert any(not np.array_equal(new.bias, old.bias)
               for new, old in zip(adapted.layers, start.layers, strict=True))
    assert len(modelpack.pack(adapted, start)) < 1000


def test_adapting_that_does_not_pay_leaves_the_plain_archive_byte_for_byte(tmp_path):
    """A few seconds of fine-tuning cannot pay for its packed model on a small folder: the
    archive is the one plain compress writes, to the byte, and the summary says what the
    adapted model would have cost (payloads + model against the starting payloads)."""
    folder = tmp_path / "in"
    make_folder(folder, 6, others=False)
    plain, adapted = tmp_path / "plain.rca", tmp_path / "adapted.rca"
    assert run("compress", folder, "-o", plain).exit_code == 0
    result = run("compress", folder, "-o", adapted, "--adapt", "--minutes", MINUTES, "--json")
    assert result.exit_code == 0, result.stderr
    a = json.loads(result.stdout)["adaptation"]
    assert a["kept"] is False and a["from"] == "default"
    assert a["saved_bytes"] == a["start_payload_bytes"] - a["payload_bytes"] - a["model_bytes"]
    assert a["saved_bytes"] <= 0 < a["model_bytes"]
    assert adapted.read_bytes() == plain.read_bytes()


def test_an_adapted_model_that_pays_is_embedded_and_decodes_with_no_model_file(
        tmp_path, monkeypatch):
    """Starting from the weak tiny model, an "adaptation" that yields the bundled default
    (stubbed: the training itself is the test above) pays for itself many times: it is kept,
    packed into the archive, counted in its size, and list, verify and decompress need no
    model file."""
    folder = tmp_path / "in"
    sources = write_pngs(thumbnails(RGB_PHOTOS, "RGB", 64), folder, "RGB")
    own = tmp_path / "own.safetensors"
    own.write_bytes(TINY.read_bytes())
    monkeypatch.setattr(trainjob, "adapt", lambda *args, **kw: load_model())
    plain, adapted = tmp_path / "plain.rca", tmp_path / "adapted.rca"
    assert run("compress", folder, "-o", plain, "--model", own).exit_code == 0
    result = run("compress", folder, "-o", adapted, "--model", own, "--adapt")
    assert result.exit_code == 0, result.stderr
    assert "bytes saved" in result.stdout
    own.unlink()
    assert adapted.stat().st_size < plain.stat().st_size
    ident, _ = rowcast.read_index(adapted)
    assert ident.packed and ident.sha256 == load_model().sha256
    assert run("verify", adapted, "--against", folder).exit_code == 0
    out = tmp_path / "out"
    assert run("decompress", adapted, "-o", out).exit_code == 0
    assert len(list(out.rglob("*.png"))) == len(sources)


def test_minutes_without_adapt_is_a_usage_error(tmp_path):
    result = run("compress", tmp_path, "-o", tmp_path / "a.rca", "--minutes", "1")
    assert result.exit_code == 2 and "--minutes: only with --adapt" in result.stderr


def test_stop_early_is_passed_to_training_and_recorded_in_the_card(tmp_path):
    """--stop-early trains with patience on the held-out files (the stopping itself is
    tests/test_train.py's) and the card records the command that ran."""
    make_folder(tmp_path / "images", 6, others=False)
    output = tmp_path / "m.safetensors"
    result = run("train", tmp_path / "images", "-o", output, "--minutes", MINUTES,
                 "--stop-early")
    assert result.exit_code == 0, result.stderr
    assert load_model(output).card["training"]["commands"][-1].endswith("--stop-early")


# ---- training pays on a domain of its own --------------------------------------------------

def mosaic(seed: int, size: int = 48) -> np.ndarray:
    """A raw colour-filter-array frame, as a sensor's readout holds it before demosaicing:
    a smooth colour scene sampled R G / G B in one gray plane, each filter with its own
    gain, plus read noise. Neighbours in a row alternate between two filters: a statistic
    photographs never show."""
    rng = np.random.default_rng(seed)
    yy, xx = np.mgrid[:size, :size] / size
    f, phase = rng.uniform(1, 4, 3), rng.uniform(0, 6, 3)
    r = 0.5 + 0.4 * np.sin(f[0] * xx + phase[0]) * np.cos(f[1] * yy + phase[1])
    g = 0.5 + 0.4 * np.sin(f[2] * (xx + yy) + phase[2])
    b = 0.5 + 0.4 * xx * yy
    even_row, even_col = (np.arange(size) % 2 == 0)[:, None], (np.arange(size) % 2 == 0)[None]
    frame = np.where(even_row & even_col, 60 * r, np.where(~even_row & ~even_col, 40 * b, 200 * g))
    return np.clip(np.rint(frame + rng.normal(0, 1.5, frame.shape)), 0, 255).astype(np.uint8)


@pytest.fixture(scope="module")
def mosaic_run(tmp_path_factory: pytest.TempPathFactory) -> tuple[trainjob.Report, list[str]]:
    """24 seconds of `rowcast train` from the bundled default on 20 mosaic frames (4 held
    out), with its log."""
    folder = tmp_path_factory.mktemp("mosaic")
    for i in range(20):
        Image.fromarray(mosaic(i)).save(folder / f"frame{i:02d}.png")
    lines: list[str] = []
    report = trainjob.run(trainjob.Job((folder,), folder.parent / "cfa.safetensors", 0.4),
                          log=lines.append)
    return report, lines


def test_a_model_trained_on_a_peculiar_domain_codes_it_at_least_a_fifth_smaller(mosaic_run):
    """The held-out frames as archives hold them: the new model's bytes at most 0.8 x the
    default's (measured: 0.67 x after 24 s, 71 steps; JPEG XL effort 9 gives 0.92 x)."""
    report, _ = mosaic_run
    held = report.held_out
    assert held["files"] == 4 and held["start"]["bytes"] > 0
    assert held["new"]["bytes"] <= 0.8 * held["start"]["bytes"]
    assert held["new_to_start"] <= 0.8


def test_seconds_of_training_lower_the_held_out_bits(mosaic_run):
    """The run's own validation figure (the held-out frames' tiles, quantised as the model
    will run) is lower at the end than where it started."""
    _, lines = mosaic_run
    start = next(float(line.split(": ")[1].split()[0]) for line in lines
                 if line.startswith("validation at the start: "))
    end = json.loads(next(line for line in reversed(lines) if line.startswith("{")))
    assert end["val_quant_bpsp"] < start - 0.1


def test_the_runs_validation_figure_is_what_the_integer_model_pays_within_1_percent(
        mosaic_run):
    """Training's figure (the network with its quantisers) against the exported integer
    model's cross-entropy on the same tiles, the floor its payloads approach (a fact of
    source coding): within 1%, so the figure a user watches is the one archives get."""
    from rowcast import train

    report, lines = mosaic_run
    end = json.loads(next(line for line in reversed(lines) if line.startswith("{")))
    tiles = train.own_validation_set([train.read_image(Path(p)) for p in report.held])
    integer = train.integer_bits_per_subpixel(report.output.read_bytes(), tiles)
    assert integer == pytest.approx(end["val_quant_bpsp"], rel=0.01)
