"""Held-out thumbnails from the photographs that scikit-image ships in its wheel.

These images never enter training; tests and published figures use them. Thumbnails are
square crops reduced with a box filter, the way a camera gateway would make them.
Needs scikit-image installed (a test and benchmark dependency, not a runtime one).
"""

from __future__ import annotations

from pathlib import Path

import numpy as np
from PIL import Image

RGB_PHOTOS = ("astronaut.png", "chelsea.png", "coffee.png", "rocket.jpg", "motorcycle_left.png",
              "hubble_deep_field.jpg", "ihc.png", "retina.jpg")
GRAY_PHOTOS = ("camera.png", "coins.png", "moon.png", "brick.png", "grass.png", "gravel.png")


def data_dir() -> Path:
    """Where scikit-image keeps its bundled images."""
    import skimage

    return Path(skimage.__file__).parent / "data"


def _squares(img: Image.Image, crops: int) -> list[Image.Image]:
    """The centre square, then the corners of it at half its side (more detail per pixel)."""
    w, h = img.size
    side = min(w, h)
    left, top = (w - side) // 2, (h - side) // 2
    boxes = [(left, top, left + side, top + side)]
    half = side // 2
    for dy, dx in ((0, 0), (0, half), (half, 0), (half, half))[: crops - 1]:
        boxes.append((left + dx, top + dy, left + dx + half, top + dy + half))
    return [img.crop(b) for b in boxes]


def thumbnails(names: tuple[str, ...], mode: str, size: int = 64, crops: int = 1) -> list:
    """(name, planes (P, size, size) uint8) for each photo and crop, in a fixed order."""
    out = []
    for name in names:
        with Image.open(data_dir() / name) as im:
            img = im.convert(mode)
        for i, sq in enumerate(_squares(img, crops)):
            small = np.asarray(sq.resize((size, size), Image.Resampling.BOX))
            planes = small[None] if small.ndim == 2 else small.transpose(2, 0, 1)
            out.append((f"{Path(name).stem}-{i}", np.ascontiguousarray(planes)))
    return out


def write_pngs(items: list, folder: Path, mode: str) -> list[Path]:
    """Save thumbnails as PNG files (for command-line tests and benchmarks)."""
    folder.mkdir(parents=True, exist_ok=True)
    paths = []
    for name, planes in items:
        arr = planes[0] if planes.shape[0] == 1 else planes.transpose(1, 2, 0)
        path = folder / f"{name}.png"
        Image.fromarray(np.ascontiguousarray(arr), mode).save(path)
        paths.append(path)
    return paths
