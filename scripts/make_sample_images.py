"""Generate sample_images/: invented thumbnails from the Larkspur Hollow Growers' cameras.

Every image is synthesised procedurally with fixed seeds, so the pixel data is reproducible.
Usage: python scripts/make_sample_images.py [OUTDIR]
"""

from __future__ import annotations

import sys
import zlib
from collections.abc import Callable
from functools import partial
from pathlib import Path

import numpy as np
from numpy.typing import NDArray
from PIL import Image

Arr = NDArray[np.float64]
Recipe = Callable[[np.random.Generator], NDArray[np.uint8]]

APPLE = np.array([196.0, 38.0, 30.0])
PEAR = np.array([186.0, 180.0, 66.0])
LEAF = np.array([52.0, 92.0, 38.0])
GRASS = np.array([84.0, 116.0, 50.0])
BARK = np.array([74.0, 56.0, 40.0])

# Keyframes by clock hour: sky top RGB, sky horizon RGB, light level, light tint RGB.
LIGHT_HOURS = np.array([5.5, 7.0, 12.0, 17.0, 19.5])
LIGHT_TABLE = np.array(
    [
        [40, 50, 95, 205, 125, 95, 0.45, 1.00, 0.80, 0.70],
        [90, 130, 190, 235, 190, 150, 0.70, 1.00, 0.90, 0.80],
        [70, 130, 215, 175, 205, 235, 1.00, 1.00, 1.00, 1.00],
        [80, 125, 200, 230, 200, 160, 0.80, 1.00, 0.92, 0.82],
        [45, 55, 110, 235, 130, 80, 0.45, 1.00, 0.75, 0.60],
    ]
)


def rng_for(label: str) -> np.random.Generator:
    """Seed a generator from a label, so a fixed camera keeps the same scene across shots."""
    return np.random.default_rng(zlib.crc32(label.encode()))


def daylight(hour: float) -> tuple[Arr, Arr, float, Arr]:
    """Interpolate sky top, sky horizon, light level and tint for a clock time, so light varies."""
    row = np.array([np.interp(hour, LIGHT_HOURS, col) for col in LIGHT_TABLE.T])
    return row[0:3], row[3:6], float(row[6]), row[7:10]


def grid(h: int, w: int) -> tuple[Arr, Arr]:
    """Pixel-centre coordinates (rows, columns) as float arrays."""
    yy, xx = np.mgrid[0:h, 0:w]
    return yy.astype(float), xx.astype(float)


def smoothstep(t: Arr) -> Arr:
    """Clamp to [0, 1] and ease with 3t^2 - 2t^3, for soft thresholds and interpolation."""
    t = np.clip(t, 0.0, 1.0)
    return t * t * (3.0 - 2.0 * t)


def value_noise(rng: np.random.Generator, h: int, w: int, cell_y: float, cell_x: float) -> Arr:
    """Smoothly interpolated random lattice values in [0, 1] with the given cell size."""
    lattice = rng.random((int(h / cell_y) + 2, int(w / cell_x) + 2))
    y = np.arange(h) / cell_y
    x = np.arange(w) / cell_x
    y0, x0 = y.astype(int), x.astype(int)
    fy, fx = smoothstep(y - y0)[:, None], smoothstep(x - x0)[None, :]
    top = lattice[np.ix_(y0, x0)] * (1 - fx) + lattice[np.ix_(y0, x0 + 1)] * fx
    bottom = lattice[np.ix_(y0 + 1, x0)] * (1 - fx) + lattice[np.ix_(y0 + 1, x0 + 1)] * fx
    return top * (1 - fy) + bottom * fy


def fbm(
    rng: np.random.Generator,
    h: int,
    w: int,
    cell: float,
    octaves: int = 4,
    stretch: float = 1.0,
) -> Arr:
    """Fractal (multi-octave) value noise normalised to [0, 1]; stretch > 1 widens features in x."""
    total = np.zeros((h, w))
    amp = 1.0
    for _ in range(octaves):
        total += amp * value_noise(rng, h, w, max(cell, 1.0), max(cell * stretch, 1.0))
        amp *= 0.5
        cell /= 2.0
    return (total - total.min()) / (np.ptp(total) + 1e-9)


def segment(
    xx: Arr, yy: Arr, p0: tuple[float, float], p1: tuple[float, float], width: float
) -> Arr:
    """Anti-aliased coverage of a straight stroke from p0 to p1 (x, y), for posts, rails, trunks."""
    (x0, y0), (x1, y1) = p0, p1
    dx, dy = x1 - x0, y1 - y0
    t = np.clip(((xx - x0) * dx + (yy - y0) * dy) / (dx * dx + dy * dy + 1e-9), 0.0, 1.0)
    dist = np.hypot(xx - (x0 + t * dx), yy - (y0 + t * dy))
    return np.clip(width / 2 + 0.5 - dist, 0.0, 1.0)


def blur(img: Arr) -> Arr:
    """Soften with a separable [1, 2, 1] kernel, standing in for lens and demosaicing blur."""
    pad = [(1, 1), (1, 1)] + [(0, 0)] * (img.ndim - 2)
    p = np.pad(img, pad, mode="edge")
    v = (p[:-2] + 2 * p[1:-1] + p[2:]) / 4
    return (v[:, :-2] + 2 * v[:, 1:-1] + v[:, 2:]) / 4


def finish(img: Arr, rng: np.random.Generator, sigma: float) -> NDArray[np.uint8]:
    """Blur, add Gaussian sensor noise, round and clip to 8 bits, like a real camera pipeline."""
    noisy = blur(img) + rng.normal(0.0, sigma, img.shape)
    return np.clip(np.rint(noisy), 0, 255).astype(np.uint8)


class Layer:
    """Premultiplied RGB albedo plus coverage, so land can be lit separately from the sky."""

    def __init__(self, h: int, w: int) -> None:
        self.rgb = np.zeros((h, w, 3))
        self.cover = np.zeros((h, w))

    def paint(self, alpha: Arr, colour: Arr) -> None:
        """Composite colour (RGB triple or HxWx3) over the layer with the given coverage."""
        a = alpha[..., None]
        self.rgb = self.rgb * (1 - a) + a * colour
        self.cover = self.cover + alpha * (1 - self.cover)


def draw_tree(
    layer: Layer,
    xx: Arr,
    yy: Arr,
    trng: np.random.Generator,
    tex: tuple[Arr, Arr],
    base: tuple[float, float],
    radius: float,
    sun_x: float,
    fruit: Arr,
) -> None:
    """Paint one fruit tree (trunk, noisy lit canopy, fruit) standing at base (x, y)."""
    bx, by = base
    edge, leaves = tex
    r = radius * trng.uniform(0.85, 1.15)
    cx, cy = bx + trng.uniform(-0.15, 0.15) * r, by - 1.7 * r
    layer.paint(segment(xx, yy, (bx, by), (bx, cy), max(0.8, 0.25 * r)), BARK)
    dx, dy = (xx - cx) / (1.15 * r), (yy - cy) / r
    dist = np.hypot(dx, dy) + 0.45 * (edge - 0.5)
    alpha = np.clip((1 - dist) * r + 0.5, 0.0, 1.0)
    shade = 0.65 + 0.2 * np.clip(-dy, -1, 1) + 0.2 * np.clip(dx * sun_x, -1, 1)
    layer.paint(alpha, LEAF * (shade * (0.55 + 0.9 * leaves))[..., None])
    for _ in range(int(0.16 * r * r)):
        ang, rad = trng.uniform(0, 2 * np.pi), 0.8 * r * np.sqrt(trng.random())
        fx, fy = cx + 1.15 * rad * np.cos(ang), cy + rad * np.sin(ang)
        size = 0.25 + 0.06 * r
        dot = np.clip(size + 0.5 - np.hypot(xx - fx, yy - fy), 0.0, 1.0)
        layer.paint(dot, fruit * trng.uniform(0.7, 1.1))


def orchard(
    rng: np.random.Generator, site: str, hour: float, horizon: float, rows: int, fruit: Arr
) -> NDArray[np.uint8]:
    """RGB 64x64 orchard view: sky, distant treeline, grass and receding rows of fruit trees."""
    h = w = 64
    srng = rng_for(site)
    top, hor, level, tint = daylight(hour)
    sun_x = float(np.clip((hour - 12.0) / 6.0, -1.0, 1.0))
    yy, xx = grid(h, w)
    sky = top + (hor - top) * np.clip(yy / horizon, 0, 1)[..., None]
    sky += (fbm(rng, h, w, 16, stretch=3.0)[..., None] - 0.5) * 24 * level

    land = Layer(h, w)
    ridge = horizon - 1.0 - 4.0 * fbm(srng, 1, w, 10)[0]
    land.paint(np.clip(yy - ridge + 0.5, 0, 1), np.array([60.0, 84.0, 62.0]))
    depth = np.clip((yy - horizon) / (h - horizon), 0, 1)
    grass = GRASS * ((0.7 + 0.6 * fbm(srng, h, w, 5)) * (0.85 + 0.3 * depth))[..., None]
    land.paint(np.clip(yy - horizon + 0.5, 0, 1), grass)

    tex = (fbm(srng, h, w, 4), fbm(srng, h, w, 2.5, octaves=3))
    for d in np.linspace(4.5, 1.2, rows):
        base_y = horizon + (h - horizon - 4) / d
        radius = 10.0 / d
        shadow = np.exp(-(((yy - base_y - 0.3 * radius) / (0.35 * radius)) ** 2)) * (
            1 - 0.5 * abs(sun_x)
        )
        land.rgb *= (1 - 0.35 * level * shadow * (yy > horizon))[..., None]
        spacing = 3.2 * radius
        x = srng.uniform(-spacing, 0)
        while x < w + spacing:
            bx = x + srng.uniform(-0.2, 0.2) * radius
            draw_tree(land, xx, yy, srng, tex, (bx, base_y), radius, sun_x, fruit)
            x += spacing

    lit = land.rgb * (level * tint)
    img = sky * (1 - land.cover)[..., None] + lit
    return finish(img, rng, 2.0)


def ridge_scene(
    rng: np.random.Generator, site: str, hour: float, cover: float, w: int, mast_x: int
) -> NDArray[np.uint8]:
    """RGB weather-ridge view: fractal clouds, hazy layered hills and a weather mast."""
    h = 64
    srng = rng_for(site)
    top, hor, level, tint = daylight(hour)
    yy, xx = grid(h, w)
    horizon = 0.55 * h
    img = top + (hor - top) * np.clip(yy / horizon, 0, 1)[..., None]

    clouds = fbm(rng, h, w, 20, octaves=5, stretch=2.0)
    dens = smoothstep((clouds - (1.0 - cover)) / 0.3) * np.clip(1.3 - 0.8 * yy / horizon, 0, 1)
    cloud_lit = np.minimum(255.0, 250 * (0.55 + 0.45 * level) * tint)
    shading = 0.6 + 0.4 * fbm(rng, h, w, 6, octaves=3)
    img = img * (1 - dens[..., None]) + (cloud_lit * shading[..., None]) * dens[..., None]

    layers = [(-7.0, 5.0, 0.65), (-2.0, 8.0, 0.4), (6.0, 10.0, 0.12)]
    albedo = np.array([70.0, 96.0, 52.0])
    for base, amp, haze in layers:
        line = horizon + base + amp * (fbm(srng, 1, w, 24, octaves=4)[0] - 0.5)
        tex = 0.7 + 0.6 * fbm(srng, h, w, 4)
        ground = albedo * (level * tint) * tex[..., None] * (1 - haze) + hor * haze
        alpha = np.clip(yy - line + 0.5, 0, 1)[..., None]
        img = img * (1 - alpha) + ground * alpha
    foot = float(line[mast_x])
    mast = np.maximum(
        segment(xx, yy, (mast_x, foot), (mast_x, foot - 14), 0.8),
        segment(xx, yy, (mast_x - 2, foot - 13), (mast_x + 2, foot - 13), 0.7),
    )
    img = img * (1 - 0.85 * mast[..., None]) + 0.85 * mast[..., None] * 40 * level
    return finish(img, rng, 2.0)


def frost_leaf(
    rng: np.random.Generator, site: str, frost: float, level: float
) -> NDArray[np.uint8]:
    """Grayscale 48x48 near-infrared close-up of a leaf with veins and frost speckle."""
    size = 48
    srng = rng_for(site)
    yy, xx = grid(size, size)
    img = 40 + 35 * fbm(srng, size, size, 5)

    angle = srng.uniform(0.4, 0.8)
    dx, dy = xx - size / 2, yy - size / 2
    u = (dx * np.cos(angle) + dy * np.sin(angle)) / (0.46 * size)
    v = -dx * np.sin(angle) + dy * np.cos(angle)
    half = 0.22 * size * np.clip(1 - u**2, 0, 1) ** 0.7 * (1 + 0.2 * u)
    alpha = np.clip(half - np.abs(v) + 0.5, 0, 1) * (np.abs(u) < 1)
    curve = np.clip(1 - (v / (half + 1e-6)) ** 2, 0, 1)
    leaf = (150 + 25 * fbm(srng, size, size, 2)) * (0.75 + 0.25 * curve)
    along = u * 0.46 * size - 0.9 * np.abs(v)
    offset = along / 4.5 - np.round(along / 4.5)
    inside = np.abs(v) < 0.85 * half
    midrib = np.exp(-((v / 1.1) ** 2)) * (np.abs(u) < 0.95)
    leaf -= 55 * np.clip(midrib + 0.7 * np.exp(-((offset * 4) ** 2)) * inside, 0, 1)
    img = img * (1 - alpha) + leaf * alpha

    crystals = (rng.random((size, size)) < 0.07 * frost) * rng.uniform(120, 260, (size, size))
    img += frost * (25 * alpha + 10) + crystals * (0.4 + 0.6 * alpha)
    radial = (dx**2 + dy**2) / (size / 2) ** 2
    img *= level * (1 - 0.3 * radial)
    return finish(img, rng, 2.5)


def gate_scene(
    rng: np.random.Generator, site: str, sky_glow: float, sigma: float
) -> NDArray[np.uint8]:
    """Grayscale 64x64 low-light view of the farm gate under a single yard lamp."""
    size = 64
    srng = rng_for(site)
    yy, xx = grid(size, size)
    horizon = 30.0
    img = 5 + sky_glow * np.clip(yy / horizon, 0, 1) ** 2
    hedge = horizon - 3 - 5 * fbm(srng, 1, size, 8)[0]
    img = np.where(yy > hedge, 7 + 5 * fbm(srng, size, size, 3), img)
    ground = 13 + 9 * fbm(srng, size, size, 5)
    track = np.abs(xx - 32) < 2 + 0.7 * (yy - horizon)
    ground += track * (9 + 8 * fbm(srng, size, size, 1.5, octaves=2))
    img = np.where(yy > horizon, ground, img)

    lamp = (8.0, 9.0)
    glow = 1.0 / (1.0 + ((xx - lamp[0]) ** 2 + (yy - lamp[1]) ** 2) / 200.0)
    img += 90 * glow * (yy > horizon) + 30 * glow
    pole = segment(xx, yy, (lamp[0], lamp[1] + 1), (lamp[0], 50), 1.0)
    img = img * (1 - pole) + pole * 18
    bars = [
        ((14, 22), (14, 50)),
        ((50, 22), (50, 50)),
        ((14, 28), (50, 28)),
        ((14, 36), (50, 36)),
        ((14, 44), (50, 44)),
        ((14, 44), (50, 28)),
    ]
    metal = np.max(
        [segment(xx, yy, p0, p1, 1.6 if p0[0] == p1[0] else 1.0) for p0, p1 in bars], axis=0
    )
    img = img * (1 - metal) + metal * (30 + 500 * glow)
    img += 255 * np.exp(-((xx - lamp[0]) ** 2 + (yy - lamp[1]) ** 2) / 2.5)
    return finish(img, rng, sigma)


def catalogue() -> list[tuple[str, Recipe]]:
    """Name every sample image together with the recipe that draws it."""
    items: list[tuple[str, Recipe]] = []
    cams = [
        ("orchard-north", "cam01", 24.0, 3, APPLE, (6, 9, 12, 18)),
        ("orchard-north", "cam02", 20.0, 4, APPLE, (7, 12, 16)),
        ("orchard-south", "cam03", 28.0, 2, PEAR, (8, 13, 19)),
    ]
    for folder, cam, horizon, rows, fruit, hours in cams:
        for hr in hours:
            recipe = partial(orchard, site=cam, hour=hr, horizon=horizon, rows=rows, fruit=fruit)
            items.append((f"{folder}/{cam}_{hr:02d}00.png", recipe))
    for name, hour, cover, w in [
        ("sky_0700", 7.0, 0.3, 64),
        ("sky_1000", 10.0, 0.55, 64),
        ("sky_1300", 13.0, 0.75, 64),
        ("sky_1900", 19.0, 0.4, 64),
        ("pano_1000", 10.0, 0.5, 96),
        ("pano_1600", 16.0, 0.65, 96),
    ]:
        site = f"ridge-{name.split('_')[0]}"
        recipe = partial(ridge_scene, site=site, hour=hour, cover=cover, w=w, mast_x=2 * w // 3)
        items.append((f"weather-ridge/{name}.png", recipe))
    for name, frost, level in [
        ("leaf_0530", 1.0, 0.7),
        ("leaf_0600", 0.6, 0.8),
        ("leaf_0645", 0.2, 0.95),
    ]:
        items.append(
            (f"frost-sensor/{name}.png", partial(frost_leaf, site="leaf", frost=frost, level=level))
        )
    items.append(("gate/gate_night.png", partial(gate_scene, site="gate", sky_glow=4, sigma=3.0)))
    items.append(("gate/gate_0445.png", partial(gate_scene, site="gate", sky_glow=50, sigma=2.5)))
    return items


def main(argv: list[str]) -> None:
    """Write every catalogued image under OUTDIR (default: the repo's sample_images/)."""
    default = Path(__file__).resolve().parent.parent / "sample_images"
    outdir = Path(argv[1]) if len(argv) > 1 else default
    for rel, recipe in catalogue():
        pixels = recipe(rng_for(rel))
        image = Image.fromarray(pixels)
        assert image.mode == ("L" if pixels.ndim == 2 else "RGB")
        path = outdir / rel
        path.parent.mkdir(parents=True, exist_ok=True)
        image.save(path, format="PNG", optimize=True)
        print(f"{path} {image.mode} {image.width}x{image.height} {path.stat().st_size} bytes")


if __name__ == "__main__":
    main(sys.argv)
