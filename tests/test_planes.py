"""Specification tests for image files to pixel planes and back (src/rowcast/planes.py).

An image becomes uint8 planes (P, H, W): gray is one plane, RGB three in R, G, B order.
Anything that would not survive that exactly is refused with ImageError naming the file and
the reason; nothing is ever converted.
"""

from __future__ import annotations

import hashlib
from pathlib import Path

import numpy as np
import pytest
from PIL import Image

from rowcast.planes import PLANES, ImageError, as_rgb, checksum, read_planes, to_image


def noise(shape: tuple[int, ...], seed: int = 0) -> np.ndarray:
    """Deterministic random uint8 pixels: every value distinct enough to catch a mix-up."""
    return np.random.default_rng(seed).integers(0, 256, shape, dtype=np.uint8)


def saved(tmp_path: Path, name: str, image: Image.Image, **options) -> Path:
    """Save `image` under tmp_path and return its path."""
    path = tmp_path / name
    image.save(path, **options)
    return path


def test_gray_image_becomes_one_plane_equal_to_pillows_pixels(tmp_path: Path) -> None:
    """An 8-bit gray (L) image reads as one uint8 plane holding exactly Pillow's pixels."""
    pixels = noise((7, 9))
    path = saved(tmp_path, "gray.png", Image.fromarray(pixels, "L"))

    planes, mode = read_planes(path)

    assert mode == "L"
    assert planes.dtype == np.uint8
    assert planes.shape == (1, 7, 9)
    with Image.open(path) as im:
        assert np.array_equal(planes[0], np.asarray(im))


def test_rgb_image_becomes_three_planes_in_red_green_blue_order(tmp_path: Path) -> None:
    """An RGB image reads as three planes: plane 0 is red, plane 1 green, plane 2 blue."""
    pixels = noise((10, 12, 3))
    path = saved(tmp_path, "colour.png", Image.fromarray(pixels, "RGB"))

    planes, mode = read_planes(path)

    assert mode == "RGB"
    assert planes.dtype == np.uint8
    assert planes.shape == (3, 10, 12)
    assert planes.flags.c_contiguous
    with Image.open(path) as im:
        red, green, blue = (np.asarray(band) for band in im.split())
    assert np.array_equal(planes[0], red)
    assert np.array_equal(planes[1], green)
    assert np.array_equal(planes[2], blue)


def test_plane_counts_are_one_for_gray_and_three_for_rgb() -> None:
    """Only L and RGB are coded, with one and three planes."""
    assert PLANES == {"L": 1, "RGB": 3}


def test_checksum_is_sha256_of_plane_major_bytes() -> None:
    """The checksum is SHA-256 over plane 0 row by row, then plane 1, and so on."""
    planes = np.arange(2 * 3 * 4, dtype=np.uint8).reshape(2, 3, 4) * 7
    by_hand = bytes(int(planes[p, y, x]) for p in range(2) for y in range(3) for x in range(4))

    assert checksum(planes) == hashlib.sha256(by_hand).digest()


def test_checksum_follows_logical_order_of_a_non_contiguous_view() -> None:
    """A transposed (pixel-interleaved) view is hashed in plane-major order, not memory order."""
    interleaved = noise((3, 4, 3), seed=1)
    planes = interleaved.transpose(2, 0, 1)
    by_hand = bytes(int(planes[p, y, x]) for p in range(3) for y in range(3) for x in range(4))

    assert not planes.flags.c_contiguous
    assert checksum(planes) == hashlib.sha256(by_hand).digest()
    assert checksum(planes) != hashlib.sha256(interleaved.tobytes()).digest()


REFUSED_MODES = [
    ("1", "png", "1-bit"),
    ("P", "png", "palette"),
    ("RGBA", "png", "alpha"),
    ("LA", "png", "alpha"),
    ("I;16", "png", "16-bit"),
    ("I", "tif", "deeper than 8 bits"),
    ("F", "tif", "floating-point"),
    ("CMYK", "tif", "CMYK"),
]


@pytest.mark.parametrize(("mode", "suffix", "reason"), REFUSED_MODES,
                         ids=[m for m, _, _ in REFUSED_MODES])
def test_every_refused_mode_raises_image_error_naming_file_and_reason(
    tmp_path: Path, mode: str, suffix: str, reason: str
) -> None:
    """A pixel format that 8-bit L/RGB planes cannot hold exactly is refused, never converted."""
    path = saved(tmp_path, f"refused.{suffix}", Image.new(mode, (5, 4)))
    with Image.open(path) as im:
        assert im.mode == mode  # the file really is in the mode under test

    with pytest.raises(ImageError) as caught:
        read_planes(path)

    message = str(caught.value)
    assert str(path) in message
    assert reason in message


def test_gray_png_with_transparency_key_is_refused(tmp_path: Path) -> None:
    """A tRNS key would be lost in the planes, so the image is refused and says why."""
    path = saved(tmp_path, "keyed.png", Image.fromarray(noise((4, 5)), "L"), transparency=3)

    with pytest.raises(ImageError, match="transparency") as caught:
        read_planes(path)

    assert str(path) in str(caught.value)


def test_rgb_png_with_transparency_key_is_refused(tmp_path: Path) -> None:
    """An RGB tRNS colour key is refused like a gray one."""
    image = Image.fromarray(noise((4, 5, 3)), "RGB")
    path = saved(tmp_path, "keyed.png", image, transparency=(1, 2, 3))

    with pytest.raises(ImageError, match="transparency"):
        read_planes(path)


def test_multi_frame_tiff_is_refused_with_its_frame_count(tmp_path: Path) -> None:
    """Only single images are coded: a two-page TIFF is refused, saying how many frames."""
    first = Image.fromarray(noise((4, 5, 3), seed=1), "RGB")
    second = Image.fromarray(noise((4, 5, 3), seed=2), "RGB")
    path = saved(tmp_path, "pages.tif", first, save_all=True, append_images=[second])

    with pytest.raises(ImageError, match="2 frames") as caught:
        read_planes(path)

    assert str(path) in str(caught.value)


TRUNCATED_AT = [("inside the signature", 5), ("inside the header", 20),
                ("half way through the pixel data", None)]


@pytest.mark.parametrize(("where", "cut"), TRUNCATED_AT, ids=[w for w, _ in TRUNCATED_AT])
def test_truncated_png_raises_image_error_not_another_exception(
    tmp_path: Path, where: str, cut: int | None
) -> None:
    """A PNG cut short anywhere before its pixels end is an ImageError naming the file."""
    whole = saved(tmp_path, "whole.png", Image.fromarray(noise((16, 16, 3)), "RGB")).read_bytes()
    path = tmp_path / "cut.png"
    path.write_bytes(whole[: len(whole) // 2 if cut is None else cut])

    with pytest.raises(ImageError) as caught:
        read_planes(path)

    assert str(path) in str(caught.value)


def test_file_that_is_not_an_image_raises_image_error(tmp_path: Path) -> None:
    """Text saved as .png is refused as unreadable, naming the file."""
    path = tmp_path / "notes.png"
    path.write_text("not pixels\n")

    with pytest.raises(ImageError, match="not an image") as caught:
        read_planes(path)

    assert str(path) in str(caught.value)


def test_missing_file_raises_image_error(tmp_path: Path) -> None:
    """A path that does not exist is an ImageError, not FileNotFoundError."""
    path = tmp_path / "absent.png"

    with pytest.raises(ImageError, match="no such file") as caught:
        read_planes(path)

    assert str(path) in str(caught.value)


@pytest.mark.parametrize(("mode", "shape"), [("L", (7, 9)), ("RGB", (10, 12, 3))])
def test_to_image_of_read_planes_round_trips_pixels(
    tmp_path: Path, mode: str, shape: tuple[int, ...]
) -> None:
    """Planes turned back into an image and saved as PNG give the very same pixels and mode."""
    pixels = noise(shape, seed=3)
    source = saved(tmp_path, "source.png", Image.fromarray(pixels, mode))
    planes, read_mode = read_planes(source)

    image = to_image(planes, read_mode)
    assert image.mode == mode
    assert np.array_equal(np.asarray(image), pixels)

    restored = saved(tmp_path, "restored.png", image)
    again, again_mode = read_planes(restored)
    assert again_mode == mode
    assert np.array_equal(again, planes)
    assert checksum(again) == checksum(planes)


def test_as_rgb_repeats_gray_and_keeps_rgb() -> None:
    """The network always sees three planes: gray repeated three times, RGB unchanged."""
    gray = noise((1, 3, 4), seed=4)
    colour = noise((3, 3, 4), seed=5)

    assert np.array_equal(as_rgb(gray), np.concatenate([gray, gray, gray]))
    assert np.array_equal(as_rgb(colour), colour)
