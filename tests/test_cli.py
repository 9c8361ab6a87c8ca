"""Specification tests for the `rowcast` command line and the Python API behind it.

Exit status: 0 success, 1 a data or verification failure, 2 a usage error. Every error is
one line on stderr, starting "rowcast: error: ", naming the file and the reason; never a
traceback, never a partial output.
"""

from __future__ import annotations

import json
import os
import shutil
import subprocess
import sys
from collections.abc import Callable
from dataclasses import dataclass, replace
from importlib import resources
from pathlib import Path

import imagecodecs
import numpy as np
import pytest
import tifffile
from PIL import Image
from safetensors import safe_open
from safetensors.numpy import load_file, save_file
from typer.testing import CliRunner, Result

import rowcast
from rowcast.cli import app

TINY = Path(__file__).parent / "golden" / "tiny.safetensors"
TINY_NAME = "golden-tiny"

# Output as seen by a script or a log file: never a terminal, whatever the environment says.
runner = CliRunner(env={"FORCE_COLOR": None, "TTY_COMPATIBLE": None})


def run(*args: object) -> Result:
    """Run `rowcast ARGS...` in-process."""
    return runner.invoke(app, [str(a) for a in args])


def error_line(result: Result, code: int, *names: object) -> str:
    """Check the exit status and that stderr is one error line naming each of `names`."""
    assert result.exit_code == code, (result.exit_code, result.stdout, result.stderr)
    lines = result.stderr.splitlines()
    assert len(lines) == 1, result.stderr
    assert lines[0].startswith("rowcast: error: "), lines[0]
    for name in names:
        assert str(name) in lines[0], (name, lines[0])
    assert "Traceback" not in result.stdout + result.stderr
    return lines[0]


def files_under(folder: Path) -> set[str]:
    """Relative POSIX paths of every file under `folder` (none if it does not exist)."""
    if not folder.exists():
        return set()
    return {p.relative_to(folder).as_posix() for p in folder.rglob("*") if p.is_file()}


def pixels(path: Path) -> tuple[str, np.ndarray]:
    """(mode, pixel array) of an image file as Pillow reads it."""
    with Image.open(path) as im:
        return im.mode, np.array(im)


def smooth(height: int, width: int, planes: int, seed: int) -> np.ndarray:
    """A camera-like image: gradients plus a little noise, as uint8 (H, W[, 3])."""
    rng = np.random.default_rng(seed)
    y, x = np.mgrid[0:height, 0:width]
    bands = [(x * (9 + 4 * c) + y * (7 + 3 * c) + 40 * c + rng.integers(0, 6, x.shape)) % 256
             for c in range(planes)]
    image = np.stack(bands, axis=-1).astype(np.uint8)
    return image[..., 0] if planes == 1 else image


def other_model(folder: Path) -> Path:
    """A valid model file that is not the tiny model: same weights, another name and SHA-256."""
    with safe_open(str(TINY), "np") as f:
        card = json.loads(f.metadata()["rowcast"])
    card["name"] = "other-tiny"
    path = folder / "other.safetensors"
    save_file(load_file(str(TINY)), str(path), metadata={"rowcast": json.dumps(card)})
    return path


@dataclass(frozen=True)
class Made:
    """A photo tree and a single file, compressed once with the tiny model and restored once."""

    photos: Path  # the directory given to compress
    lone: Path  # the single file given to compress
    originals: Path  # every original at its archive path: photos plus lone.png at the top
    archive: Path
    restored: Path


SOURCES = {  # archive path: what it is
    "top.png": "image",
    "sub/gray.png": "image",
    "sub/deep/photo.bmp": "image",
    "sub/deep/scan.jpg": "file",
    "sub/notes.txt": "file",
    "lone.png": "image",
}
IMAGES = sorted(name for name, kind in SOURCES.items() if kind == "image")


def write_photos(photos: Path) -> None:
    """Nested RGB and gray images in PNG, BMP and JPEG, and a text file beside them."""
    (photos / "sub" / "deep").mkdir(parents=True)
    Image.fromarray(smooth(10, 12, 3, 1), "RGB").save(photos / "top.png")
    Image.fromarray(smooth(7, 9, 1, 2), "L").save(photos / "sub" / "gray.png")
    Image.fromarray(smooth(10, 12, 3, 3), "RGB").save(photos / "sub" / "deep" / "photo.bmp")
    Image.fromarray(smooth(7, 9, 1, 4), "L").save(photos / "sub" / "deep" / "scan.jpg")
    (photos / "sub" / "notes.txt").write_text("not an image\n")


@pytest.fixture(scope="module")
def made(tmp_path_factory: pytest.TempPathFactory) -> Made:
    root = tmp_path_factory.mktemp("made")
    photos = root / "photos"
    write_photos(photos)
    lone = root / "elsewhere" / "lone.png"
    lone.parent.mkdir()
    Image.fromarray(smooth(10, 12, 3, 5), "RGB").save(lone)
    originals = root / "originals"
    shutil.copytree(photos, originals)
    shutil.copy2(lone, originals / "lone.png")
    archive = root / "photos.rca"
    done = run("compress", photos, lone, "-o", archive, "--model", TINY)
    assert done.exit_code == 0, done.stderr
    restored = root / "restored"
    done = run("decompress", archive, "-o", restored, "--model", TINY)
    assert done.exit_code == 0, done.stderr
    return Made(photos, lone, originals, archive, restored)


def copy_of(made: Made, tmp_path: Path) -> Path:
    """A private copy of the archive, for tests that damage it."""
    return Path(shutil.copy2(made.archive, tmp_path / "copy.rca"))


def model_entry(archive: Path) -> rowcast.api.IndexEntry:
    """The first entry coded with the model (the tiny model codes some of these images)."""
    _, entries = rowcast.read_index(archive)
    coded = [e for e in entries if e.method == "coded" and set(e.parts) & {"model", "tuned",
                                                                             "adaptive"}]
    assert coded, "the tiny model stored every image; the test images need to be smoother"
    return coded[0]


# --- compress, list, decompress, verify: the happy path --------------------------------------


def test_compress_takes_every_file_by_relative_path(made: Made) -> None:
    """Files under a directory keep their path relative to it, a file named directly keeps
    its own name; images are coded, the JPEG and the text file kept as bytes: nothing under
    the inputs is skipped."""
    ident, entries = rowcast.read_index(made.archive)

    assert ident.name == TINY_NAME
    assert {e.path: e.kind for e in entries} == SOURCES


def test_compress_quick_writes_an_archive_that_verifies(made: Made, tmp_path: Path) -> None:
    """`--quick` (one tuning search, not two) gives an archive whose every file verifies
    against the originals, no smaller than the default's beyond its rounding."""
    archive = tmp_path / "quick.rca"
    done = run("compress", made.photos, made.lone, "-o", archive, "--model", TINY, "--quick")
    assert done.exit_code == 0, done.stderr
    checked = run("verify", archive, "--against", made.originals, "--model", TINY)
    assert checked.exit_code == 0, checked.stdout + checked.stderr
    assert archive.stat().st_size >= made.archive.stat().st_size - 8


def test_compress_prints_a_summary_and_nothing_on_stderr(made: Made, tmp_path: Path) -> None:
    """Success prints the summary on stdout: images coded, files kept as bytes with the
    reason; stderr stays empty (no progress debris)."""
    result = run("compress", made.photos, "-o", tmp_path / "a.rca", "--model", TINY)

    assert result.exit_code == 0, result.stderr
    assert result.stderr == ""
    assert "3 images coded" in result.stdout
    assert "2 files kept as bytes" in result.stdout
    assert "sub/notes.txt (not an image)" in result.stdout
    assert "sub/deep/scan.jpg (JPEG" in result.stdout
    assert "bits per subpixel" in result.stdout
    assert TINY_NAME in result.stdout


def test_list_shows_every_entry_with_format_size_bytes_rate_and_method(made: Made) -> None:
    """`list` prints one row per entry in path order: path, format, width, height, bytes,
    bits per subpixel and method for images; kept files say so with the reason."""
    result = run("list", made.archive)

    assert result.exit_code == 0, result.stderr
    assert TINY_NAME in result.stdout
    rows = {line.split()[0]: line.split() for line in result.stdout.splitlines()}
    _, entries = rowcast.read_index(made.archive)
    for e in entries:
        size = e.length + e.extras_length
        if e.kind == "image":
            planes = 3 if e.format == "RGB" else 1
            rate = 8.0 * size / (e.width * e.height * planes)
            assert rows[e.path][:6] == [e.path, e.format, str(e.width), str(e.height),
                                        str(size), f"{rate:.3f}"]
        else:
            assert rows[e.path][:4] == [e.path, "file", str(size), "kept"]
    listed = [line.split()[0] for line in result.stdout.splitlines()[2:]]
    assert listed == sorted(e.path for e in entries)  # path order, whatever the archive's


def test_list_json_has_every_entry_with_the_documented_keys(made: Made) -> None:
    """`list --json` is one JSON document whose entries carry the same facts as the table."""
    result = run("list", made.archive, "--json")

    assert result.exit_code == 0, result.stderr
    listing = json.loads(result.stdout)
    assert listing["model"] == TINY_NAME
    assert len(listing["model_sha256"]) == 64
    _, entries = rowcast.read_index(made.archive)
    by_path = {row["path"]: row for row in listing["entries"]}
    assert set(by_path) == {e.path for e in entries}
    for e in entries:
        row = by_path[e.path]
        assert {"path", "kind", "format", "width", "height", "bytes", "bits_per_subpixel",
                "method", "parts", "carries", "reason"} <= set(row)
        assert (row["kind"], row["bytes"], row["method"]) == (
            e.kind, e.length + e.extras_length, e.method)


def test_decompress_restores_every_file_at_its_relative_path_in_its_container(
    made: Made,
) -> None:
    """Every entry comes back under its own name; the BMP as a BMP, the PNGs as PNGs, and
    nothing else is left in the output directory."""
    assert files_under(made.restored) == set(SOURCES)
    for name, kind in SOURCES.items():
        if kind == "image":
            with Image.open(made.restored / name) as im:
                assert im.format == ("BMP" if name.endswith(".bmp") else "PNG")


def test_decompress_restores_only_the_entries_named(made: Made, tmp_path: Path) -> None:
    """Paths after the archive pick entries: only they are decoded and written."""
    out = tmp_path / "one"
    result = run("decompress", made.archive, "sub/gray.png", "sub/notes.txt", "-o", out,
                 "--model", TINY)

    assert result.exit_code == 0, result.stderr
    assert files_under(out) == {"sub/gray.png", "sub/notes.txt"}
    assert (out / "sub/notes.txt").read_bytes() == (made.originals / "sub/notes.txt").read_bytes()
    assert np.array_equal(pixels(out / "sub/gray.png")[1],
                          pixels(made.originals / "sub/gray.png")[1])


@pytest.mark.parametrize("command", ["list", "verify", "decompress"])
def test_an_image_over_the_subpixel_limit_is_refused_before_decoding(made: Made, tmp_path: Path,
                                                                     command: str) -> None:
    """--max-subpixels bounds what an archive may declare (the top image is 12 x 10 RGB,
    360 subpixels): below it every command refuses the archive, naming the sizes."""
    args = {"list": [], "verify": ["--model", TINY],
            "decompress": ["--model", TINY, "-o", tmp_path / "out"]}[command]

    line = error_line(run(command, made.archive, *args, "--max-subpixels", "359"), 1,
                      made.archive)
    assert "12 x 10 x 3 subpixels exceed the limit of 359" in line
    assert not (tmp_path / "out").exists()
    assert run(command, made.archive, *args, "--max-subpixels", "360").exit_code == 0


@pytest.mark.parametrize("command", ["list", "verify", "decompress"])
def test_an_index_of_more_entries_than_the_limit_is_refused(made: Made, tmp_path: Path,
                                                            command: str) -> None:
    """--max-entries bounds the index a command holds (a crafted index of tens of millions
    of tiny records would otherwise fill memory): one entry over it is refused, naming the
    limit; at the limit every command works."""
    args = {"list": [], "verify": ["--model", TINY],
            "decompress": ["--model", TINY, "-o", tmp_path / "out"]}[command]
    count = len(SOURCES)

    line = error_line(run(command, made.archive, *args, "--max-entries", count - 1), 1,
                      made.archive)
    assert line.endswith(f"more than {count - 1} entries, the limit for reading an index whole")
    assert not (tmp_path / "out").exists()
    assert run(command, made.archive, *args, "--max-entries", count).exit_code == 0


def test_decompress_of_an_entry_not_in_the_archive_is_a_usage_error(made: Made,
                                                                    tmp_path: Path) -> None:
    result = run("decompress", made.archive, "sub/nope.png", "-o", tmp_path / "x", "--model", TINY)

    assert error_line(result, 2, made.archive) == (
        f"rowcast: error: {made.archive}: has no entry 'sub/nope.png'")
    assert not (tmp_path / "x").exists()


@pytest.mark.parametrize("name", IMAGES)
def test_decompress_restores_identical_pixels_and_mode(made: Made, name: str) -> None:
    """Each restored image has exactly the pixels and the mode Pillow (an independent
    reader) reads from the input."""
    original_mode, original = pixels(made.originals / name)
    restored_mode, restored = pixels(made.restored / name)

    assert restored_mode == original_mode
    assert restored.dtype == original.dtype
    assert np.array_equal(restored, original)


@pytest.mark.parametrize("name", ["sub/deep/scan.jpg", "sub/notes.txt"])
def test_files_kept_as_bytes_come_back_byte_for_byte(made: Made, name: str) -> None:
    assert (made.restored / name).read_bytes() == (made.originals / name).read_bytes()


def test_verify_exits_zero_when_every_checksum_matches(made: Made) -> None:
    """`verify` decodes everything and exits 0 when every entry matches its checksum."""
    result = run("verify", made.archive, "--model", TINY, "--batch", "1")

    assert result.exit_code == 0, result.stderr
    assert result.stderr == ""
    assert "6 entries" in result.stdout


def test_verify_against_the_originals_exits_zero(made: Made) -> None:
    """`verify --against DIR` compares every file with DIR and exits 0 when all agree."""
    result = run("verify", made.archive, "--against", made.originals, "--model", TINY)

    assert result.exit_code == 0, result.stderr
    assert result.stderr == ""
    assert str(made.originals) in result.stdout


def test_verify_json_reports_ok_and_the_number_checked(made: Made) -> None:
    """`verify --json` prints ok, checked and problems."""
    result = run("verify", made.archive, "--against", made.originals, "--model", TINY, "--json")

    assert result.exit_code == 0, result.stderr
    assert json.loads(result.stdout) == {"ok": True, "checked": 6, "problems": []}


# --- verify --against finds every difference ------------------------------------------------


@pytest.fixture
def originals_copy(made: Made, tmp_path: Path) -> Path:
    """A private copy of the originals directory, for tests that change it."""
    return Path(shutil.copytree(made.originals, tmp_path / "originals"))


def test_verify_against_fails_when_one_pixel_differs(made: Made, originals_copy: Path) -> None:
    """Changing a single subpixel of one original makes verify exit 1 naming that file."""
    changed = originals_copy / "sub" / "gray.png"
    mode, array = pixels(changed)
    array[3, 4] ^= 1
    Image.fromarray(array, mode).save(changed)

    result = run("verify", made.archive, "--against", originals_copy, "--model", TINY)

    assert result.exit_code == 1
    problems = result.stderr.splitlines()
    assert len(problems) == 1
    assert "sub/gray.png" in problems[0]
    assert "differ" in problems[0]


def test_verify_against_fails_when_a_kept_file_differs(made: Made, originals_copy: Path) -> None:
    (originals_copy / "sub" / "notes.txt").write_text("not an image, edited\n")

    result = run("verify", made.archive, "--against", originals_copy, "--model", TINY)

    assert result.exit_code == 1
    assert "sub/notes.txt" in result.stderr and "bytes differ" in result.stderr


def test_verify_against_fails_when_a_file_is_missing(made: Made, originals_copy: Path) -> None:
    """An archive entry with no counterpart in the directory makes verify exit 1 naming it."""
    (originals_copy / "sub" / "deep" / "photo.bmp").unlink()

    result = run("verify", made.archive, "--against", originals_copy, "--model", TINY)

    assert result.exit_code == 1
    problems = result.stderr.splitlines()
    assert len(problems) == 1
    assert "sub/deep/photo.bmp" in problems[0]
    assert "not found" in problems[0]


@pytest.mark.parametrize("extra", ["sub/extra.png", "frame.dat", "noext", "notes.json"])
def test_verify_against_fails_when_the_directory_has_an_extra_file_of_any_kind(
    made: Made, originals_copy: Path, extra: str
) -> None:
    """Any file in the directory that the archive lacks, image or not, whatever its name,
    makes verify exit 1 naming it: a verified archive must stand in for the directory
    (rowcast 0.8 ignored files without an image suffix)."""
    target = originals_copy / extra
    if extra.endswith(".png"):
        Image.fromarray(smooth(5, 6, 3, 9), "RGB").save(target)
    else:
        target.write_bytes(b'{"exposure": 0.01}\n')

    result = run("verify", made.archive, "--against", originals_copy, "--model", TINY)

    assert result.exit_code == 1
    problems = result.stderr.splitlines()
    assert len(problems) == 1
    assert extra in problems[0]
    assert "not in the archive" in problems[0]


def test_verify_against_reports_every_problem_not_just_the_first_kind(
    made: Made, originals_copy: Path
) -> None:
    """A changed pixel does not hide an extra image: both are named."""
    changed = originals_copy / "sub" / "gray.png"
    mode, array = pixels(changed)
    array[3, 4] ^= 1
    Image.fromarray(array, mode).save(changed)
    Image.fromarray(smooth(5, 6, 3, 9), "RGB").save(originals_copy / "sub" / "extra.png")

    result = run("verify", made.archive, "--against", originals_copy, "--model", TINY)

    assert result.exit_code == 1
    problems = result.stderr.splitlines()
    assert len(problems) == 2
    assert any("extra.png" in p and "not in the archive" in p for p in problems)
    assert any("sub/gray.png" in p and "differ" in p for p in problems)


def test_verify_against_a_path_that_is_not_a_directory_is_a_usage_error(
    made: Made, tmp_path: Path
) -> None:
    """--against must name a directory; otherwise exit 2 with one error line naming it."""
    missing = tmp_path / "nowhere"

    error_line(run("verify", made.archive, "--against", missing, "--model", TINY), 2, missing)


# --- every pixel format and its extras, at full depth ------------------------------------------


def write_png16(path: Path, values: np.ndarray) -> None:
    """A 16-bit PNG written by imagecodecs (Pillow cannot write 16-bit RGB)."""
    path.write_bytes(imagecodecs.png_encode(values))


def test_sixteen_bit_rgb_keeps_its_low_bytes_and_verify_sees_a_change_in_one(
    tmp_path: Path,
) -> None:
    """rowcast 0.8 read 16-bit RGB through Pillow, which keeps only the high bytes, and
    `verify --against` agreed with itself. Now every value comes back at 16 bits, as
    imagecodecs (an independent decoder) reads it, and a change of one low bit is found."""
    folder = tmp_path / "cam"
    folder.mkdir()
    rng = np.random.default_rng(7)
    values = (np.add.outer(np.arange(12), np.arange(10))[..., None] * 300
              + rng.integers(0, 40, (12, 10, 3))).astype(np.uint16)
    write_png16(folder / "linear.png", values)
    archive, out = tmp_path / "cam.rca", tmp_path / "out"

    assert run("compress", folder, "-o", archive, "--model", TINY).exit_code == 0
    assert run("decompress", archive, "-o", out, "--model", TINY).exit_code == 0
    restored = imagecodecs.png_decode((out / "linear.png").read_bytes())
    assert restored.dtype == np.uint16 and np.array_equal(restored, values)
    assert [e.format for e in rowcast.read_index(archive)[1]] == ["RGB16"]

    values[5, 5, 1] ^= 1
    write_png16(folder / "linear.png", values)
    result = run("verify", archive, "--against", folder, "--model", TINY)
    assert result.exit_code == 1 and "linear.png" in result.stderr


FORMATS = {  # name: (writer, Pillow mode after reading it back)
    "rgba.png": (lambda p: _rgb().convert("RGBA").save(p), "RGBA"),
    "la.png": (lambda p: _gray().convert("LA").save(p), "LA"),
    "palette.png": (lambda p: _rgb().convert("P", palette=Image.Palette.ADAPTIVE,
                                            colors=12).save(p, transparency=3), "P"),
    "bits.png": (lambda p: _gray().convert("1").save(p), "1"),
    "keyed.png": (lambda p: _gray().save(p, transparency=7), "L"),
    "keyed-rgb.png": (lambda p: _rgb().save(p, transparency=(1, 2, 3)), "RGB"),
    "deep.png": (lambda p: Image.fromarray(smooth(7, 9, 1, 0).astype(np.uint16) * 257).save(p),
                 "I;16"),
    "deep.tif": (lambda p: tifffile.imwrite(p, smooth(7, 9, 1, 1).astype(np.uint16) * 250),
                 "I;16"),
}


def test_alpha_palette_keys_one_bit_and_sixteen_bit_come_back_the_same(tmp_path: Path) -> None:
    """Every format that rowcast 0.8 refused is coded and restored in the same mode, with
    the same values, palette and transparency as Pillow reads them (the PNG
    specification's tRNS chunk for keys and palette alpha)."""
    folder = tmp_path / "kinds"
    folder.mkdir()
    for name, (write, _) in FORMATS.items():
        write(folder / name)
    archive, out = tmp_path / "kinds.rca", tmp_path / "out"

    made = run("compress", folder, "-o", archive, "--model", TINY)
    assert made.exit_code == 0, made.stderr
    assert run("decompress", archive, "-o", out, "--model", TINY).exit_code == 0

    for name, (_, mode) in FORMATS.items():
        with Image.open(folder / name) as a, Image.open(out / name) as b:
            assert a.mode == b.mode == mode, name
            assert np.array_equal(np.asarray(a), np.asarray(b)), name
            assert a.info.get("transparency") == b.info.get("transparency"), name
            assert a.getpalette() == b.getpalette(), name
    assert run("verify", archive, "--against", folder, "--model", TINY).exit_code == 0


def test_metadata_is_kept_shown_by_list_and_counted_unless_stripped(tmp_path: Path) -> None:
    """An ICC profile and text chunks come back byte for byte; `list` names them; the
    bytes figures include them; --strip-metadata drops them and verify still passes."""
    from PIL import PngImagePlugin

    folder = tmp_path / "meta"
    folder.mkdir()
    text = PngImagePlugin.PngInfo()
    text.add_text("exposure", "1/250")
    profile = np.random.default_rng(4).integers(0, 256, 320, np.uint8).tobytes()  # no deflate gain
    _rgb().save(folder / "tagged.png", icc_profile=profile, pnginfo=text)
    kept, bare = tmp_path / "kept.rca", tmp_path / "bare.rca"

    assert run("compress", folder, "-o", kept, "--model", TINY).exit_code == 0
    assert run("compress", folder, "-o", bare, "--model", TINY,
               "--strip-metadata").exit_code == 0
    ((entry,), (stripped,)) = rowcast.read_index(kept)[1], rowcast.read_index(bare)[1]
    assert entry.extras_length > stripped.extras_length + len(profile) // 2
    listing = run("list", kept).stdout
    assert "icc" in listing and "text" in listing

    out = tmp_path / "out"
    assert run("decompress", kept, "-o", out, "--model", TINY).exit_code == 0
    with Image.open(out / "tagged.png") as im:
        assert im.info["icc_profile"] == profile
        assert im.text == {"exposure": "1/250"}
    assert run("verify", kept, "--against", folder, "--model", TINY).exit_code == 0
    assert run("verify", bare, "--against", folder, "--model", TINY).exit_code == 0


def test_strip_metadata_keeps_what_gives_the_values_their_meaning(tmp_path: Path) -> None:
    """A 10-bit PGM's maximum value (the PNM specification: samples run from 0 to maxval)
    survives --strip-metadata, so the restored file means what the original meant; only its
    comment goes."""
    folder, archive, out = tmp_path / "probe", tmp_path / "probe.rca", tmp_path / "out"
    folder.mkdir()
    values = np.array([[0, 512, 1023], [7, 8, 900]], ">u2")
    (folder / "probe.pgm").write_bytes(b"P5\n# probe 7\n3 2\n1023\n" + values.tobytes())

    assert run("compress", folder, "-o", archive, "--model", TINY,
               "--strip-metadata").exit_code == 0
    assert run("decompress", archive, "-o", out, "--model", TINY).exit_code == 0
    assert (out / "probe.pgm").read_bytes() == b"P5\n3 2\n1023\n" + values.tobytes()


def test_an_image_no_container_can_write_back_is_kept_as_bytes(
        tmp_path: Path, monkeypatch: pytest.MonkeyPatch) -> None:
    """When neither its own container nor PNG would give a picture back exactly, the file
    is kept byte for byte with the reason, never coded into something it cannot become."""
    folder, archive, out = tmp_path / "odd", tmp_path / "odd.rca", tmp_path / "out"
    folder.mkdir()
    _rgb().save(folder / "odd.png")
    monkeypatch.setattr(rowcast.imagefile, "restored", lambda name, picture: None)

    assert run("compress", folder, "-o", archive, "--model", TINY).exit_code == 0
    (entry,) = rowcast.read_index(archive)[1]
    assert (entry.kind, entry.method) == ("file", "bytes") and "kept byte" in entry.reason
    assert run("decompress", archive, "-o", out, "--model", TINY).exit_code == 0
    assert (out / "odd.png").read_bytes() == (folder / "odd.png").read_bytes()


@pytest.mark.parametrize("count", [3, 40], ids=["in process", "shared among processes"])
def test_a_file_that_cannot_be_made_fails_alone(tmp_path: Path, count: int,
                                                monkeypatch: pytest.MonkeyPatch) -> None:
    """When one restored picture's file cannot be made, decompress names it and why, and
    restores every other file, whether the files are made here or in forked processes."""
    folder, archive, out = tmp_path / "in", tmp_path / "a.rca", tmp_path / "out"
    folder.mkdir()
    for i in range(count):
        Image.fromarray(smooth(64, 64, 3, i), "RGB").save(folder / f"f{i:02d}.png")
    assert run("compress", folder, "-o", archive, "--model", TINY).exit_code == 0
    file_bytes = rowcast.imagefile.file_bytes

    refused = {"f01.png", "f30.png"}  # with 40, the second is made in a forked process

    def refusing(picture, path):
        if path.name in refused:
            raise rowcast.imagefile.ImageError(f"{path}: no room for it")
        return file_bytes(picture, path)

    monkeypatch.setattr(rowcast.imagefile, "file_bytes", refusing)
    result = run("decompress", archive, "-o", out, "--model", TINY)

    made = {f"f{i:02d}.png" for i in range(count)}
    assert result.exit_code != 0
    assert all(f"{name}: no room for it" in result.stderr for name in made & refused)
    assert files_under(out) == made - refused


def test_images_are_found_by_content_whatever_their_names(tmp_path: Path) -> None:
    """`frame.dat`, `noext` and `b.dib` holding images are coded (rowcast 0.8 skipped them
    silently), and come back under the same names."""
    folder = tmp_path / "odd"
    folder.mkdir()
    _rgb(1).save(folder / "frame.dat", format="PNG")
    _gray(2).save(folder / "noext", format="PNG")
    _rgb(3).save(folder / "b.dib", format="BMP")
    archive, out = tmp_path / "odd.rca", tmp_path / "out"

    assert run("compress", folder, "-o", archive, "--model", TINY).exit_code == 0
    assert {e.path: e.kind for e in rowcast.read_index(archive)[1]} == {
        "frame.dat": "image", "noext": "image", "b.dib": "image"}
    assert run("decompress", archive, "-o", out, "--model", TINY).exit_code == 0
    assert files_under(out) == {"frame.dat", "noext", "b.dib"}
    assert run("verify", archive, "--against", folder, "--model", TINY).exit_code == 0


# --- compress refuses what it cannot keep, all at once -----------------------------------------


def test_compress_of_a_missing_path_is_a_usage_error(tmp_path: Path) -> None:
    """A missing input exits 2, names the path, and writes no archive."""
    missing = tmp_path / "no-such-photos"
    dest = tmp_path / "out.rca"

    line = error_line(run("compress", missing, "-o", dest, "--model", TINY), 2, missing)

    assert "no such file" in line
    assert not dest.exists()


def test_compress_of_an_empty_directory_is_a_usage_error(tmp_path: Path) -> None:
    empty = tmp_path / "empty"
    empty.mkdir()

    line = error_line(run("compress", empty, "-o", tmp_path / "out.rca", "--model", TINY), 2,
                      empty)

    assert "no files" in line


def test_a_directory_of_non_images_is_kept_as_bytes(tmp_path: Path) -> None:
    folder = tmp_path / "docs"
    folder.mkdir()
    (folder / "readme.txt").write_text("hello\n")
    archive = tmp_path / "docs.rca"

    assert run("compress", folder, "-o", archive, "--model", TINY).exit_code == 0
    assert [(e.path, e.kind) for e in rowcast.read_index(archive)[1]] == [("readme.txt", "file")]


def test_a_damaged_png_is_refused_saying_why(tmp_path: Path) -> None:
    """A file that claims to be a PNG but does not decode exits 1 naming it; no archive."""
    fake = tmp_path / "x.png"
    _rgb().save(fake)
    fake.write_bytes(fake.read_bytes()[:60])
    dest = tmp_path / "out.rca"

    result = run("compress", fake, "-o", dest, "--model", TINY)

    assert result.exit_code == 1
    assert str(fake) in result.stderr
    assert not dest.exists()


def _gray(seed: int = 0) -> Image.Image:
    return Image.fromarray(smooth(7, 9, 1, seed), "L")


def _rgb(seed: int = 0) -> Image.Image:
    return Image.fromarray(smooth(7, 9, 3, seed), "RGB")


def _two_frames(path: Path, mode: str) -> None:
    first, second = _rgb(1).convert(mode), _rgb(2).convert(mode)
    first.save(path, save_all=True, append_images=[second])


UNSUPPORTED: dict[str, tuple[str, Callable[[Path], None], str]] = {
    "cmyk-tiff": ("cmyk.tif", lambda p: _rgb().convert("CMYK").save(p), "CMYK"),
    "float-tiff": ("float.tif", lambda p: tifffile.imwrite(p, np.zeros((4, 4), np.float32)),
                   "float"),
    "multi-frame-tiff": ("pages.tif", lambda p: _two_frames(p, "RGB"), "2 pages"),
}


@pytest.mark.parametrize("case", sorted(UNSUPPORTED))
def test_compress_refuses_what_it_cannot_keep_saying_why(tmp_path: Path, case: str) -> None:
    """CMYK, float and several frames are refused with exit 1 and the reason, never
    converted; no archive (or temporary file) is written."""
    name, write, reason = UNSUPPORTED[case]
    source = tmp_path / "in" / name
    source.parent.mkdir()
    write(source)
    dest = tmp_path / "out.rca"

    result = run("compress", source, "-o", dest, "--model", TINY)

    assert result.exit_code == 1
    assert f"rowcast: {source}: " in result.stderr and reason in result.stderr
    assert files_under(tmp_path) == {f"in/{name}"}


def refused_folder(made: Made, tmp_path: Path) -> Path:
    photos = Path(shutil.copytree(made.photos, tmp_path / "photos"))
    for case in UNSUPPORTED.values():
        case[1](photos / "sub" / case[0])
    return photos


def test_one_run_names_every_file_it_cannot_keep(made: Made, tmp_path: Path) -> None:
    """All the refused files are named in one run, a line each, before anything is
    written (rowcast 0.8 stopped at the first)."""
    photos = refused_folder(made, tmp_path)
    dest = tmp_path / "out.rca"

    result = run("compress", photos, "-o", dest, "--model", TINY)

    assert result.exit_code == 1
    lines = result.stderr.splitlines()
    assert len(lines) == 4 and lines[-1].startswith("rowcast: error: 3 files cannot be kept")
    for case in UNSUPPORTED.values():
        assert any(case[0] in line for line in lines[:3])
    assert not dest.exists()


def test_leave_out_refused_archives_the_rest_and_records_what_was_left_out(
    made: Made, tmp_path: Path
) -> None:
    """With --leave-out-refused the rest is archived; `list`, `decompress` and `verify
    --against` show each left-out file and why, and the verify still passes."""
    photos = refused_folder(made, tmp_path)
    dest = tmp_path / "out.rca"

    result = run("compress", photos, "-o", dest, "--model", TINY, "--leave-out-refused")

    assert result.exit_code == 0, result.stderr
    assert "3 files left out" in result.stdout
    left = {e.path: e.reason for e in rowcast.read_index(dest)[1] if e.kind == "left out"}
    assert set(left) == {f"sub/{case[0]}" for case in UNSUPPORTED.values()}
    assert "CMYK" in left["sub/cmyk.tif"]
    assert "left out" in run("list", dest).stdout
    restored = run("decompress", dest, "-o", tmp_path / "out", "--model", TINY)
    assert restored.exit_code == 0 and "left out when archived: sub/cmyk.tif" in restored.stdout
    assert run("verify", dest, "--against", photos, "--model", TINY).exit_code == 0


def test_exclude_leaves_out_matching_files_and_records_them(made: Made, tmp_path: Path) -> None:
    dest = tmp_path / "out.rca"

    result = run("compress", made.photos, "-o", dest, "--model", TINY, "--exclude", "*.txt",
                 "--exclude", "sub/deep/*.jpg")

    assert result.exit_code == 0, result.stderr
    kinds = {e.path: (e.kind, e.reason) for e in rowcast.read_index(dest)[1]}
    assert kinds["sub/notes.txt"] == ("left out", "excluded by --exclude *.txt")
    assert kinds["sub/deep/scan.jpg"] == ("left out", "excluded by --exclude sub/deep/*.jpg")
    assert run("verify", dest, "--against", made.photos, "--model", TINY).exit_code == 0


def test_compress_does_not_replace_an_existing_archive_without_force(
    made: Made, tmp_path: Path
) -> None:
    """An existing output exits 2, names it, and is left unchanged byte for byte."""
    dest = tmp_path / "out.rca"
    dest.write_bytes(b"precious bytes")

    line = error_line(run("compress", made.photos, "-o", dest, "--model", TINY), 2, dest)

    assert "already exists" in line
    assert dest.read_bytes() == b"precious bytes"


def test_compress_with_force_replaces_an_existing_archive(made: Made, tmp_path: Path) -> None:
    """With --force the existing output is replaced by a complete archive."""
    dest = tmp_path / "out.rca"
    dest.write_bytes(b"precious bytes")

    result = run("compress", made.lone, "-o", dest, "--model", TINY, "--force")

    assert result.exit_code == 0, result.stderr
    _, entries = rowcast.read_index(dest)
    assert [e.path for e in entries] == ["lone.png"]


def test_compress_into_a_missing_directory_is_a_usage_error(made: Made, tmp_path: Path) -> None:
    """An output whose folder does not exist exits 2 with one line, not an internal error."""
    dest = tmp_path / "no-such-folder" / "out.rca"

    error_line(run("compress", made.lone, "-o", dest, "--model", TINY), 2, dest)

    assert not dest.parent.exists()


def test_a_file_name_the_archive_cannot_hold_is_refused_before_any_coding(
    tmp_path: Path,
) -> None:
    """A name with a drive-letter prefix (not portable) exits 2 naming the input file."""
    folder = tmp_path / "names"
    folder.mkdir()
    bad = folder / "C:frame.png"
    _gray().save(bad)
    dest = tmp_path / "out.rca"

    error_line(run("compress", folder, "-o", dest, "--model", TINY), 2, bad)

    assert not dest.exists()


def test_compress_onto_a_directory_is_a_usage_error_even_with_force(
    made: Made, tmp_path: Path
) -> None:
    """An output path that is a directory exits 2 and the directory is left alone."""
    folder = tmp_path / "folder"
    folder.mkdir()

    error_line(run("compress", made.lone, "-o", folder, "--model", TINY, "--force"), 2, folder)

    assert folder.is_dir()
    assert files_under(folder) == set()
# --- models --------------------------------------------------------------------------------------


def test_a_model_path_that_does_not_exist_is_a_usage_error(made: Made, tmp_path: Path) -> None:
    """--model naming a missing file exits 2 and names it."""
    missing = tmp_path / "absent.safetensors"
    dest = tmp_path / "out.rca"

    error_line(run("compress", made.lone, "-o", dest, "--model", missing), 2, missing)

    assert not dest.exists()


def test_a_model_file_that_is_not_a_model_is_a_usage_error(made: Made, tmp_path: Path) -> None:
    """--model naming some other file exits 2 and says it is not a model file."""
    bogus = tmp_path / "bogus.safetensors"
    bogus.write_bytes(b"\x00" * 64)

    line = error_line(run("compress", made.lone, "-o", tmp_path / "o.rca", "--model", bogus), 2,
                      bogus)

    assert "not a rowcast model" in line


def test_decompress_with_a_missing_model_file_is_a_usage_error(
    made: Made, tmp_path: Path
) -> None:
    """Decoding needs the model: a missing --model file exits 2 and nothing is restored."""
    model_entry(made.archive)
    missing = tmp_path / "absent.safetensors"
    out = tmp_path / "out"

    error_line(run("decompress", made.archive, "-o", out, "--model", missing), 2, missing)

    assert files_under(out) == set()


def test_decompress_with_another_model_names_the_archives_model(
    made: Made, tmp_path: Path
) -> None:
    """An archive made with one model and decoded with another exits 2, saying which model the
    archive needs; nothing is restored."""
    model_entry(made.archive)
    out = tmp_path / "out"

    line = error_line(run("decompress", made.archive, "-o", out, "--model", other_model(tmp_path)),
                      2, made.archive)

    assert f"model {TINY_NAME}" in line
    assert files_under(out) == set()


def test_an_embedded_model_decodes_with_no_model_file_present(made: Made, tmp_path: Path) -> None:
    """--embed-model stores the model, packed, in the archive: after the file is deleted,
    list, verify and decompress need no --model; the archive is larger by the packed
    model's bytes (fewer than the model file's), which list and the summary show."""
    own = tmp_path / "own.safetensors"
    shutil.copy(TINY, own)
    plain, embedded = tmp_path / "plain.rca", tmp_path / "embedded.rca"
    assert run("compress", made.originals, "-o", plain, "--model", own).exit_code == 0
    result = run("compress", made.originals, "-o", embedded, "--model", own, "--embed-model")
    assert result.exit_code == 0, result.stderr
    packed = len(rowcast.modelpack.smallest(rowcast.api.load_model(own)))
    assert packed < TINY.stat().st_size
    assert f"(embedded: {packed} bytes)" in result.stdout
    own.unlink()

    assert 0 < embedded.stat().st_size - plain.stat().st_size - packed < 8
    assert f"(embedded: {packed} bytes)" in run("list", embedded).stdout
    assert run("verify", embedded, "--against", made.originals).exit_code == 0
    out = tmp_path / "out"
    assert run("decompress", embedded, "-o", out).exit_code == 0
    assert files_under(out) == set(SOURCES)


@pytest.mark.parametrize("embedded", ["junk", "junk packed", "another model",
                                      "another model packed"])
def test_an_embedded_model_that_is_not_the_recorded_one_is_refused(made: Made, tmp_path: Path,
                                                                    embedded: str) -> None:
    """Bytes that are no model, or a model of another identity, as a model file or packed:
    the archive is refused as damaged (exit 1), naming it; nothing is decoded with them."""
    ident, entries = rowcast.read_index(made.archive)
    packed = embedded.endswith("packed")
    other = rowcast.api.load_model()
    data = (b"junk" if embedded.startswith("junk")
            else rowcast.modelpack.smallest(other) if packed else other.file)
    damaged = tmp_path / "damaged.rca"
    images = [e for e in entries if e.kind == "image"][:1]
    rowcast.archive.write_archive(damaged, replace(ident, embedded=data, packed=packed), [
        rowcast.archive.Entry(e.path, e.kind, e.format, e.width, e.height, e.method,
                              e.checksum, rowcast.archive.read_payload(made.archive, e),
                              rowcast.archive.read_extras(made.archive, e), parts=e.parts)
        for e in images])

    result = run("verify", damaged)
    line = error_line(result, 1, damaged)
    assert ("not a rowcast model file" in line if embedded == "junk"
            else "not a packed rowcast model" in line if embedded == "junk packed"
            else "the embedded model is not the model the archive records" in line)


def test_archives_of_every_bundled_model_decode_without_naming_it(tmp_path: Path) -> None:
    """Earlier default models stay in the package, so an archive made with any bundled model
    decodes and verifies with no --model after the default changes."""
    folder = resources.files("rowcast").joinpath("models")
    bundled = sorted(ref.name for ref in folder.iterdir() if ref.name.endswith(".safetensors"))
    assert "default.safetensors" in bundled
    image = tmp_path / "cam.png"
    Image.fromarray(np.tile(np.arange(24, dtype=np.uint8) * 9, (20, 1))).save(image)
    for name in bundled:
        with resources.as_file(folder.joinpath(name)) as model:
            archive = tmp_path / f"{name}.rowcast"
            assert run("compress", image, "-o", archive, "--model", model).exit_code == 0
        out = tmp_path / f"{name}-out"
        assert run("decompress", archive, "-o", out).exit_code == 0, name
        (mode, got), (_, want) = pixels(out / "cam.png"), pixels(image)  # Pillow reads both
        assert mode == "L" and np.array_equal(got, want)
        assert run("verify", archive).exit_code == 0


def test_verify_with_another_model_is_a_usage_error(made: Made, tmp_path: Path) -> None:
    """`verify` with the wrong model exits 2 (a usage error), not 1 (damaged data)."""
    model_entry(made.archive)

    line = error_line(run("verify", made.archive, "--model", other_model(tmp_path)), 2,
                      made.archive)

    assert f"model {TINY_NAME}" in line


# --- decompress never overwrites without --force ------------------------------------------


def test_decompress_does_not_replace_an_existing_file_without_force(
    made: Made, tmp_path: Path
) -> None:
    """A target that exists exits 2 naming it; it is untouched and nothing else is written."""
    out = tmp_path / "out"
    (out / "sub").mkdir(parents=True)
    existing = out / "sub" / "gray.png"
    existing.write_bytes(b"keep me")

    line = error_line(run("decompress", made.archive, "-o", out, "--model", TINY), 2, existing)

    assert "already exists" in line
    assert existing.read_bytes() == b"keep me"
    assert files_under(out) == {"sub/gray.png"}
    assert sorted(p.name for p in out.iterdir()) == ["sub"]


def test_decompress_with_force_replaces_existing_files(made: Made, tmp_path: Path) -> None:
    """With --force an existing target is replaced by the restored image."""
    out = tmp_path / "out"
    (out / "sub").mkdir(parents=True)
    (out / "sub" / "gray.png").write_bytes(b"replace me")

    result = run("decompress", made.archive, "-o", out, "--model", TINY, "--force")

    assert result.exit_code == 0, result.stderr
    assert files_under(out) == set(SOURCES)
    assert np.array_equal(pixels(out / "sub" / "gray.png")[1],
                          pixels(made.originals / "sub" / "gray.png")[1])


def test_decompress_never_writes_through_a_symbolic_link_in_the_output_folder(
        made: Made, tmp_path: Path) -> None:
    """A link inside the output folder where an entry's folder goes is refused, --force or
    not, before anything is written; the place it points to stays empty."""
    out, elsewhere = tmp_path / "out", tmp_path / "elsewhere"
    out.mkdir()
    elsewhere.mkdir()
    (out / "sub").symlink_to(elsewhere, target_is_directory=True)

    result = run("decompress", made.archive, "-o", out, "--model", TINY, "--force")

    line = error_line(result, 2, out / "sub")
    assert "is a symbolic link;" in line and "would not be written inside the output" in line
    assert list(elsewhere.iterdir()) == [] and files_under(out) == set()


def test_decompress_with_force_replaces_all_or_nothing(made: Made, tmp_path: Path,
                                                        monkeypatch: pytest.MonkeyPatch) -> None:
    """When a move into place fails midway, the files already replaced are put back: the
    output folder is as it was."""
    out = tmp_path / "out"
    out.mkdir()
    before = {}
    for name in SOURCES:
        (out / name).parent.mkdir(parents=True, exist_ok=True)
        (out / name).write_bytes(b"old " + name.encode())
        before[name] = (out / name).read_bytes()
    real_replace, moves = os.replace, []

    def failing_replace(src, dst):
        moves.append(dst)
        if len(moves) == 7:  # the fourth file's move, after three were replaced
            raise OSError(28, "No space left on device", str(dst))
        real_replace(src, dst)

    monkeypatch.setattr(rowcast.api.os, "replace", failing_replace)
    result = run("decompress", made.archive, "-o", out, "--model", TINY, "--force")

    assert result.exit_code == 1
    assert {name: (out / name).read_bytes() for name in SOURCES} == before
    assert files_under(out) == set(SOURCES)  # nor a staging folder left behind


def test_decompress_into_a_file_is_a_usage_error(made: Made, tmp_path: Path) -> None:
    """An output path that is a regular file exits 2 with one line and is left unchanged."""
    target = tmp_path / "afile"
    target.write_bytes(b"plain")

    error_line(run("decompress", made.archive, "-o", target, "--model", TINY), 2, target)

    assert target.read_bytes() == b"plain"


# --- damaged archives -------------------------------------------------------------------------


def test_a_truncated_archive_fails_every_command_with_exit_one(
    made: Made, tmp_path: Path
) -> None:
    """An archive cut short is a data error for list, verify and decompress; nothing is
    restored."""
    damaged = copy_of(made, tmp_path)
    damaged.write_bytes(damaged.read_bytes()[:-9])
    out = tmp_path / "out"

    error_line(run("list", damaged), 1, damaged)
    error_line(run("verify", damaged, "--model", TINY), 1, damaged)
    error_line(run("decompress", damaged, "-o", out, "--model", TINY), 1, damaged)
    assert files_under(out) == set()


@pytest.fixture
def flipped(made: Made, tmp_path: Path) -> tuple[Path, str]:
    """A copy of the archive with one byte in the middle of a model-coded payload inverted."""
    damaged = copy_of(made, tmp_path)
    entry = model_entry(damaged)
    data = bytearray(damaged.read_bytes())
    data[entry.offset + entry.length // 2] ^= 0xFF
    damaged.write_bytes(bytes(data))
    return damaged, entry.path


def test_verify_fails_on_a_flipped_payload_byte(flipped: tuple[Path, str]) -> None:
    """A damaged payload fails its decoding or its checksum: verify exits 1 naming the entry
    and that entry alone."""
    damaged, entry = flipped

    result = run("verify", damaged, "--model", TINY)

    assert result.exit_code == 1
    assert result.stderr.count("rowcast: ") == 1 and entry in result.stderr
    assert "Traceback" not in result.stderr


def test_decompress_restores_every_entry_but_the_damaged_one(
    flipped: tuple[Path, str], tmp_path: Path
) -> None:
    """One damaged payload costs that entry only: the others are restored, the damaged one
    is named, and the exit status is 1."""
    damaged, entry = flipped
    out = tmp_path / "out"

    result = run("decompress", damaged, "-o", out, "--model", TINY)

    assert result.exit_code == 1
    assert entry in result.stderr
    assert result.stderr.splitlines()[-1] == "rowcast: error: 1 entry could not be restored"
    assert files_under(out) == set(SOURCES) - {entry}


def test_an_undecodable_entry_in_a_batch_is_the_one_named(tmp_path: Path) -> None:
    """Entries of one size decode together, yet when one of them cannot be decoded, the
    problem names that entry alone and the others verify."""
    folder = tmp_path / "cams"
    folder.mkdir()
    for i in range(3):
        Image.fromarray(smooth(16, 16, 3, i), "RGB").save(folder / f"cam{i}.png")
    made = tmp_path / "cams.rca"
    rowcast.compress([folder], made, model=TINY)
    entries = {e.path: e for e in rowcast.read_index(made)[1]}
    assert all(e.method == "coded" for e in entries.values())
    data = bytearray(made.read_bytes())
    data[entries["cam1.png"].offset] = 9  # a group that claims nine pieces
    made.write_bytes(bytes(data))

    check = rowcast.verify(made, model=TINY)

    assert check.checked == 2
    assert len(check.problems) == 1 and "cam1.png" in check.problems[0]


def test_list_of_a_file_that_is_not_an_archive_is_a_data_error(tmp_path: Path) -> None:
    """`list` of some other file exits 1 and says it is not an archive."""
    other = tmp_path / "holiday.png"
    Image.fromarray(smooth(4, 4, 3, 0), "RGB").save(other)

    line = error_line(run("list", other), 1, other)

    assert "not a rowcast archive" in line


def test_list_of_a_missing_archive_is_a_usage_error(tmp_path: Path) -> None:
    """`list` of a path that does not exist exits 2 and names it."""
    missing = tmp_path / "gone.rca"

    error_line(run("list", missing), 2, missing)


# --- output options -----------------------------------------------------------------------------


def test_quiet_prints_nothing_for_compress_and_decompress(made: Made, tmp_path: Path) -> None:
    """--quiet: no summary on stdout and no progress on stderr."""
    dest = tmp_path / "q.rca"
    compressed = run("compress", made.photos, "-o", dest, "--model", TINY, "--quiet")
    restored = run("decompress", dest, "-o", tmp_path / "out", "--model", TINY, "--quiet")

    assert compressed.exit_code == 0, compressed.stderr
    assert restored.exit_code == 0, restored.stderr
    assert (compressed.stdout, compressed.stderr) == ("", "")
    assert (restored.stdout, restored.stderr) == ("", "")
    assert files_under(tmp_path / "out") == set(SOURCES) - {"lone.png"}


def test_compress_json_reports_counts_rate_and_entries(made: Made, tmp_path: Path) -> None:
    """`compress --json` prints only a JSON document: the archive size, the counts of
    images, kept files and left-out files, and bits per subpixel over the coded images
    (their payloads and extras)."""
    dest = tmp_path / "j.rca"

    result = run("compress", made.photos, made.lone, "-o", dest, "--model", TINY, "--json")

    assert result.exit_code == 0, result.stderr
    report = json.loads(result.stdout)
    assert report["bytes"] == dest.stat().st_size
    assert (report["images"], report["files_kept"], report["left_out"]) == (4, 2, 0)
    assert report["model"] == TINY_NAME
    assert {e["path"] for e in report["entries"]} == set(SOURCES)
    images = [e for e in report["entries"] if e["kind"] == "image"]
    subpixels = sum(e["width"] * e["height"] * (3 if e["format"] == "RGB" else 1)
                    for e in images)
    assert report["bits_per_subpixel"] == pytest.approx(
        8.0 * sum(e["bytes"] for e in images) / subpixels)
    _, entries = rowcast.read_index(dest)
    assert {e.path: e.length + e.extras_length for e in entries} == {
        e["path"]: e["bytes"] for e in report["entries"]}


def test_file_names_are_printed_verbatim(tmp_path: Path) -> None:
    """Names that look like markup or emoji codes are listed and restored exactly as given."""
    photos = tmp_path / "photos"
    photos.mkdir()
    names = ["ab:joy:.png", "[red]x.png"]
    for seed, name in enumerate(names):
        _rgb(seed).save(photos / name)
    dest = tmp_path / "odd.rca"
    assert run("compress", photos, "-o", dest, "--model", TINY, "-q").exit_code == 0

    listed = run("list", dest, "--json")
    table = run("list", dest)
    restored = run("decompress", dest, "-o", tmp_path / "out", "--model", TINY, "-q")

    assert {e["path"] for e in json.loads(listed.stdout)["entries"]} == set(names)
    for name in names:
        assert name in table.stdout
    assert restored.exit_code == 0, restored.stderr
    assert files_under(tmp_path / "out") == set(names)


def test_errors_name_the_file_from_a_real_process(tmp_path: Path) -> None:
    """Run as `python -m rowcast`, a refused file is one line naming it and the reason, then
    the error line; exit 1, nothing on stdout."""
    cmyk = tmp_path / "ink.tif"
    _rgb().convert("CMYK").save(cmyk)

    done = subprocess.run(
        [sys.executable, "-m", "rowcast", "compress", str(cmyk), "-o", str(tmp_path / "o.rca"),
         "--model", str(TINY)],
        capture_output=True, text=True, timeout=120, check=False)

    assert done.returncode == 1
    assert done.stdout == ""
    lines = done.stderr.splitlines()
    assert lines[0].startswith(f"rowcast: {cmyk}: ") and "CMYK" in lines[0]
    assert lines[1].startswith("rowcast: error: 1 file cannot be kept")
    assert not (tmp_path / "o.rca").exists()


# --- the Python API names the same errors -------------------------------------------------------


def test_api_compress_of_a_missing_path_raises_usage_error(tmp_path: Path) -> None:
    """rowcast.compress raises UsageError (exit status 2) for a missing input."""
    missing = tmp_path / "absent"

    with pytest.raises(rowcast.UsageError, match="absent") as caught:
        rowcast.compress([missing], tmp_path / "out.rca", model=TINY)

    assert caught.value.exit_code == 2


def test_api_compress_of_a_cmyk_file_raises_data_error(tmp_path: Path) -> None:
    """rowcast.compress raises DataError (exit status 1) for an image it cannot keep."""
    cmyk = tmp_path / "ink.tif"
    _rgb().convert("CMYK").save(cmyk)

    with pytest.raises(rowcast.DataError, match="CMYK") as caught:
        rowcast.compress([cmyk], tmp_path / "out.rca", model=TINY)

    assert caught.value.exit_code == 1
    assert str(cmyk) in str(caught.value)
    assert not (tmp_path / "out.rca").exists()


def test_api_round_trip_and_verify(made: Made, tmp_path: Path) -> None:
    """compress, read_index, decompress and verify work from Python like the commands do."""
    dest = tmp_path / "api.rca"
    summary = rowcast.compress([made.photos, made.lone], dest, model=TINY)
    ident, entries = rowcast.read_index(dest)
    restored = rowcast.decompress(dest, tmp_path / "out", model=TINY)
    check = rowcast.verify(dest, against=made.originals, model=TINY)

    assert summary.archive_bytes == dest.stat().st_size
    assert ident.name == TINY_NAME
    assert {e.path for e in entries} == set(SOURCES)
    assert {p.relative_to(tmp_path / "out").as_posix() for p in restored.written} == set(SOURCES)
    assert restored.failed == [] and restored.left_out == []
    assert (check.ok, check.checked, check.problems) == (True, 6, [])


@pytest.mark.skipif(not hasattr(os, "symlink"), reason="needs symbolic links")
def test_a_link_to_a_file_is_archived_as_its_content_and_said_so(tmp_path: Path) -> None:
    """Nothing changes silently: a symbolic link to an image or another file is archived
    as the content it points to, the summary and --json name it with its target, and it
    comes back as a regular file with that content."""
    folder = tmp_path / "in"
    (folder / "sub").mkdir(parents=True)
    ramp = np.tile(np.arange(32, dtype=np.uint8) * 7, (16, 1))
    Image.fromarray(ramp).save(folder / "sub" / "a.png")
    (folder / "notes.txt").write_text("calibration 3\n")
    (folder / "same.png").symlink_to("sub/a.png")
    (folder / "today.txt").symlink_to("notes.txt")
    archive = tmp_path / "a.rca"
    result = run("compress", folder, "-o", archive)
    assert result.exit_code == 0, result.stderr
    assert "2 symbolic links archived as the files they point to" in result.stdout
    assert "same.png -> sub/a.png" in result.stdout and "today.txt -> notes.txt" in result.stdout
    rows = json.loads(run("compress", folder, "-o", archive, "--force", "--json").stdout)
    assert {e["path"]: e["link"] for e in rows["entries"] if e.get("link")} == {
        "same.png": "sub/a.png", "today.txt": "notes.txt"}
    assert run("verify", archive, "--against", folder).exit_code == 0
    out = tmp_path / "out"
    assert run("decompress", archive, "-o", out).exit_code == 0
    assert not (out / "same.png").is_symlink() and not (out / "today.txt").is_symlink()
    assert (out / "today.txt").read_text() == "calibration 3\n"
    assert np.array_equal(np.asarray(Image.open(out / "same.png")),
                          np.asarray(Image.open(folder / "sub" / "a.png")))


def test_an_empty_folder_is_recorded_as_left_out_with_the_reason(tmp_path: Path) -> None:
    """An empty folder under the inputs does not vanish unsaid: it is an entry left out,
    with the reason, in the summary, the archive and `list`; verify --against passes."""
    folder = tmp_path / "in"
    (folder / "night" / "none-yet").mkdir(parents=True)
    (folder / "day").mkdir()
    (folder / "day" / "log.txt").write_text("ok\n")
    archive = tmp_path / "a.rca"
    result = run("compress", folder, "-o", archive)
    assert result.exit_code == 0, result.stderr
    assert "night/none-yet (an empty folder" in result.stdout
    listed = run("list", archive).stdout
    assert "night/none-yet" in listed and "left out" in listed
    assert run("verify", archive, "--against", folder).exit_code == 0
