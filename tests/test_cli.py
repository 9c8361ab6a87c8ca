"""Specification tests for the `rowcast` command line and the Python API behind it.

Exit status: 0 success, 1 a data or verification failure, 2 a usage error. Every error is
one line on stderr, starting "rowcast: error: ", naming the file and the reason; never a
traceback, never a partial output.
"""

from __future__ import annotations

import json
import shutil
import subprocess
import sys
from collections.abc import Callable
from dataclasses import dataclass
from importlib import resources
from pathlib import Path

import numpy as np
import pytest
from PIL import Image
from safetensors import safe_open
from safetensors.numpy import load_file, save_file
from typer.testing import CliRunner, Result

import rowcast
from rowcast.archive import VERSION_METHODS
from rowcast.cli import app
from rowcast.tuning import HEADER_BYTES

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


SOURCES = {  # archive path: (restored path)
    "top.png": "top.png",
    "sub/gray.png": "sub/gray.png",
    "sub/deep/photo.bmp": "sub/deep/photo.png",
    "sub/deep/scan.jpg": "sub/deep/scan.png",
    "lone.png": "lone.png",
}


def write_photos(photos: Path) -> None:
    """Nested RGB and gray images in PNG, BMP and JPEG, plus a text file to be ignored."""
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
    coded = [e for e in entries if e.method != "stored"]
    assert coded, "the tiny model stored every image; the test images need to be smoother"
    return coded[0]


# --- compress, list, decompress, verify: the happy path --------------------------------------


def test_compress_takes_nested_directories_and_single_files_by_relative_path(made: Made) -> None:
    """Files under a directory keep their path relative to it; a file named directly keeps its
    own name; files without an image suffix in a directory are skipped."""
    ident, entries = rowcast.read_index(made.archive)

    assert ident.name == TINY_NAME
    assert {e.path for e in entries} == set(SOURCES)


def test_compress_prints_a_summary_and_nothing_on_stderr(made: Made, tmp_path: Path) -> None:
    """Success prints one summary line on stdout and leaves stderr empty (no progress debris)."""
    result = run("compress", made.photos, "-o", tmp_path / "a.rca", "--model", TINY)

    assert result.exit_code == 0, result.stderr
    assert result.stderr == ""
    assert "4 images" in result.stdout
    assert "bits per subpixel" in result.stdout
    assert TINY_NAME in result.stdout


def test_list_shows_every_entry_with_size_mode_bytes_rate_and_method(made: Made) -> None:
    """`list` prints one row per entry: path, width, height, mode, bytes, bits per subpixel,
    method, matching the archive's index."""
    result = run("list", made.archive)

    assert result.exit_code == 0, result.stderr
    assert TINY_NAME in result.stdout
    rows = {line.split()[0]: line.split() for line in result.stdout.splitlines()}
    _, entries = rowcast.read_index(made.archive)
    for e in entries:
        planes = 3 if e.mode == "RGB" else 1
        rate = 8.0 * e.length / (e.width * e.height * planes)
        assert rows[e.path] == [e.path, str(e.width), str(e.height), e.mode, str(e.length),
                                f"{rate:.3f}", e.method]


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
        assert {"path", "width", "height", "mode", "bytes", "bits_per_subpixel",
                "method"} <= set(row)
        assert (row["width"], row["height"], row["mode"], row["bytes"], row["method"]) == (
            e.width, e.height, e.mode, e.length, e.method)
        planes = 3 if e.mode == "RGB" else 1
        assert row["bits_per_subpixel"] == pytest.approx(
            8.0 * e.length / (e.width * e.height * planes))


def test_decompress_restores_pngs_at_the_same_relative_paths(made: Made) -> None:
    """Every entry comes back as a PNG at its relative path (.bmp/.jpg become .png), and
    nothing else is left in the output directory."""
    assert files_under(made.restored) == set(SOURCES.values())
    for restored in SOURCES.values():
        with Image.open(made.restored / restored) as im:
            assert im.format == "PNG"


@pytest.mark.parametrize("name", sorted(SOURCES))
def test_decompress_restores_identical_pixels_and_mode(made: Made, name: str) -> None:
    """Each restored image has exactly the pixels and the mode Pillow reads from the input."""
    original_mode, original = pixels(made.originals / name)
    restored_mode, restored = pixels(made.restored / SOURCES[name])

    assert restored_mode == original_mode
    assert restored.dtype == original.dtype
    assert np.array_equal(restored, original)


def test_verify_exits_zero_when_every_checksum_matches(made: Made) -> None:
    """`verify` decodes everything and exits 0 when every entry matches its checksum."""
    result = run("verify", made.archive, "--model", TINY, "--batch", "1")

    assert result.exit_code == 0, result.stderr
    assert result.stderr == ""
    assert "5 images" in result.stdout


def test_verify_against_the_originals_exits_zero(made: Made) -> None:
    """`verify --against DIR` compares every pixel with DIR and exits 0 when all agree."""
    result = run("verify", made.archive, "--against", made.originals, "--model", TINY)

    assert result.exit_code == 0, result.stderr
    assert result.stderr == ""
    assert str(made.originals) in result.stdout


def test_verify_json_reports_ok_and_the_number_checked(made: Made) -> None:
    """`verify --json` prints ok, checked and problems."""
    result = run("verify", made.archive, "--against", made.originals, "--model", TINY, "--json")

    assert result.exit_code == 0, result.stderr
    assert json.loads(result.stdout) == {"ok": True, "checked": 5, "problems": []}


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


def test_verify_against_fails_when_an_image_is_missing(made: Made, originals_copy: Path) -> None:
    """An archive entry with no counterpart in the directory makes verify exit 1 naming it."""
    (originals_copy / "sub" / "deep" / "photo.bmp").unlink()

    result = run("verify", made.archive, "--against", originals_copy, "--model", TINY)

    assert result.exit_code == 1
    problems = result.stderr.splitlines()
    assert len(problems) == 1
    assert "sub/deep/photo.bmp" in problems[0]
    assert "not found" in problems[0]


def test_verify_against_fails_when_the_directory_has_an_extra_image(
    made: Made, originals_copy: Path
) -> None:
    """An image in the directory that the archive lacks makes verify exit 1 naming it: a
    verified archive must be able to stand in for the directory."""
    Image.fromarray(smooth(5, 6, 3, 9), "RGB").save(originals_copy / "sub" / "extra.png")

    result = run("verify", made.archive, "--against", originals_copy, "--model", TINY)

    assert result.exit_code == 1
    problems = result.stderr.splitlines()
    assert len(problems) == 1
    assert "extra.png" in problems[0]
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


# --- compress refuses what it cannot keep -----------------------------------------------------


def test_compress_of_a_missing_path_is_a_usage_error(tmp_path: Path) -> None:
    """A missing input exits 2, names the path, and writes no archive."""
    missing = tmp_path / "no-such-photos"
    dest = tmp_path / "out.rca"

    line = error_line(run("compress", missing, "-o", dest, "--model", TINY), 2, missing)

    assert "no such file" in line
    assert not dest.exists()


def test_compress_of_a_directory_without_images_is_a_usage_error(tmp_path: Path) -> None:
    """A directory holding no image files exits 2 and says no images were found."""
    empty = tmp_path / "empty"
    empty.mkdir()
    (empty / "readme.txt").write_text("hello\n")

    line = error_line(run("compress", empty, "-o", tmp_path / "out.rca", "--model", TINY), 2,
                      empty)

    assert "no images" in line


def test_compress_of_a_file_that_is_not_an_image_is_a_data_error(tmp_path: Path) -> None:
    """Text named x.png exits 1, names the file, and writes no archive."""
    fake = tmp_path / "x.png"
    fake.write_text("definitely not pixels\n")
    dest = tmp_path / "out.rca"

    line = error_line(run("compress", fake, "-o", dest, "--model", TINY), 1, fake)

    assert "not an image" in line
    assert not dest.exists()


def _gray(seed: int = 0) -> Image.Image:
    return Image.fromarray(smooth(7, 9, 1, seed), "L")


def _rgb(seed: int = 0) -> Image.Image:
    return Image.fromarray(smooth(7, 9, 3, seed), "RGB")


def _two_frames(path: Path, mode: str) -> None:
    first, second = _rgb(1).convert(mode), _rgb(2).convert(mode)
    first.save(path, save_all=True, append_images=[second])


UNSUPPORTED: dict[str, tuple[str, Callable[[Path], None], str]] = {
    "rgba-png": ("rgba.png", lambda p: _rgb().convert("RGBA").save(p), "alpha"),
    "la-png": ("la.png", lambda p: _gray().convert("LA").save(p), "alpha"),
    "palette-png": ("palette.png", lambda p: _rgb().convert("P").save(p), "palette"),
    "16-bit-gray-png": ("deep.png", lambda p: Image.fromarray(
        smooth(7, 9, 1, 0).astype(np.uint16) * 257).save(p), "16-bit"),
    "cmyk-jpeg": ("cmyk.jpg", lambda p: _rgb().convert("CMYK").save(p), "CMYK"),
    "cmyk-tiff": ("cmyk.tif", lambda p: _rgb().convert("CMYK").save(p), "CMYK"),
    "gray-png-with-trns-key": ("keyed.png", lambda p: _gray().save(p, transparency=7),
                               "transparency"),
    "multi-frame-tiff": ("pages.tif", lambda p: _two_frames(p, "RGB"), "frames"),
    "multi-frame-gif": ("anim.gif", lambda p: _two_frames(p, "P"), "frames"),
}


@pytest.mark.parametrize("case", sorted(UNSUPPORTED))
def test_compress_refuses_unsupported_images_saying_why(tmp_path: Path, case: str) -> None:
    """Alpha, palette, 16-bit, CMYK, transparency keys and several frames are refused with
    exit 1 and the reason, never converted; no archive (or temporary file) is written."""
    name, write, reason = UNSUPPORTED[case]
    source = tmp_path / "in" / name
    source.parent.mkdir()
    write(source)
    dest = tmp_path / "out.rca"

    line = error_line(run("compress", source, "-o", dest, "--model", TINY), 1, source)

    assert reason in line
    assert files_under(tmp_path) == {f"in/{name}"}


def test_compress_refuses_a_whole_directory_when_one_image_is_unsupported(
    made: Made, tmp_path: Path
) -> None:
    """One bad image among good ones stops the run before anything is written."""
    photos = Path(shutil.copytree(made.photos, tmp_path / "photos"))
    bad = photos / "sub" / "glass.png"
    _rgb().convert("RGBA").save(bad)
    dest = tmp_path / "out.rca"

    error_line(run("compress", photos, "-o", dest, "--model", TINY), 1, bad)

    assert not dest.exists()


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
        (mode, got), (_, want) = pixels(out / "cam.png"), pixels(image)
        assert mode == "L" and np.array_equal(got, want)
        assert run("verify", archive).exit_code == 0


def test_verify_with_another_model_is_a_usage_error(made: Made, tmp_path: Path) -> None:
    """`verify` with the wrong model exits 2 (a usage error), not 1 (damaged data)."""
    model_entry(made.archive)

    line = error_line(run("verify", made.archive, "--model", other_model(tmp_path)), 2,
                      made.archive)

    assert f"model {TINY_NAME}" in line


# --- decompress is all or nothing -------------------------------------------------------------


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
    assert files_under(out) == set(SOURCES.values())
    assert np.array_equal(pixels(out / "sub" / "gray.png")[1],
                          pixels(made.originals / "sub" / "gray.png")[1])


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
    """A damaged payload fails its decoding or its checksum: verify exits 1 naming the entry."""
    damaged, entry = flipped

    result = run("verify", damaged, "--model", TINY)

    assert result.exit_code == 1
    assert entry in result.stderr
    assert "Traceback" not in result.stderr


def test_an_undecodable_entry_in_a_batch_is_the_one_named(tmp_path: Path) -> None:
    """Entries of one size decode together, yet when one of them cannot be decoded (here its
    tuning header's reserved byte is set), the error names that entry alone."""
    folder = tmp_path / "cams"
    folder.mkdir()
    for i in range(3):
        Image.fromarray(smooth(16, 16, 3, i), "RGB").save(folder / f"cam{i}.png")
    made = tmp_path / "cams.rca"
    rowcast.compress([folder], made, version=3)  # tuned entries: their last header byte is 0
    entries = {e.path: e for e in rowcast.read_index(made)[1]}
    assert all(e.method == "tuned" for e in entries.values())
    data = bytearray(made.read_bytes())
    data[entries["cam1.png"].offset + HEADER_BYTES["tuned"] - 1] = 1
    made.write_bytes(bytes(data))

    check = rowcast.verify(made)

    assert len(check.problems) == 1 and "cam1.png" in check.problems[0]
    assert "cam0.png" not in check.problems[0] and "cam2.png" not in check.problems[0]
    assert "reserved byte" in check.problems[0]


def test_decompress_of_a_flipped_payload_byte_restores_nothing(
    flipped: tuple[Path, str], tmp_path: Path
) -> None:
    """Decompress exits 1 on a damaged payload and leaves no restored file behind, not even
    the entries that decoded before the damaged one."""
    damaged, _ = flipped
    out = tmp_path / "out"

    error_line(run("decompress", damaged, "-o", out, "--model", TINY), 1, damaged)

    assert files_under(out) == set()
    assert not out.exists() or list(out.iterdir()) == []


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
    assert files_under(tmp_path / "out") == set(SOURCES.values()) - {"lone.png"}


def test_compress_json_reports_rate_and_entries(made: Made, tmp_path: Path) -> None:
    """`compress --json` prints only a JSON document with the archive size, bits per subpixel
    over all entries and one record per entry."""
    dest = tmp_path / "j.rca"

    result = run("compress", made.photos, made.lone, "-o", dest, "--model", TINY, "--json")

    assert result.exit_code == 0, result.stderr
    report = json.loads(result.stdout)
    assert report["bytes"] == dest.stat().st_size
    assert report["model"] == TINY_NAME
    assert {e["path"] for e in report["entries"]} == set(SOURCES)
    subpixels = sum(e["width"] * e["height"] * (3 if e["mode"] == "RGB" else 1)
                    for e in report["entries"])
    assert report["bits_per_subpixel"] == pytest.approx(8.0 * report["bytes"] / subpixels)


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


def test_errors_are_one_line_from_a_real_process(tmp_path: Path) -> None:
    """Run as `python -m rowcast`, an error is still exactly one line on stderr, exit 1."""
    rgba = tmp_path / "clear.png"
    _rgb().convert("RGBA").save(rgba)

    done = subprocess.run(
        [sys.executable, "-m", "rowcast", "compress", str(rgba), "-o", str(tmp_path / "o.rca"),
         "--model", str(TINY)],
        capture_output=True, text=True, timeout=120, check=False)

    assert done.returncode == 1
    assert done.stdout == ""
    assert done.stderr.splitlines() == [done.stderr.strip()]
    assert done.stderr.startswith(f"rowcast: error: {rgba}: ")
    assert "alpha" in done.stderr


# --- the Python API names the same errors -------------------------------------------------------


def test_api_compress_of_a_missing_path_raises_usage_error(tmp_path: Path) -> None:
    """rowcast.compress raises UsageError (exit status 2) for a missing input."""
    missing = tmp_path / "absent"

    with pytest.raises(rowcast.UsageError, match="absent") as caught:
        rowcast.compress([missing], tmp_path / "out.rca", model=TINY)

    assert caught.value.exit_code == 2


def test_api_compress_of_an_rgba_file_raises_data_error(tmp_path: Path) -> None:
    """rowcast.compress raises DataError (exit status 1) for an image it cannot keep."""
    rgba = tmp_path / "clear.png"
    _rgb().convert("RGBA").save(rgba)

    with pytest.raises(rowcast.DataError, match="alpha") as caught:
        rowcast.compress([rgba], tmp_path / "out.rca", model=TINY)

    assert caught.value.exit_code == 1
    assert str(rgba) in str(caught.value)
    assert not (tmp_path / "out.rca").exists()


def test_api_round_trip_and_verify(made: Made, tmp_path: Path) -> None:
    """compress, read_index, decompress and verify work from Python like the commands do."""
    dest = tmp_path / "api.rca"
    summary = rowcast.compress([made.photos, made.lone], dest, model=TINY)
    ident, entries = rowcast.read_index(dest)
    written = rowcast.decompress(dest, tmp_path / "out", model=TINY)
    check = rowcast.verify(dest, against=made.originals, model=TINY)

    assert summary.archive_bytes == dest.stat().st_size
    assert ident.name == TINY_NAME
    assert {e.path for e in entries} == set(SOURCES)
    assert {p.relative_to(tmp_path / "out").as_posix() for p in written} == set(SOURCES.values())
    assert (check.ok, check.checked, check.problems) == (True, 5, [])


def test_compress_writes_an_older_format_for_older_readers_from_the_command_line(
    made: Made, tmp_path: Path
) -> None:
    """--format-version 3 writes what rowcast 0.3 reads (no adaptive entries); a version no
    reader knows is a usage error that writes nothing."""
    dest = tmp_path / "old.rca"
    result = run("compress", made.photos, "-o", dest, "--model", TINY, "--format-version", "3")
    assert result.exit_code == 0 and dest.read_bytes()[8:10] == bytes([3, 0])
    assert {e.method for e in rowcast.read_index(dest)[1]} <= VERSION_METHODS[3]
    error_line(run("compress", made.photos, "-o", tmp_path / "no.rca", "--format-version", "9"),
               2, tmp_path / "no.rca")
    assert not (tmp_path / "no.rca").exists()


def test_api_compress_writes_an_older_format_version_for_older_readers(
    made: Made, tmp_path: Path
) -> None:
    """version=3 and 2 tune without surprise gains (rowcast 0.3 and 0.2 have no
    `adaptive`), version=1 codes without tuning (rowcast 0.1 had no `tuned`); the same
    pixels come back from each, and versions no reader knows are usage errors."""
    for version in (6, 5, 4, 3, 2, 1):
        dest = tmp_path / f"v{version}.rca"
        rowcast.compress([made.photos], dest, model=TINY, version=version)
        assert dest.read_bytes()[8:10] == bytes([version, 0])
        methods = {e.method for e in rowcast.read_index(dest)[1]}
        assert methods <= VERSION_METHODS[version]
        assert bool(methods & {"tuned", "adaptive"}) == (version > 1)
        assert rowcast.verify(dest, against=made.photos, model=TINY).ok
    with pytest.raises(rowcast.UsageError, match="cannot write format version 7"):
        rowcast.compress([made.photos], tmp_path / "v7.rca", model=TINY, version=7)
    assert not (tmp_path / "v7.rca").exists()
