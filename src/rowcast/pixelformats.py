"""The pixel formats rowcast keeps: one table, read by every other module.

A picture's values are an array (planes, height, width): uint8 for formats of 1 or 8 bits,
uint16 for 16-bit ones. Each format says how its planes go to the predictor: `groups` lists
the planes coded together as one predictor image (three planes as R, G, B; one plane as
gray), in coding order. A format's `code` is what the archive records; codes are never
reused. Whatever is not in this table is refused by the readers with the reason.
"""

from __future__ import annotations

from dataclasses import dataclass


@dataclass(frozen=True)
class PixelFormat:
    """One way of holding pixel values, and how its planes map to the predictor."""

    name: str  # ours, shown by `list`
    code: int  # the archive's record of it
    planes: int  # planes held, in order
    bits: int  # bits per subpixel: 1, 8 or 16
    groups: tuple[tuple[int, ...], ...]  # planes coded together, in coding order
    palette: bool = False  # the one plane holds indices into a palette
    alpha: bool = False  # the last plane is opacity
    about: str = ""  # one line for people

    @property
    def dtype(self) -> str:
        """numpy dtype of the values."""
        return "uint16" if self.bits == 16 else "uint8"

    @property
    def maximum(self) -> int:
        """The largest value a subpixel may hold."""
        return (1 << self.bits) - 1


FORMATS: tuple[PixelFormat, ...] = (
    PixelFormat("L", 1, 1, 8, ((0,),), about="8-bit gray"),
    PixelFormat("RGB", 2, 3, 8, ((0, 1, 2),), about="8-bit colour"),
    PixelFormat("LA", 3, 2, 8, ((0,), (1,)), alpha=True, about="8-bit gray with alpha"),
    PixelFormat("RGBA", 4, 4, 8, ((0, 1, 2), (3,)), alpha=True,
                about="8-bit colour with alpha (colour under alpha 0 kept)"),
    PixelFormat("P", 5, 1, 8, ((0,),), palette=True,
                about="palette indices, with the palette and its transparency"),
    PixelFormat("1", 6, 1, 1, ((0,),), about="1-bit, values 0 and 1"),
    PixelFormat("L16", 7, 1, 16, ((0,),), about="16-bit gray"),
    PixelFormat("LA16", 8, 2, 16, ((0,), (1,)), alpha=True, about="16-bit gray with alpha"),
    PixelFormat("RGB16", 9, 3, 16, ((0, 1, 2),), about="16-bit colour"),
    PixelFormat("RGBA16", 10, 4, 16, ((0, 1, 2), (3,)), alpha=True,
                about="16-bit colour with alpha"),
)

BY_NAME: dict[str, PixelFormat] = {f.name: f for f in FORMATS}
BY_CODE: dict[int, PixelFormat] = {f.code: f for f in FORMATS}


def pixel_format(name: str) -> PixelFormat:
    """The table's row for a format name; KeyError names the unknown one."""
    try:
        return BY_NAME[name]
    except KeyError:
        raise KeyError(f"unknown pixel format {name!r}") from None


def subpixels(name: str, width: int, height: int) -> int:
    """How many values a picture of this format and size holds."""
    return pixel_format(name).planes * width * height
