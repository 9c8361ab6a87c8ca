"""Old archives keep working: committed archives, made by a committed tiny model from
committed images (one per coding method and format version), must still decode to those
images, and today's encoder must still produce their payloads byte for byte.

If this fails, a change altered the archive format, the integer arithmetic or the tables.
Do not regenerate the golden files to make it pass: bump the format version instead
(see DEVELOPERS.md). Formats 1 to 6 are read by `rowcast.legacy` and never written again;
their payloads are re-encoded at the codec level, in the layout each format used."""


from pathlib import Path

import imagecodecs
import numpy as np
import pytest
import tifffile
from conftest import GOLDEN, TINY
from PIL import Image

import rowcast
from rowcast import codec
from rowcast import family as fam
from rowcast.archive import read_extras, read_index, read_payload
from rowcast.entrycodec import encode_pictures
from rowcast.imagefile import read_picture
from rowcast.picture import pack_picture_extras
from rowcast.predictor import Engine
from rowcast.quantize import load_model
from rowcast.tuning import HEADER_BYTES, unpack

MIXTURE = GOLDEN / "tiny-mixture.safetensors"
FOLDERS = {"leaf.png": "images", "orchard.png": "images", "sky.png": "tuned",
           "gate.png": "gray"}
# archive, model, format version, the richest method its writer allowed, entries' methods
LEGACY = [
    ("golden.rowcast", TINY, 1, "model", {"leaf.png": "model", "orchard.png": "model"}),
    ("golden-tuned.rowcast", TINY, 2, "tuned", {"sky.png": "tuned"}),
    ("golden-mixture.rowcast", MIXTURE, 2, "tuned", {"sky.png": "tuned"}),
    ("golden-packed.rowcast", TINY, 3, "tuned",
     {"leaf.png": "model", "orchard.png": "model", "sky.png": "tuned"}),
    ("golden-adaptive.rowcast", TINY, 4, None,
     {"leaf.png": "model", "orchard.png": "model", "sky.png": "adaptive"}),
    ("golden-retuned.rowcast", TINY, 4, "adaptive",
     {"leaf.png": "model", "orchard.png": "model", "sky.png": "adaptive"}),
    ("golden-mixture-adaptive.rowcast", MIXTURE, 4, "adaptive", {"sky.png": "adaptive"}),
    ("golden-compact.rowcast", TINY, 5, "adaptive",
     {"leaf.png": "adaptive", "orchard.png": "model", "sky.png": "adaptive",
      "gate.png": "adaptive"}),
    ("golden-streamed.rowcast", TINY, 6, "adaptive",
     {"leaf.png": "adaptive", "orchard.png": "model", "sky.png": "adaptive",
      "gate.png": "adaptive"}),
    ("golden-mixture-streamed.rowcast", MIXTURE, 6, "adaptive",
     {"sky.png": "adaptive", "gate.png": "adaptive"}),
]
LAYOUTS = {1: "full", 2: "full", 3: "full", 4: "full", 5: "compact", 6: "streamed"}


def committed(name: str) -> np.ndarray:
    """A committed image as (planes, H, W), read by Pillow, an independent reader."""
    image = np.asarray(Image.open(GOLDEN / FOLDERS[name] / name))
    return image[None] if image.ndim == 2 else image.transpose(2, 0, 1)


@pytest.mark.parametrize(("archive", "model", "version", "richest", "methods"), LEGACY,
                         ids=[case[0] for case in LEGACY])
def test_legacy_golden_archives_decode_to_the_committed_images(archive, model, version,
                                                               richest, methods):
    """Every entry of formats 1 to 6 decodes through today's reader, matches its checksum
    and equals the committed PNG; the index says which version and method each has."""
    decoded = dict(rowcast.decode_entries(GOLDEN / archive, model=model))
    assert {e.path: e.method for e in decoded} == methods
    for entry, picture in decoded.items():
        assert entry.version == version and entry.kind == "image"
        assert picture.format == Image.open(GOLDEN / FOLDERS[entry.path] / entry.path).mode
        assert np.array_equal(picture.values, committed(entry.path))


@pytest.mark.parametrize(("archive", "model", "version", "richest", "methods"),
                         [case for case in LEGACY if case[3]],
                         ids=[case[0] for case in LEGACY if case[3]])
def test_legacy_payloads_still_encode_to_the_committed_bytes(archive, model, version, richest,
                                                             methods):
    """Today's encoder, in the payload layout of the archive's format, gives every coded
    entry's payload byte for byte: the integer arithmetic, tables and tuning search have not
    moved. (Format 4's first archive came from 0.4.0's encoder, which chose differently.)"""
    engine = Engine(load_model(model))
    for entry in read_index(GOLDEN / archive)[1]:
        (coded,) = codec.encode_batch(engine, [committed(entry.path)], richest,
                                      layout=LAYOUTS[version])
        assert coded.method == entry.method
        assert coded.payload == read_payload(GOLDEN / archive, entry)


def test_the_two_component_golden_model_mixes_for_real():
    """The committed two-component model's weights lie strictly between the components on
    most pixels, so its goldens exercise the mixture tables."""
    engine = Engine(load_model(MIXTURE))
    sky = committed("sky.png")
    weights = engine.parallel(sky[None].copy())[..., fam.OUTPUTS + 2 :: 3]
    assert ((weights > 0) & (weights < fam.WEIGHT_ONE)).mean() > 0.5


def test_the_adaptive_golden_of_0_4_0_has_nonzero_gains_and_differs_from_0_4_1s():
    """rowcast 0.4.0 chose the scale offsets once, before the feedback gains; 0.4.1 chooses
    them again after, so its sky payload differs, but both carry nonzero gains."""
    payloads = []
    for archive in ("golden-adaptive.rowcast", "golden-retuned.rowcast"):
        (sky,) = [e for e in read_index(GOLDEN / archive)[1] if e.path == "sky.png"]
        payloads.append(read_payload(GOLDEN / archive, sky))
        _, _, gains, biases = unpack(payloads[-1][: HEADER_BYTES["adaptive"]])
        assert gains.all() and biases.all()
    assert payloads[0] != payloads[1]


def test_the_compact_gray_header_holds_the_same_tuning_as_the_full_one():
    """Format 5 gave a gray entry a 5-byte header; format 4's full layout carries the same
    tuning in 18 bytes ahead of the same coder words (a negative bias gain survives)."""
    engine = Engine(load_model(TINY))
    gate = committed("gate.png")
    (compact,) = codec.encode_batch(engine, [gate], "adaptive", layout="compact")
    (full,) = codec.encode_batch(engine, [gate], "adaptive", layout="full")
    assert compact.payload[5:] == full.payload[18:]
    tuning = [unpack(compact.payload[:5]), unpack(full.payload[:18])]
    for a, b in zip(*tuning, strict=True):
        assert np.array_equal(a, b)
    _, _, gains, biases = tuning[0]
    assert gains[0] and biases[0] < 0


def test_streamed_payloads_are_shorter_than_compact_ones():
    """Format 6's one-code payloads (kept as format 7's predictor pieces) are shorter than
    format 5's headers plus words, on the same images."""
    engine = Engine(load_model(TINY))
    images = [committed(n) for n in ("sky.png", "gate.png")]
    sizes = {layout: sum(len(c.payload) for image in images
                         for c in codec.encode_batch(engine, [image], "adaptive", layout=layout))
             for layout in ("compact", "streamed")}
    assert sizes["streamed"] < sizes["compact"]




# ---- format 7 ----------------------------------------------------------------------------

FORMATS = GOLDEN / "formats"
FORMAT7 = GOLDEN / "golden-formats.rowcast"


def _planes(values: np.ndarray) -> np.ndarray:
    return values[None] if values.ndim == 2 else values.transpose(2, 0, 1)


def _pgm(path: Path) -> np.ndarray:
    """A raw PGM with one comment line, read by the PNM specification's rules: magic,
    width, height, maxval, then big-endian 16-bit samples when maxval is over 255."""
    lines = path.read_bytes().split(b"\n", 4)
    width, height = map(int, lines[2].split())
    return np.frombuffer(lines[4], ">u2").reshape(1, height, width)


# Each committed file read by a reader outside rowcast.
INDEPENDENT = {
    ".png": lambda p: _planes(np.asarray(Image.open(p)).astype(np.uint8)),  # "1" is bool
    ".tif": lambda p: _planes(tifffile.imread(p)),
    ".bmp": lambda p: _planes(np.asarray(Image.open(p))),
    ".webp": lambda p: _planes(np.asarray(Image.open(p))),
    ".pgm": _pgm,
}
DEEP = {"deep.png", "rgb16.png"}  # Pillow reads 16-bit RGB as 8-bit: imagecodecs reads these


def test_the_format_7_golden_archive_holds_every_pixel_format_and_a_kept_file():
    formats = {e.path: e.format for e in read_index(FORMAT7)[1]}
    assert set(formats.values()) >= {"1", "L", "LA", "P", "RGB", "RGBA", "L16", "RGB16",
                                     "RGBA16", ""}


def test_the_format_7_golden_archive_decodes_to_the_committed_files():
    """Every entry equals its committed file as an independent reader sees it (Pillow,
    imagecodecs for 16-bit PNG, tifffile, the PNM specification); the kept file is
    byte for byte."""
    for entry, content in rowcast.decode_entries(FORMAT7, model=TINY):
        path = FORMATS / entry.path
        if entry.kind == "file":
            assert content == path.read_bytes()
            continue
        if entry.path in DEEP:
            expected = _planes(imagecodecs.png_decode(path.read_bytes()))
        else:
            expected = INDEPENDENT[path.suffix](path)
        assert np.array_equal(content.values, expected), entry.path


def test_format_7_payloads_and_extras_still_encode_to_the_committed_bytes():
    """Today's reader and encoder give every image entry's payload and extras byte for
    byte: the pieces, the 16-bit split, the fine code and the extras layout have not moved."""
    engine = Engine(load_model(TINY))
    for entry in read_index(FORMAT7)[1]:
        if entry.kind != "image":
            continue
        picture = read_picture(FORMATS / entry.path)
        (encoded,) = encode_pictures(engine, [picture])
        assert (encoded.method, encoded.parts) == (entry.method, entry.parts), entry.path
        assert encoded.payload == read_payload(FORMAT7, entry), entry.path
        assert pack_picture_extras(picture) == read_extras(FORMAT7, entry), entry.path
