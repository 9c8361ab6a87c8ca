"""Generate sample_images/: invented thumbnails from the Larkspur Hollow Growers' cameras.

Every file is synthesised procedurally with fixed seeds, so the data is reproducible: 8-bit
camera views, and beside them what else a sensor folder holds (16-bit thermal and
multispectral frames, an alpha overlay, a palette map, text chunks, a TIFF and two sidecars).
Usage: python scripts/make_sample_images.py [OUTDIR]
"""

from __future__ import annotations

import io
import json
import sys
import zlib
from collections.abc import Callable
from functools import partial
from pathlib import Path

import imagecodecs
import numpy as np
import tifffile
from numpy.typing import NDArray
from PIL import Image, UnidentifiedImageError
from PIL.PngImagePlugin import PngInfo

Arr = NDArray[np.float64]
Recipe = Callable[[np.random.Generator], NDArray[np.uint8]]
Maker = Callable[[np.random.Generator], bytes]

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


def warmth(hour: float) -> float:
    """How far the soil has warmed through the day: 0 before dawn, 1 at 14:00."""
    return float(np.clip(np.sin((hour - 6.0) / 16.0 * np.pi), 0.0, 1.0))


def soil_temperature(site: str, hour: float) -> Arr:
    """Noise-free 64x48 soil surface temperature (degrees C) around a moisture probe's stake."""
    h, w = 48, 64
    srng = rng_for(site)
    yy, xx = grid(h, w)
    day = warmth(hour)
    clods = fbm(srng, h, w, 6)
    furrow = np.exp(-(((yy - 0.6 * h - 0.15 * (xx - w / 2)) / 5.0) ** 2))
    temp = 4.0 + 20.0 * day + (1.5 + 4.0 * day) * (clods - 0.5) - (1.0 + 3.0 * day) * furrow
    stake = np.clip(3.5 - np.hypot(xx - 40.0, yy - 20.0), 0.0, 1.0)
    cable = segment(xx, yy, (40.0, 20.0), (63.0, 9.0), 1.2)
    temp = temp * (1 - stake) + stake * (2.0 + 34.0 * day)
    temp = temp * (1 - cable) + cable * (3.0 + 26.0 * day)
    return blur(temp)


def thermal_frame(rng: np.random.Generator, site: str, hour: float) -> NDArray[np.uint16]:
    """16-bit thermal frame in centikelvin (0 C = 27315), with 0.04 K sensor noise."""
    centi = 27315.0 + 100.0 * soil_temperature(site, hour)
    noisy = centi + rng.normal(0.0, 4.0, centi.shape)
    return np.clip(np.rint(noisy), 0, 65535).astype(np.uint16)


def raw_counts(rng: np.random.Generator, site: str, hour: float) -> NDArray[np.uint16]:
    """The thermal core's raw readout: 12-bit counts above a dark offset of 512 (512..4607)."""
    counts = 512.0 + 90.0 * (soil_temperature(site, hour) + 2.0)
    noisy = counts + rng.normal(0.0, 5.0, counts.shape)
    return np.clip(np.rint(noisy), 512, 512 + 4095).astype(np.uint16)


def canopy_bands(rng: np.random.Generator, site: str, hour: float) -> NDArray[np.uint16]:
    """Top-down 64x48 multispectral view (near-infrared, red, green) in linear 16-bit counts."""
    h, w = 48, 64
    srng = rng_for(site)
    yy, xx = grid(h, w)
    level = daylight(hour)[2]
    sun = np.array([np.clip((hour - 12.0) / 6.0, -1.0, 1.0), -0.5])
    soil = np.array([0.28, 0.20, 0.16]) * (0.8 + 0.4 * fbm(srng, h, w, 5))[..., None]
    grass = np.array([0.36, 0.07, 0.13]) * (0.8 + 0.4 * fbm(srng, h, w, 3))[..., None]
    refl = soil + (grass - soil) * smoothstep(fbm(srng, h, w, 8) * 2.0 - 0.6)[..., None]
    shadow = np.zeros((h, w))
    crown = np.zeros((h, w))
    shade = np.ones((h, w))
    edge, leaves = fbm(srng, h, w, 3), fbm(srng, h, w, 2, octaves=3)
    for row_y in (11.0, 36.0):
        for col_x in np.arange(srng.uniform(-6, 4), w + 12, 17.0):
            cx, cy = col_x + srng.uniform(-2, 2), row_y + srng.uniform(-2, 2)
            r = 8.0 * srng.uniform(0.85, 1.15)
            dx, dy = (xx - cx) / r, (yy - cy) / r
            cover = np.clip((1 - np.hypot(dx, dy) - 0.4 * (edge - 0.5)) * r + 0.5, 0.0, 1.0)
            sx, sy = (xx - cx + 4 * sun[0]) / r, (yy - cy + 4 * sun[1]) / r
            shadow = np.maximum(shadow, np.clip((1 - np.hypot(sx, sy)) * r + 0.5, 0.0, 1.0))
            shade = np.where(cover > crown, 0.75 - 0.25 * (dx * sun[0] + dy * sun[1]), shade)
            crown = np.maximum(crown, cover)
    leaf = np.array([0.50, 0.05, 0.12]) * (0.6 + 0.8 * leaves)[..., None] * shade[..., None]
    refl = refl * (1 - 0.6 * shadow * (1 - crown))[..., None]
    refl = refl * (1 - crown[..., None]) + leaf * crown[..., None]
    signal = 1024.0 + 52000.0 * level * blur(refl)
    noisy = signal + rng.normal(0.0, 1.0, signal.shape) * (0.5 * np.sqrt(signal) + 6.0)
    return np.clip(np.rint(noisy), 0, 65535).astype(np.uint16)


GLYPHS = {
    "0": ("###", "#.#", "#.#", "#.#", "###"),
    "1": (".#.", "##.", ".#.", ".#.", "###"),
    "2": ("###", "..#", "###", "#..", "###"),
    "3": ("###", "..#", ".##", "..#", "###"),
    "4": ("#.#", "#.#", "###", "..#", "..#"),
    "5": ("###", "#..", "###", "..#", "###"),
    "6": ("###", "#..", "###", "#.#", "###"),
    "7": ("###", "..#", ".#.", ".#.", ".#."),
    "8": ("###", "#.#", "###", "#.#", "###"),
    "9": ("###", "#.#", "###", "..#", "###"),
    ":": ("...", ".#.", "...", ".#.", "..."),
}


def text_mask(text: str) -> NDArray[np.bool_]:
    """A 5-pixel-high bitmap of digits and colons, one blank column between characters."""
    glyphs = [np.array([[c == "#" for c in row] for row in GLYPHS[ch]]) for ch in text]
    gap = np.zeros((5, 1), bool)
    return np.hstack([part for glyph in glyphs for part in (gap, glyph)][1:])


def gate_overlay(rng: np.random.Generator, stamp: str) -> NDArray[np.uint8]:
    """RGBA 64x64 overlay for the gate camera: timestamp box, watch zone, motion-ignore band.

    Fully transparent pixels keep the amber the overlay was painted with (slightly uneven, as
    an editor leaves it), so their colour is data too.
    """
    size = 64
    yy, xx = grid(size, size)
    amber = np.array([255.0, 176.0, 0.0])
    rgb = amber - np.stack([np.zeros_like(xx), xx, 2 * yy], axis=-1) * 0.5
    rgb += rng.integers(-3, 4, rgb.shape)
    alpha = np.zeros((size, size))

    zone = (np.abs(xx - 32) <= 20) & (np.abs(yy - 36) <= 16)
    border = zone & ((np.abs(xx - 32) >= 20) | (np.abs(yy - 36) >= 16))
    alpha = np.where(border, 200, alpha)
    band = (yy >= 21) & (yy <= 27)
    hatch = band & ((xx + yy) % 4 < 2)
    rgb = np.where(band[..., None], [70.0, 110.0, 230.0], rgb)
    alpha = np.where(band, np.where(hatch, 110, 48), alpha)

    box = (yy >= 55) & (yy <= 62) & (xx >= 1) & (xx <= 24)
    rgb = np.where(box[..., None], 0.0, rgb)
    alpha = np.where(box, 150, alpha)
    glyphs = text_mask(stamp)
    text = np.zeros((size, size), bool)
    text[57 : 57 + glyphs.shape[0], 3 : 3 + glyphs.shape[1]] = glyphs
    rgb = np.where(text[..., None], 255.0, rgb)
    alpha = np.where(text, 255, alpha)
    return np.dstack([np.clip(rgb, 0, 255), alpha]).astype(np.uint8)


PLOT_PALETTE = [
    (250, 248, 240),  # 0: outside the cooperative's land (transparent through tRNS)
    (92, 64, 40),  # 1: boundary fence
    (214, 190, 140),  # 2: tracks
    (196, 38, 30),  # 3: apple, Braeburn
    (230, 120, 40),  # 4: apple, Gala
    (170, 70, 90),  # 5: apple, Cox
    (186, 180, 66),  # 6: pear, Conference
    (120, 30, 60),  # 7: cherry
    (110, 70, 150),  # 8: plum
    (150, 210, 120),  # 9: young planting
    (60, 120, 200),  # 10: irrigation pond
    (128, 128, 128),  # 11: packing shed
]


def plot_map(rng: np.random.Generator) -> NDArray[np.uint8]:
    """Palette indices (into PLOT_PALETTE) of a 64x64 map of the cooperative's orchard plots."""
    size = 64
    yy, xx = grid(size, size)
    wobble = 6.0 * (fbm(rng, size, size, 16, octaves=2) - 0.5)
    reach = 29 * np.hypot((xx - 32) / 30, (yy - 32) / 27) + wobble
    inside, fence = reach < 29, reach >= 27.6
    row, col = (yy.astype(int) - 6) // 13, (xx.astype(int) - 3) // 12
    plots = rng.integers(3, 10, (4, 5))[np.clip(row, 0, 3), np.clip(col, 0, 4)]
    tracks = ((yy.astype(int) - 6) % 13 < 2) | ((xx.astype(int) - 3) % 12 < 2)
    index = np.where(tracks, 2, plots)
    index = np.where(np.hypot(xx - 48, yy - 46) < 6.5, 10, index)
    index = np.where((np.abs(xx - 15) <= 3) & (np.abs(yy - 48) <= 2), 11, index)
    index = np.where(fence, 1, index)
    return np.where(inside, index, 0).astype(np.uint8)


def encode(image: Image.Image, fmt: str, **options: object) -> bytes:
    """An image's file bytes in the given Pillow format."""
    out = io.BytesIO()
    image.save(out, format=fmt, **options)
    return out.getvalue()


def camera_png(rng: np.random.Generator, recipe: Recipe, tags: dict[str, object]) -> bytes:
    """An 8-bit camera image as an optimised PNG, with any extra chunks given in tags."""
    pixels = recipe(rng)
    image = Image.fromarray(pixels)
    assert image.mode == ("L" if pixels.ndim == 2 else "RGB")
    return encode(image, "PNG", optimize=True, **tags)


def sky_tags() -> dict[str, object]:
    """tEXt, iTXt (UTF-8) and pHYs chunks that the ridge camera writes beside its pixels."""
    info = PngInfo()
    info.add_text("CameraId", "ridge-sky-02")
    info.add_text("Exposure", "1/800 s, f/8, ISO 100")
    info.add_itxt("Description", "Weather ridge at 10:00, 55 % cloud, 9 °C", lang="en")
    return {"pnginfo": info, "dpi": (72, 72)}


def deep_png(rng: np.random.Generator, frame: Callable[..., NDArray[np.uint16]]) -> bytes:
    """A 16-bit gray or RGB frame as PNG, written by imagecodecs (Pillow truncates 16-bit RGB)."""
    return bytes(imagecodecs.png_encode(frame(rng), level=9))


def raw_tiff(rng: np.random.Generator) -> bytes:
    """The soil probe's 14:00 raw frame as a 16-bit TIFF with a description and 2 mm pixels."""
    out = io.BytesIO()
    tifffile.imwrite(
        out,
        raw_counts(rng, "soil", 14.0),
        photometric="minisblack",
        resolution=(5, 5),
        resolutionunit="CENTIMETER",
        description="soil-probe thermal core, raw frame 14:00; 12-bit counts, dark offset 512",
        software="make_sample_images.py",
        metadata=None,
    )
    return out.getvalue()


def probe_readings(rng: np.random.Generator) -> bytes:
    """Invented soil-probe log: moisture and temperature at two depths every two hours, as JSON."""
    readings = []
    for hour in range(6, 20, 2):
        for depth in (10, 30):
            damp = np.exp(-depth / 15.0)
            temp = 6.0 + 16.0 * warmth(hour - depth / 10.0) * damp + rng.normal(0.0, 0.1)
            vwc = 0.34 - 0.004 * (hour - 6) * damp + rng.normal(0.0, 0.002)
            readings.append(
                {
                    "time": f"{hour:02d}:00",
                    "depth_cm": depth,
                    "moisture_m3_m3": round(float(vwc), 3),
                    "temperature_c": round(float(temp), 1),
                }
            )
    log = {"probe": "soil-probe-1", "site": "orchard-north, row 3", "readings": readings}
    return (json.dumps(log, indent=2) + "\n").encode()


def overlay_png(rng: np.random.Generator) -> bytes:
    """The gate camera's RGBA overlay as PNG (Pillow keeps the colour under alpha 0)."""
    return encode(Image.fromarray(gate_overlay(rng, "04:45")), "PNG", optimize=True)


def plot_map_png(rng: np.random.Generator) -> bytes:
    """The plot map as a palette PNG whose index 0 is fully transparent (a tRNS chunk)."""
    index = plot_map(rng)
    image = Image.frombytes("P", (index.shape[1], index.shape[0]), index.tobytes())
    image.putpalette([v for rgb in PLOT_PALETTE for v in rgb])
    return encode(image, "PNG", optimize=True, transparency=0)


def preview_jpeg(_: np.random.Generator, source: str) -> bytes:
    """A quality-85 JPEG of a camera image, redrawn from the source's own recipe and seed."""
    pixels = dict(catalogue())[source](rng_for(source))
    return encode(Image.fromarray(pixels), "JPEG", quality=85)


def files() -> list[tuple[str, Maker]]:
    """Every sample file with the function that makes its bytes from the file's seed."""
    tagged = {"weather-ridge/sky_1000.png": sky_tags}
    items: list[tuple[str, Maker]] = [
        (rel, partial(camera_png, recipe=recipe, tags=tagged[rel]() if rel in tagged else {}))
        for rel, recipe in catalogue()
    ]
    for hour in (6, 14):
        frame = partial(thermal_frame, site="soil", hour=hour)
        items.append((f"soil-probe/thermal_{hour:02d}00.png", partial(deep_png, frame=frame)))
    items.append(("soil-probe/raw_1400.tif", raw_tiff))
    items.append(("soil-probe/readings.json", probe_readings))
    for hour in (11, 15):
        frame = partial(canopy_bands, site="canopy", hour=hour)
        rel = f"canopy-multispectral/canopy_{hour:02d}00.png"
        items.append((rel, partial(deep_png, frame=frame)))
    items.append(("gate/overlay.png", overlay_png))
    items.append(("maps/plot_map.png", plot_map_png))
    source = "orchard-north/cam01_1200.png"
    items.append(("orchard-north/preview.jpg", partial(preview_jpeg, source=source)))
    return items


COLOUR_TYPES = {0: "gray", 2: "RGB", 3: "palette", 4: "gray+alpha", 6: "RGBA"}


def describe(data: bytes) -> str:
    """A file's format, size and sample layout, read back from its bytes (PNG from its IHDR)."""
    if data.startswith(b"\x89PNG\r\n\x1a\n"):
        width, height = int.from_bytes(data[16:20], "big"), int.from_bytes(data[20:24], "big")
        return f"PNG {COLOUR_TYPES[data[25]]} {data[24]}-bit {width}x{height}"
    try:
        with Image.open(io.BytesIO(data)) as image:
            return f"{image.format} {image.mode} {image.width}x{image.height}"
    except UnidentifiedImageError:
        return "not an image"


def main(argv: list[str]) -> None:
    """Write every sample file under OUTDIR (default: the repo's sample_images/)."""
    default = Path(__file__).resolve().parent.parent / "sample_images"
    outdir = Path(argv[1]) if len(argv) > 1 else default
    for rel, make in files():
        data = make(rng_for(rel))
        path = outdir / rel
        path.parent.mkdir(parents=True, exist_ok=True)
        path.write_bytes(data)
        print(f"{path} {describe(data)} {len(data)} bytes")


if __name__ == "__main__":
    main(sys.argv)
