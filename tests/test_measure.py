"""Specification tests for `rowcast bench` and `rowcast.measure`.

Every figure is verified: each baseline's file is decoded (by the codec's own library, or by
tifffile for Pillow's TIFF) and compared value for value; a codec that cannot hold a format
is skipped with the reason; rowcast's bytes are those `rowcast compress` stores.
"""

from __future__ import annotations

import csv
import io
import json
from dataclasses import replace
from pathlib import Path

import numpy as np
import pytest
from conftest import TINY
from PIL import Image
from typer.testing import CliRunner

from rowcast import api, measure
from rowcast.cli import app
from rowcast.picture import PALETTE, Picture
from rowcast.pixelformats import BY_NAME as FORMATS_BY_NAME
from rowcast.predictor import Engine
from rowcast.quantize import load_model

runner = CliRunner(env={"FORCE_COLOR": None, "TTY_COMPATIBLE": None})


def smooth(planes: int, h: int, w: int, top: int = 255, dtype=np.uint8) -> np.ndarray:
    """Gradients with a little noise: something every codec compresses a bit."""
    y, x = np.mgrid[0:h, 0:w]
    rng = np.random.default_rng(planes * 100 + h)
    base = (x * 9 + y * 5)[None] + 20 * np.arange(planes)[:, None, None]
    return np.clip(base + rng.integers(0, 4, (planes, h, w)), 0, top).astype(dtype)


@pytest.fixture(scope="module")
def folder(tmp_path_factory) -> Path:
    """RGB, gray, gray with alpha, 16-bit gray and palette PNGs of 6 to 16 px a side."""
    root = tmp_path_factory.mktemp("bench")
    Image.fromarray(smooth(3, 12, 16).transpose(1, 2, 0), "RGB").save(root / "rgb.png")
    Image.fromarray(smooth(1, 10, 9)[0], "L").save(root / "gray.png")
    Image.fromarray(smooth(2, 8, 8).transpose(1, 2, 0), "LA").save(root / "gray-alpha.png")
    Image.fromarray(smooth(1, 6, 7, 65535, np.uint16)[0] * np.uint16(300)).save(
        root / "deep.png")
    palette = Image.fromarray(smooth(1, 9, 11)[0] % 5, "L")
    palette.putpalette(bytes(range(15)))
    palette.save(root / "palette.png")
    (root / "notes.txt").write_text("not an image")
    return root


@pytest.fixture(scope="module")
def benched(folder: Path, tmp_path_factory) -> dict:
    """One `rowcast bench` run with every output: its result and the files it wrote."""
    pytest.importorskip("matplotlib")
    out = tmp_path_factory.mktemp("bench-out")
    result = runner.invoke(app, ["bench", str(folder), "--model", str(TINY), "--json",
                                 str(out / "b.json"), "--csv", str(out / "b.csv"),
                                 "--plot", str(out / "b.png")])
    assert result.exit_code == 0, (result.stdout, result.stderr)
    return {"result": result, "json": json.loads((out / "b.json").read_text()),
            "csv": (out / "b.csv").read_text(), "plot": out / "b.png"}


FIGURE_KEYS = {"path", "format", "width", "height", "pixels", "subpixels", "codec", "status",
               "reason", "bytes", "encode_s", "decode_s", "cross_entropy_bits", "extras_bytes",
               "method", "bits_per_subpixel", "encode_mps", "decode_mps",
               "payload_to_cross_entropy"}
TOTAL_KEYS = {"codec", "images", "bytes", "subpixels", "pixels", "bits_per_subpixel",
              "encode_s", "decode_s", "skipped", "failed", "encode_mps", "decode_mps"}


def test_json_has_every_field_for_every_image_and_codec_and_in_total(benched: dict) -> None:
    """The JSON names the model and each codec (what it is, which formats it keeps); each
    image (non-images under the folder are left out) has a figure from rowcast and every
    baseline with every field; the totals have every field, rowcast's also its
    cross-entropy, extras and payload-to-cross-entropy ratio."""
    data = benched["json"]
    names = ["rowcast", *measure.BY_NAME]
    assert data["model"] == load_model(TINY).name
    assert [c["name"] for c in data["codecs"]] == names
    assert all(c["about"] and c["keeps"] for c in data["codecs"])
    assert sorted(i["path"] for i in data["images"]) == [
        "deep.png", "gray-alpha.png", "gray.png", "palette.png", "rgb.png"]
    for image in data["images"]:
        assert list(image["figures"]) == names
        for fig in image["figures"].values():
            assert set(fig) == FIGURE_KEYS
            assert fig["status"] in ("ok", "skipped", "failed")
            assert (fig["status"] == "ok") == (fig["bytes"] is not None)
    assert list(data["total"]) == names
    for row in data["total"].values():
        assert TOTAL_KEYS <= set(row)
    ours = data["total"]["rowcast"]
    assert {"cross_entropy_bits", "extras_bytes", "payload_to_cross_entropy"} <= set(ours)
    assert ours["images"] == 5 and ours["failed"] == 0
    assert 0.9 < ours["payload_to_cross_entropy"] < 1.5  # a payload near its model's floor


def test_bits_per_subpixel_times_subpixels_is_eight_times_the_bytes(benched: dict) -> None:
    """Per image and in total, bits per subpixel x subpixels = 8 x bytes; MP/s are pixels
    over seconds; a total is the sum over the images that codec coded."""
    data = benched["json"]
    for image in data["images"]:
        assert image["subpixels"] == image["pixels"] * FORMATS_BY_NAME[image["format"]].planes
        for fig in image["figures"].values():
            if fig["status"] == "ok":
                assert fig["bits_per_subpixel"] * fig["subpixels"] == pytest.approx(
                    8 * fig["bytes"])
                assert fig["encode_mps"] == pytest.approx(fig["pixels"] / fig["encode_s"] / 1e6)
    for name, row in data["total"].items():
        ok = [i["figures"][name] for i in data["images"] if i["figures"][name]["status"] == "ok"]
        assert row["images"] == len(ok)
        assert row["bytes"] == sum(f["bytes"] for f in ok)
        assert row["subpixels"] == sum(f["subpixels"] for f in ok)
        if ok:
            assert row["bits_per_subpixel"] * row["subpixels"] == pytest.approx(8 * row["bytes"])


def test_rowcast_bytes_equal_the_archive_entries_of_compress(benched: dict, folder: Path,
                                                            tmp_path: Path) -> None:
    """rowcast's figure for each image is the entry `rowcast compress` writes for the same
    file with the same model (payload plus extras), with the same cross-entropy."""
    summary = api.compress([folder], tmp_path / "a.rowcast", model=TINY)
    entries = {e["path"]: e for e in summary.entries if e["kind"] == "image"}
    figures = {i["path"]: i["figures"]["rowcast"] for i in benched["json"]["images"]}
    assert set(entries) == set(figures)
    for path, fig in figures.items():
        assert fig["bytes"] == entries[path]["bytes"], path
        assert fig["extras_bytes"] == entries[path]["extras_bytes"], path
        assert fig["cross_entropy_bits"] == pytest.approx(entries[path]["cross_entropy_bits"])


def test_codecs_that_cannot_hold_a_format_are_skipped_with_the_reason(benched: dict) -> None:
    """A 16-bit image goes to JPEG 2000, JPEG XL, JPEG-LS, PNG and TIFF (each verified by
    round trip) but WebP skips it, naming the format; a palette image goes only to PNG and
    TIFF (indices and palette); JPEG-LS skips gray with alpha. Skips are counted apart."""
    images = {i["path"]: i["figures"] for i in benched["json"]["images"]}
    deep = images["deep.png"]
    assert deep["webp"]["status"] == "skipped" and "L16" in deep["webp"]["reason"]
    assert all(deep[n]["status"] == "ok" for n in ("png", "jp2", "tiff", "jxl", "jpegls"))
    assert {n for n, f in images["palette.png"].items() if f["status"] == "ok"} == {
        "rowcast", "png", "tiff"}
    assert images["gray-alpha.png"]["jpegls"]["status"] == "skipped"
    total = benched["json"]["total"]
    assert total["webp"]["skipped"] == 2 and total["webp"]["images"] == 3
    assert "webp skipped 1 image: cannot hold L16" in benched["result"].stdout


def test_csv_has_a_row_per_image_and_codec_and_the_plot_is_a_png(benched: dict) -> None:
    """The CSV has the documented header and a row per image and codec agreeing with the
    JSON; the plot is a PNG of the documented size (Pillow as the reader)."""
    rows = list(csv.DictReader(io.StringIO(benched["csv"])))
    assert tuple(rows[0]) == measure.CSV_FIELDS
    assert len(rows) == 5 * (1 + len(measure.BASELINES))
    by_key = {(r["path"], r["codec"]): r for r in rows}
    for image in benched["json"]["images"]:
        for name, fig in image["figures"].items():
            row = by_key[(image["path"], name)]
            assert row["status"] == fig["status"]
            assert row["bytes"] == ("" if fig["bytes"] is None else str(fig["bytes"]))
    with Image.open(benched["plot"]) as plot:
        assert plot.format == "PNG"
        assert plot.size == tuple(round(s * measure.PLOT_DPI) for s in measure.PLOT_SIZE)


def test_the_terminal_table_lists_every_codec_with_its_total(benched: dict) -> None:
    """stdout has a table row per codec with its bytes; nothing goes to stderr."""
    result = benched["result"]
    lines = result.stdout.splitlines()
    for name, row in benched["json"]["total"].items():
        cells = next(line.split() for line in lines if line.split()[:1] == [name])
        assert cells[1:3] == [str(row["images"]), str(row["bytes"])], name
    assert result.stderr == ""


@pytest.fixture(scope="module")
def engine() -> Engine:
    return Engine(load_model(TINY))


PICTURES = {name: Picture(smooth(FORMATS_BY_NAME[name].planes, 7, 5,
                                 FORMATS_BY_NAME[name].maximum,
                                 FORMATS_BY_NAME[name].dtype), name)
            for name in ("L", "LA", "RGB", "RGBA", "L16", "LA16", "RGB16", "RGBA16")}
PICTURES["1"] = Picture(smooth(1, 7, 5) % 2, "1")
PICTURES["P"] = Picture(smooth(1, 7, 5) % 6, "P", ((PALETTE, bytes(range(30, 48))),))


@pytest.mark.parametrize("baseline", measure.BASELINES, ids=lambda b: b.name)
def test_every_format_a_baseline_claims_to_keep_round_trips_exactly(baseline) -> None:
    """The codec table is true: each baseline codes every format in its `keeps` and its
    decoder (imagecodecs, Pillow or tifffile as independent reader) gives the same values;
    every other format is skipped, not attempted."""
    for name, picture in PICTURES.items():
        fig = measure.measure_baseline(baseline, picture)
        if name in baseline.keeps:
            assert fig.status == "ok", (name, fig.reason)
            assert fig.bytes > 0 and fig.encode_s > 0 and fig.decode_s > 0
        else:
            assert fig.status == "skipped" and name in fig.reason


def test_a_decoder_that_returns_other_values_is_reported_as_failing() -> None:
    """A baseline whose decoded values differ, or whose decoder raises, fails for that image
    with the reason and has no bytes: never counted as lossless."""
    png = measure.BY_NAME["png"]

    def off_by_one(data: bytes, picture: Picture) -> Picture:
        got = png.decode(data, picture)
        values = got.values.copy()
        values[0, 0, 0] ^= 1
        return Picture(values, "", got.extras)

    def broken(data: bytes, picture: Picture) -> Picture:
        raise RuntimeError("cannot read")

    fig = measure.measure_baseline(replace(png, decode=off_by_one), PICTURES["RGB"])
    assert (fig.status, fig.bytes) == ("failed", None)
    assert fig.reason == "round trip: 1 of 105 values differ"
    fig = measure.measure_baseline(replace(png, decode=broken), PICTURES["RGB"])
    assert fig.status == "failed" and fig.reason == "RuntimeError: cannot read"


def test_a_palette_image_must_come_back_with_the_same_colours() -> None:
    """Indices equal but a used palette entry changed: the comparison reports it."""
    picture = PICTURES["P"]
    other = bytearray(picture.extra(PALETTE))
    other[0] ^= 1
    assert measure.same_pixels(picture, Picture(picture.values, "", ((PALETTE, bytes(other)),))
                               ) == "palette colours differ"
    assert measure.same_pixels(picture, picture) == ""


def test_bench_reports_a_failing_baseline_per_image_and_leaves_it_out_of_totals(
        folder: Path, tmp_path: Path, monkeypatch) -> None:
    """With a corrupting JPEG XL decoder, each image JPEG XL codes is a line on stderr
    naming the image and the codec; its total counts failures, not bytes; exit status 0
    (a baseline's failure is a finding, not an error)."""
    def corrupt(data: bytes, picture: Picture) -> Picture:
        return Picture(np.zeros_like(picture.values), "")

    monkeypatch.setitem(measure.BY_NAME, "jxl", replace(measure.BY_NAME["jxl"], decode=corrupt))
    result = runner.invoke(app, ["bench", str(folder / "rgb.png"), str(folder / "gray.png"),
                                 "--model", str(TINY), "--codecs", "jxl,png", "--json",
                                 str(tmp_path / "b.json")])
    assert result.exit_code == 0, result.stderr
    lines = result.stderr.splitlines()
    assert len(lines) == 2 and all("jxl failed: round trip:" in line for line in lines)
    assert any("rgb.png" in line for line in lines)
    total = json.loads((tmp_path / "b.json").read_text())["total"]
    assert (total["jxl"]["images"], total["jxl"]["failed"], total["jxl"]["bytes"]) == (0, 2, 0)
    assert total["png"]["images"] == 2


def test_rowcast_round_trip_is_checked_too(engine: Engine, monkeypatch) -> None:
    """rowcast's own payload is decoded and compared: a wrong value is a failure."""
    assert measure.measure_rowcast(engine, PICTURES["RGB"]).status == "ok"
    real = measure.decode_values

    def wrong(engine, wanted):
        (values,) = real(engine, wanted)
        return [values + np.uint8(1)]

    monkeypatch.setattr(measure, "decode_values", wrong)
    fig = measure.measure_rowcast(engine, PICTURES["RGB"])
    assert fig.status == "failed" and "values differ" in fig.reason


@pytest.mark.parametrize("option", ["png,nope", "", "jxl,,PNG"])
def test_an_unknown_codec_is_a_usage_error(folder: Path, option: str) -> None:
    """--codecs with a name not in the table: exit 2, one line naming it and the known ones."""
    result = runner.invoke(app, ["bench", str(folder), "--codecs", option])
    assert result.exit_code == 2
    (line,) = result.stderr.splitlines()
    assert line.startswith("rowcast: error: --codecs: unknown codec") and "jpegls" in line


@pytest.mark.parametrize("option", ["--json", "--csv", "--plot"])
def test_an_existing_output_is_left_alone_without_force(folder: Path, tmp_path: Path,
                                                        option: str) -> None:
    """Like every command, bench refuses to replace a file unless --force; with it the
    file is replaced."""
    target = tmp_path / "mine.out"
    target.write_text("keep me")
    result = runner.invoke(app, ["bench", str(folder / "gray.png"), "--model", str(TINY),
                                 "--codecs", "png", option, str(target)])
    assert result.exit_code == 2 and "already exists" in result.stderr
    assert target.read_text() == "keep me"
    result = runner.invoke(app, ["bench", str(folder / "gray.png"), "--model", str(TINY),
                                 "--codecs", "png", option, str(target), "--force"])
    assert result.exit_code == 0, result.stderr
    assert target.read_bytes() != b"keep me"


def test_a_folder_without_images_is_a_usage_error(tmp_path: Path) -> None:
    """Nothing to measure: exit 2, one line naming the path."""
    (tmp_path / "a.txt").write_text("text")
    result = runner.invoke(app, ["bench", str(tmp_path)])
    assert result.exit_code == 2
    assert result.stderr.splitlines() == [f"rowcast: error: {tmp_path}: no images found"]


def test_baseline_figures_match_the_codec_libraries_called_directly() -> None:
    """External reference: the bytes bench reports for JPEG XL, JPEG-LS and PNG are the
    lengths imagecodecs itself gives for the same values and settings."""
    import imagecodecs

    picture = PICTURES["RGB"]
    array = picture.values.transpose(1, 2, 0).copy()
    direct = {"jxl": imagecodecs.jpegxl_encode(array, lossless=True, effort=9),
              "jpegls": imagecodecs.jpegls_encode(array, level=0),
              "png": imagecodecs.png_encode(array, level=9)}
    for name, data in direct.items():
        fig = measure.measure_baseline(measure.BY_NAME[name], picture)
        assert (fig.status, fig.bytes) == ("ok", len(data)), name
