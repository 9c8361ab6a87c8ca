"""Old archives keep working: committed archives, made by a committed tiny model from
committed images (one per coding method), must still decode to those images and re-encode
to the same bytes.

If this fails, a change altered the archive format, the integer arithmetic or the tables.
Do not regenerate the golden files to make it pass: bump the format version instead
(see DEVELOPERS.md). An encoder that deliberately chooses differently within a format gets
a new golden archive beside the old one, which stays and is decoded."""

from pathlib import Path

import numpy as np
import pytest
from conftest import GOLDEN, TINY
from PIL import Image

import rowcast
from rowcast import family as fam
from rowcast.archive import read_payload
from rowcast.codec import open_payloads
from rowcast.predictor import Engine
from rowcast.quantize import load_model
from rowcast.tuning import HEADER_BYTES, unpack


def test_golden_archive_still_decodes_to_the_committed_images():
    """Every entry decodes, matches its checksum, and equals the committed PNG."""
    decoded = dict(rowcast.decode_entries(GOLDEN / "golden.rowcast", model=TINY))
    assert sorted(e.path for e in decoded) == ["leaf.png", "orchard.png"]
    for entry, planes in decoded.items():
        original = np.asarray(Image.open(GOLDEN / "images" / entry.path))
        expected = original[None] if original.ndim == 2 else original.transpose(2, 0, 1)
        assert entry.method == "model"
        assert np.array_equal(planes, expected)


def test_golden_images_still_encode_to_the_committed_bytes(tmp_path):
    """Re-encoding as rowcast 0.1 did (format version 1, no tuning) gives the archive byte
    for byte."""
    out = tmp_path / "again.rowcast"
    rowcast.compress([GOLDEN / "images"], out, model=TINY, version=1)
    assert out.read_bytes() == (GOLDEN / "golden.rowcast").read_bytes()


def test_tuned_golden_archive_decodes_and_re_encodes_to_the_same_bytes(tmp_path):
    """The 0.2 method: scale-tuned entries decode to the committed image and re-encode
    byte for byte in format version 2."""
    ((entry, planes),) = rowcast.decode_entries(GOLDEN / "golden-tuned.rowcast", model=TINY)
    assert entry.method == "tuned"
    expected = np.asarray(Image.open(GOLDEN / "tuned" / entry.path)).transpose(2, 0, 1)
    assert np.array_equal(planes, expected)
    out = tmp_path / "again.rowcast"
    rowcast.compress([GOLDEN / "tuned"], out, model=TINY, version=2)
    assert out.read_bytes() == (GOLDEN / "golden-tuned.rowcast").read_bytes()


def test_two_component_golden_archive_decodes_and_re_encodes_to_the_same_bytes(tmp_path):
    """A committed two-component model (weights mixing for real) and its archive: same
    pixels, same bytes."""
    model = GOLDEN / "tiny-mixture.safetensors"
    engine = Engine(load_model(model))
    sky = np.asarray(Image.open(GOLDEN / "tuned" / "sky.png")).transpose(2, 0, 1)
    weights = engine.parallel(sky[None].copy())[..., fam.OUTPUTS + 2 :: 3]
    assert ((weights > 0) & (weights < fam.WEIGHT_ONE)).mean() > 0.5
    ((entry, planes),) = rowcast.decode_entries(GOLDEN / "golden-mixture.rowcast", model=model)
    assert np.array_equal(planes, sky)
    out = tmp_path / "again.rowcast"
    rowcast.compress([GOLDEN / "tuned"], out, model=model, version=2)
    assert out.read_bytes() == (GOLDEN / "golden-mixture.rowcast").read_bytes()


def test_packed_golden_archive_decodes_and_re_encodes_to_the_same_bytes(tmp_path):
    """Format version 3 (packed index): both golden image sets in one archive, decoded and
    re-encoded byte for byte in format version 3."""
    decoded = dict(rowcast.decode_entries(GOLDEN / "golden-packed.rowcast", model=TINY))
    assert sorted(e.path for e in decoded) == ["leaf.png", "orchard.png", "sky.png"]
    assert sorted(e.method for e in decoded) == ["model", "model", "tuned"]
    for entry, planes in decoded.items():
        folder = "tuned" if entry.path == "sky.png" else "images"
        original = np.asarray(Image.open(GOLDEN / folder / entry.path))
        expected = original[None] if original.ndim == 2 else original.transpose(2, 0, 1)
        assert np.array_equal(planes, expected)
    out = tmp_path / "again.rowcast"
    rowcast.compress([GOLDEN / "images", GOLDEN / "tuned"], out, model=TINY, version=3)
    assert out.read_bytes() == (GOLDEN / "golden-packed.rowcast").read_bytes()


def decoded_golden(archive: str, model: Path) -> dict:
    """The entries of a golden archive of format 4, each checked against its image: the sky
    entry adaptive with nonzero scale and bias gains on every plane, the others untuned."""
    decoded = dict(rowcast.decode_entries(GOLDEN / archive, model=model))
    for entry, planes in decoded.items():
        folder = "tuned" if entry.path == "sky.png" else "images"
        original = np.asarray(Image.open(GOLDEN / folder / entry.path))
        expected = original[None] if original.ndim == 2 else original.transpose(2, 0, 1)
        assert np.array_equal(planes, expected)
        assert entry.method == ("adaptive" if entry.path == "sky.png" else "model")
    (sky,) = [e for e in decoded if e.path == "sky.png"]
    _, _, gains, biases = unpack(read_payload(GOLDEN / archive, sky)[: HEADER_BYTES["adaptive"]])
    assert gains.all() and biases.all()
    return decoded


@pytest.mark.parametrize(("archive", "model", "folders"), [
    ("golden-retuned.rowcast", TINY, ("images", "tuned")),
    ("golden-mixture-adaptive.rowcast", GOLDEN / "tiny-mixture.safetensors", ("tuned",)),
])
def test_adaptive_golden_archives_decode_and_re_encode_to_the_same_bytes(tmp_path, archive,
                                                                         model, folders):
    """Format version 4 (the neighbours' feedback), with one and two components, as
    today's encoder writes it: decoded, and re-encoded byte for byte in format version 4.
    (The two-component archive of 0.4.0 came out the same from 0.4.1's encoder.)"""
    decoded_golden(archive, model)
    out = tmp_path / "again.rowcast"
    rowcast.compress([GOLDEN / f for f in folders], out, model=model, version=4)
    assert out.read_bytes() == (GOLDEN / archive).read_bytes()


def test_the_adaptive_golden_archive_of_0_4_0_still_decodes():
    """rowcast 0.4.0 chose the scale offsets once, before the feedback gains; 0.4.1 chooses
    them again after, so its sky payload differs, but the older archive decodes exactly."""
    older = decoded_golden("golden-adaptive.rowcast", TINY)
    newer = decoded_golden("golden-retuned.rowcast", TINY)
    sky = {e.path: e for e in older}["sky.png"], {e.path: e for e in newer}["sky.png"]
    assert read_payload(GOLDEN / "golden-adaptive.rowcast", sky[0]) != read_payload(
        GOLDEN / "golden-retuned.rowcast", sky[1])


def decoded_as_committed(archive: Path, model: Path) -> dict:
    """The entries of a golden archive of format 5 or 6, each checked against the committed
    image of its name."""
    folders = {"leaf.png": "images", "orchard.png": "images", "sky.png": "tuned",
               "gate.png": "gray"}
    decoded = dict(rowcast.decode_entries(archive, model=model))
    for entry, planes in decoded.items():
        original = np.asarray(Image.open(GOLDEN / folders[entry.path] / entry.path))
        expected = original[None] if original.ndim == 2 else original.transpose(2, 0, 1)
        assert np.array_equal(planes, expected)
    return decoded


def test_compact_golden_archive_decodes_and_re_encodes_to_the_same_bytes(tmp_path):
    """Format version 5: a gray entry's tuning header holds its one plane's fields alone
    (4 bytes, or 5 with its gains); decoded, and re-encoded byte for byte in format
    version 5. Written as format 4, the same gray images carry the full 18-byte header ahead
    of the same coder words, with the same tuning in it."""
    archive = GOLDEN / "golden-compact.rowcast"
    decoded = decoded_as_committed(archive, TINY)
    out = tmp_path / "again.rowcast"
    rowcast.compress([GOLDEN / "images", GOLDEN / "tuned", GOLDEN / "gray"], out, model=TINY,
                     version=5)
    assert out.read_bytes() == archive.read_bytes()
    older = tmp_path / "v4.rowcast"
    rowcast.compress([GOLDEN / "gray"], older, model=TINY, version=4)
    (gate,) = [e for e in decoded if e.path == "gate.png"]
    (gate4,) = rowcast.read_index(older)[1]
    assert gate.mode == "L" and gate.method == gate4.method == "adaptive"
    compact, full = read_payload(archive, gate), read_payload(older, gate4)
    assert compact[5:] == full[18:]
    tuning = [unpack(compact[:5]), unpack(full[:18])]
    for a, b in zip(*tuning, strict=True):
        assert np.array_equal(a, b)
    _, _, gains, biases = tuning[0]
    assert gains[0] and biases[0] < 0  # a negative nibble survives the compact byte


@pytest.mark.parametrize(("archive", "model", "folders"), [
    ("golden-streamed.rowcast", TINY, ("images", "tuned", "gray")),
    ("golden-mixture-streamed.rowcast", GOLDEN / "tiny-mixture.safetensors", ("tuned", "gray")),
])
def test_streamed_golden_archives_decode_and_re_encode_to_the_same_bytes(tmp_path, archive,
                                                                          model, folders):
    """Format version 6 (tuning range-coded ahead of the pixels, endings trimmed), with one
    and two components, RGB and gray: decoded, and re-encoded byte for byte by the default
    writer. Its payloads are shorter than format 5's of the same images."""
    for entry, planes in decoded_as_committed(GOLDEN / archive, model).items():
        assert entry.method == ("model" if entry.path == "orchard.png" else "adaptive")
        if entry.path in ("sky.png", "gate.png"):  # the fields decode to nonzero gains
            channels = len(planes)
            _, tune = open_payloads([read_payload(GOLDEN / archive, entry)], [entry.method],
                                    channels, "streamed")
            assert tune.gains[0, :channels].all() and tune.biases[0, :channels].all()
    out, older = tmp_path / "again.rowcast", tmp_path / "v5.rowcast"
    rowcast.compress([GOLDEN / f for f in folders], out, model=model)
    assert out.read_bytes() == (GOLDEN / archive).read_bytes()
    rowcast.compress([GOLDEN / f for f in folders], older, model=model, version=5)
    new, old = rowcast.read_index(out)[1], rowcast.read_index(older)[1]
    assert sum(e.length for e in new) < sum(e.length for e in old)
