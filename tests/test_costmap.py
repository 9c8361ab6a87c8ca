"""Specification tests for `rowcast costmap` and `rowcast.costmap`.

The map holds the model's code length of every subpixel, from the encoder's own tables and
tuning: it sums to the cross-entropy the encoder reports. The command draws it beside the
image, refuses to replace a file without --force, and writes nothing partial.
"""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pytest
from conftest import TINY
from PIL import Image
from typer.testing import CliRunner

from rowcast import codec, costmap
from rowcast.cli import app
from rowcast.entrycodec import encode_pictures
from rowcast.picture import PALETTE, Picture

runner = CliRunner(env={"FORCE_COLOR": None, "TTY_COMPATIBLE": None})


def textured(planes: int, h: int, w: int, seed: int = 0) -> np.ndarray:
    """A gradient with noise: the predictor beats zlib on it, and tuning pays."""
    y, x = np.mgrid[0:h, 0:w]
    rng = np.random.default_rng(seed)
    values = (x * 11 + y * 7)[None] + 30 * np.arange(planes)[:, None, None]
    return np.clip(values + rng.integers(-6, 7, (planes, h, w)), 0, 255).astype(np.uint8)


@pytest.mark.parametrize("planes", [1, 3])
def test_the_map_sums_to_the_encoders_cross_entropy(tiny_engine, planes: int) -> None:
    """Gray and RGB: the subpixels' bits sum to `codec.encode_batch`'s cross-entropy, and
    with the tuning's bits to the entry's (`encode_pictures`), within float rounding; every
    subpixel costs a positive number of bits."""
    values = textured(planes, 13, 16, planes)
    coded = codec.encode_batch(tiny_engine, [values])[0]
    costs = costmap.cost_map(tiny_engine, Picture(values, "L" if planes == 1 else "RGB"))
    assert costs.bits.shape == values.shape and (costs.bits > 0).all()
    assert costs.cross_entropy == pytest.approx(coded.cross_entropy, rel=1e-12)
    assert costs.tuning_bits == pytest.approx(coded.tuning_bits, rel=1e-12)
    (entry,) = encode_pictures(tiny_engine, [Picture(values, "L" if planes == 1 else "RGB")])
    assert entry.parts == (coded.method,)
    assert costs.cross_entropy + costs.tuning_bits == pytest.approx(entry.cross_entropy,
                                                                    rel=1e-12)
    assert costs.per_pixel.shape == values.shape[1:]
    assert costs.per_pixel.sum() == pytest.approx(costs.cross_entropy)


def test_a_picture_with_alpha_is_mapped_group_by_group(tiny_engine) -> None:
    """RGBA: colour planes and alpha are separate predictor images; each part of the map
    sums to the encoder's cross-entropy for that group."""
    values = textured(4, 9, 11, 5)
    costs = costmap.cost_map(tiny_engine, Picture(values, "RGBA"))
    colour, alpha = codec.encode_batch(tiny_engine, [values[:3]])[0], codec.encode_batch(
        tiny_engine, [values[3:]])[0]
    assert costs.bits[:3].sum() == pytest.approx(colour.cross_entropy, rel=1e-12)
    assert costs.bits[3].sum() == pytest.approx(alpha.cross_entropy, rel=1e-12)


def test_sixteen_bit_pictures_are_refused_with_the_reason(tiny_engine) -> None:
    """No single code length belongs to a 16-bit subpixel: ValueError naming the format."""
    picture = Picture(np.zeros((1, 4, 4), np.uint16), "L16")
    with pytest.raises(ValueError, match="L16"):
        costmap.cost_map(tiny_engine, picture)


@pytest.fixture()
def image(tmp_path: Path) -> Path:
    path = tmp_path / "small.png"
    Image.fromarray(textured(3, 12, 14).transpose(1, 2, 0), "RGB").save(path)
    return path


def test_the_command_writes_a_png_and_prints_the_total(image: Path, tmp_path: Path) -> None:
    """A PNG (Pillow as reader) wider than tall: the image, the heat map and its bar; with
    --planes a wider one (a map per plane). stdout names the file and the bits."""
    pytest.importorskip("matplotlib")
    out, wide = tmp_path / "map.png", tmp_path / "planes.png"
    result = runner.invoke(app, ["costmap", str(image), "-o", str(out), "--model", str(TINY)])
    assert result.exit_code == 0, result.stderr
    assert result.stdout.startswith(f"{out}: cost map of {image}: ")
    assert runner.invoke(app, ["costmap", str(image), "-o", str(wide), "--model", str(TINY),
                               "--planes"]).exit_code == 0
    with Image.open(out) as one, Image.open(wide) as three:
        assert one.format == three.format == "PNG"
        assert one.width > one.height and three.width > one.width
        assert three.height == one.height
    assert sorted(p.name for p in tmp_path.iterdir()) == ["map.png", "planes.png", "small.png"]


def test_an_existing_output_is_kept_without_force(image: Path, tmp_path: Path) -> None:
    """Exit 2 and one line naming the file; with --force it is replaced."""
    pytest.importorskip("matplotlib")
    out = tmp_path / "map.png"
    out.write_bytes(b"keep me")
    result = runner.invoke(app, ["costmap", str(image), "-o", str(out), "--model", str(TINY)])
    assert result.exit_code == 2
    assert result.stderr.splitlines() == [
        f"rowcast: error: {out}: already exists (use --force to replace it)"]
    assert out.read_bytes() == b"keep me"
    result = runner.invoke(app, ["costmap", str(image), "-o", str(out), "--model", str(TINY),
                                 "--force"])
    assert result.exit_code == 0 and out.read_bytes().startswith(b"\x89PNG")


def test_unmappable_and_unreadable_inputs_are_one_line_errors(tmp_path: Path) -> None:
    """A 16-bit PNG: exit 1 naming the file and the format; a text file: exit 1 naming it;
    no output either way."""
    deep, text, out = tmp_path / "deep.png", tmp_path / "a.txt", tmp_path / "map.png"
    Image.fromarray(np.arange(16, dtype=np.uint16).reshape(4, 4) * 999).save(deep)
    text.write_text("not an image")
    for path, word in ((deep, "L16"), (text, str(text))):
        result = runner.invoke(app, ["costmap", str(path), "-o", str(out), "--model",
                                     str(TINY)])
        assert result.exit_code == 1
        (line,) = result.stderr.splitlines()
        assert line.startswith(f"rowcast: error: {path}") and word in line
        assert not out.exists()


def test_a_palette_picture_maps_its_index_plane(tiny_engine) -> None:
    """P: the one index plane is the predictor's gray image; its map sums as gray's, and
    draws with the palette's colours beside it."""
    pytest.importorskip("matplotlib")
    values = textured(1, 8, 8) % 7
    picture = Picture(values, "P", ((PALETTE, bytes(range(21))),))
    costs = costmap.cost_map(tiny_engine, picture)
    assert costs.cross_entropy == pytest.approx(
        codec.encode_batch(tiny_engine, [values])[0].cross_entropy, rel=1e-12)
    png = costmap.render_png(picture, costs, "palette", planes=True)
    assert png.startswith(b"\x89PNG")
