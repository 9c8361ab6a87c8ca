"""Where the bits go: the model's code length of every subpixel of an image, as a heat map.

The predictor codes a picture group by group (`PixelFormat.groups`: R, G, B together,
alpha alone, gray or palette indices alone; 1-bit values as 0 and 255). For each group this
module builds the encoder's own tables, on the base and with the tuning the encoder would
choose (`codec.plan_of`), and reads off each subpixel's code length, -log2 of its symbol's
share of its table. Summed, they are the model's cross-entropy that the encoder reports
for that group (`codec.Coded.cross_entropy`); the tuning's own cost is kept apart, as it
belongs to no pixel.

16-bit formats are refused: `rowcast.deep` splits them into several 8-bit predictor
planes and literal low bits, so no single code length belongs to a subpixel. A group that
the archive would store as zlib or raw bytes (where that is shorter) is still mapped with
the model's code lengths: the map shows what the model thinks of each pixel.
"""

from __future__ import annotations

import io
from dataclasses import dataclass

import numpy as np

from rowcast import codec
from rowcast.entrycodec import ONE_BIT_HIGH
from rowcast.picture import PALETTE, Picture
from rowcast.predictor import Engine
from rowcast.tables import LENGTH_ONE

PLANE_NAMES = {"L": "gray", "LA": "gray,alpha", "RGB": "R,G,B", "RGBA": "R,G,B,alpha",
               "P": "palette index", "1": "1-bit"}
CMAP = "inferno"


@dataclass(frozen=True)
class CostMap:
    """Bits (planes, H, W) the model spends on each subpixel, and the bits of the tuning
    the encoder carries for the groups (not part of any pixel)."""

    bits: np.ndarray
    tuning_bits: float

    @property
    def cross_entropy(self) -> float:
        """The model's cross-entropy of the whole picture, in bits."""
        return float(self.bits.sum())

    @property
    def per_pixel(self) -> np.ndarray:
        """Bits per pixel (H, W): its subpixels summed."""
        return self.bits.sum(axis=0)


def group_bits(engine: Engine, planes: np.ndarray) -> tuple[np.ndarray, float]:
    """(code length in bits of each subpixel (P, H, W), tuning bits) of one predictor
    image (P, H, W) uint8, P 1 or 3, coded as the encoder codes it."""
    count, height, width = planes.shape
    rgb = codec.as_rgb(np.ascontiguousarray(planes))
    plan = codec.plan_of(engine.parallel(rgb[None])[0], rgb, count,
                         model_base=engine.model.base)
    out, base, tune, near = plan.out, plan.base, plan.tune, plan.near
    bits = np.empty((height, width, count))
    rows = max(1, codec.CHUNK // (width * count))
    for y in range(0, height, rows):
        band = slice(y, y + rows)
        pixels = slice(y * width, (y + rows) * width)
        symbols, tables = codec.image_tables(out[band], rgb[:, band], base[:, band], count,
                                             tune, None if near is None else near.band(pixels))
        hits = tables[np.arange(len(symbols)), symbols].astype(np.float64)
        bits[band] = -np.log2(hits / tables.sum(axis=1, dtype=np.float64)).reshape(
            -1, width, count)
    tuning = 0.0 if tune is None else codec.header_length(tune, count, "streamed",
                                                           plan.method) / LENGTH_ONE
    return bits.transpose(2, 0, 1), tuning


def cost_map(engine: Engine, picture: Picture) -> CostMap:
    """The model's code length of every subpixel of the picture; ValueError with the
    reason for a format it cannot map (16-bit)."""
    fmt = picture.pixel_format
    if fmt.bits == 16:
        raise ValueError(f"{fmt.about} ({fmt.name}) is coded as several predictor planes and "
                         "literal bits; cost maps are made for 8-bit and 1-bit formats")
    bits = np.zeros(picture.values.shape)
    tuning = 0.0
    for group in fmt.groups:
        planes = picture.values[list(group)]
        if fmt.bits == 1:
            planes = planes * np.uint8(ONE_BIT_HIGH)
        bits[list(group)], more = group_bits(engine, planes.astype(np.uint8))
        tuning += more
    return CostMap(bits, tuning)


def _shown(picture: Picture) -> tuple[np.ndarray, str | None]:
    """The picture as matplotlib shows it (alpha left out) and the colour map it needs."""
    fmt, values = picture.pixel_format, picture.values
    if fmt.palette:
        palette = np.frombuffer(picture.extra(PALETTE) or bytes(3), np.uint8).reshape(-1, 3)
        return palette[np.minimum(values[0], len(palette) - 1)], None
    if fmt.bits == 1:
        return values[0] * np.uint8(255), "gray"
    colour = values[:3] if fmt.planes >= 3 else values[:1]
    return (colour[0], "gray") if len(colour) == 1 else (colour.transpose(1, 2, 0), None)


def render_png(picture: Picture, costs: CostMap, title: str, planes: bool = False) -> bytes:
    """A PNG: the picture beside a heat map of bits per pixel, or with `planes` one heat
    map per plane (bits per subpixel, one scale for all), with a colour bar in bits.
    Needs matplotlib."""
    import matplotlib

    matplotlib.use("Agg")
    from matplotlib.figure import Figure

    maps = list(costs.bits) if planes else [costs.per_pixel]
    names = PLANE_NAMES[picture.format].split(",") if planes else ["bits per pixel"]
    plot = Figure(figsize=(1.0 + 3.2 * (1 + len(maps)), 3.8), dpi=100, layout="constrained")
    axes = plot.subplots(1, 1 + len(maps), squeeze=False)[0]
    shown, cmap = _shown(picture)
    axes[0].imshow(shown, cmap=cmap, vmin=0, vmax=255, interpolation="nearest")
    axes[0].set_title("image" + (" (alpha not shown)" if picture.pixel_format.alpha else ""))
    top = max(float(m.max()) for m in maps) or 1.0
    for ax, data, name in zip(axes[1:], maps, names, strict=True):
        heat = ax.imshow(data, cmap=CMAP, vmin=0, vmax=top, interpolation="nearest")
        ax.set_title(name)
    for ax in axes:
        ax.set_xticks([])
        ax.set_yticks([])
    plot.colorbar(heat, ax=list(axes[1:]), label="bits per subpixel" if planes else
                  "bits per pixel")
    plot.suptitle(title, fontsize=10)
    buffer = io.BytesIO()
    plot.savefig(buffer, format="png")
    return buffer.getvalue()
