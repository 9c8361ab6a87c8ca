"""Image files to 8-bit pixel planes in coding order, and back; refuse what we cannot keep.

An image becomes an array (planes, height, width) of uint8: gray is one plane, RGB three
(R, G, B). Anything that would not survive that exactly (16-bit, palette, alpha,
transparency keys, CMYK, several frames) is refused with the reason, never converted.
"""

from __future__ import annotations

import contextlib
import hashlib
from collections.abc import Iterator
from pathlib import Path

import numpy as np
from PIL import Image, UnidentifiedImageError

PLANES = {"L": 1, "RGB": 3}

_REASONS = {
    "1": "1-bit images are not supported yet",
    "P": "palette images are not supported yet",
    "PA": "palette images with alpha are not supported yet",
    "LA": "images with an alpha channel are not supported yet",
    "RGBA": "images with an alpha channel are not supported yet",
    "RGBa": "images with an alpha channel are not supported yet",
    "La": "images with an alpha channel are not supported yet",
    "CMYK": "CMYK images are not supported",
    "YCbCr": "YCbCr images are not supported",
    "LAB": "Lab images are not supported",
    "HSV": "HSV images are not supported",
    "I": "images deeper than 8 bits are not supported yet",
    "F": "floating-point images are not supported",
}


class ImageError(Exception):
    """An input that cannot be coded exactly; the message names the file and the reason."""


@contextlib.contextmanager
def _opened(path: Path) -> Iterator[Image.Image]:
    """An image whose format we can keep exactly; every failure becomes an ImageError."""
    try:
        with Image.open(path) as im:
            mode = im.mode
            if getattr(im, "n_frames", 1) > 1:
                raise ImageError(f"{path}: has {im.n_frames} frames; only single images "
                                 "are supported")
            if mode not in PLANES:
                reason = _REASONS.get(mode)
                if reason is None and mode.startswith("I;16"):
                    reason = "16-bit images are not supported yet"
                raise ImageError(f"{path}: {reason or f'pixel format {mode} is not supported'}")
            if "transparency" in im.info:
                raise ImageError(f"{path}: has a transparency key, which would be lost")
            yield im
    except FileNotFoundError:
        raise ImageError(f"{path}: no such file") from None
    except IsADirectoryError:
        raise ImageError(f"{path}: is a directory") from None
    except PermissionError:
        raise ImageError(f"{path}: permission denied") from None
    except UnidentifiedImageError:
        raise ImageError(f"{path}: not an image Pillow can read") from None
    except (OSError, SyntaxError, ValueError) as exc:
        raise ImageError(f"{path}: unreadable image ({exc})") from None


def probe(path: Path) -> tuple[str, int, int]:
    """(mode, width, height) from the file's header, or ImageError: a cheap check up front."""
    with _opened(path) as im:
        return im.mode, im.width, im.height


def read_planes(path: Path) -> tuple[np.ndarray, str]:
    """(planes uint8 (P, H, W), mode) of an image file, or ImageError saying why not."""
    with _opened(path) as im:
        im.load()
        arr = np.asarray(im, dtype=np.uint8)
        mode = im.mode
    planes = arr[None] if arr.ndim == 2 else arr.transpose(2, 0, 1)
    return np.ascontiguousarray(planes), mode


def to_image(planes: np.ndarray, mode: str) -> Image.Image:
    """A Pillow image of the given mode from planes (P, H, W)."""
    if planes.shape[0] == 1:
        return Image.fromarray(planes[0], mode)
    return Image.fromarray(np.ascontiguousarray(planes.transpose(1, 2, 0)), mode)


def as_rgb(planes: np.ndarray) -> np.ndarray:
    """Three planes for the network: gray is repeated, RGB is unchanged."""
    return planes if planes.shape[0] == 3 else np.repeat(planes, 3, axis=0)


def checksum(planes: np.ndarray) -> bytes:
    """SHA-256 of the raw planes, plane-major: what the archive records for each image."""
    return hashlib.sha256(np.ascontiguousarray(planes, dtype=np.uint8).tobytes()).digest()
