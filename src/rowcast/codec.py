"""Images to payloads and back with the integer predictor and the range coder.

Coding order: raster order over pixels, and inside a pixel its planes in order (R, G, B;
gray has one). The encoder gets every table from one parallel pass; the decoder walks the
same order, a row of the row stack and then one pixel of the head at a time, for a batch of
same-sized images at once, each with its own range decoder.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from rowcast import entropy
from rowcast import family as fam
from rowcast.family import base_prediction
from rowcast.planes import as_rgb
from rowcast.predictor import Engine
from rowcast.tables import TABLE_TOTAL, logistic_tables

CHUNK = 2048  # subpixels per encoder call: keeps the tables in cache
PASS_PIXELS = 1 << 15  # pixels per parallel pass: bounds the memory of activations


@dataclass(frozen=True)
class Coded:
    """One image's payload and the model's cross-entropy for it, in bits."""

    payload: bytes
    cross_entropy: float


def base_at(row: np.ndarray, above: np.ndarray | None, x: int) -> np.ndarray:
    """`base_prediction` of column x only, for a batch: row and above are (B, 3, W)."""
    if above is None:
        return row[:, :, x - 1].astype(np.int64) if x else np.full(row.shape[:2], 128, np.int64)
    up = above[:, :, x].astype(np.int64)
    if x == 0:
        return up
    left, corner = row[:, :, x - 1].astype(np.int64), above[:, :, x - 1]
    lo, hi = np.minimum(left, up), np.maximum(left, up)
    return np.where(corner >= hi, lo, np.where(corner <= lo, hi, left + up - corner))


def channel_params(out: np.ndarray, c: int, known: np.ndarray, base: np.ndarray) -> tuple:
    """(mu4, ls8), each (N,), for plane c of N pixels from raw outputs (N, OUTPUTS).

    `base` (N, 3) is the base prediction; `known` (N, 3) holds the pixel's values in the
    planes before c, whose residuals move the mean (the channel masks).
    """
    mu4 = out[:, 2 * c] + fam.MU_SCALE * base[:, c]
    ls8 = np.minimum(np.maximum(out[:, 2 * c + 1], fam.LS_LO), fam.LS_HI)
    if c > 0:
        cp = np.minimum(np.maximum(out[:, 2 * fam.CHANNELS :], -fam.COUPLE_MAX), fam.COUPLE_MAX)
        shift = cp[:, 0 if c == 1 else 1] * (known[:, 0] - base[:, 0])
        if c == 2:
            shift += cp[:, 2] * (known[:, 1] - base[:, 1])
        mu4 = mu4 + ((shift + 8) >> 4)
    return np.minimum(np.maximum(mu4, fam.MU_LO), fam.MU_HI), ls8


def image_tables(out: np.ndarray, rgb: np.ndarray, base: np.ndarray,
                 planes: int) -> tuple[np.ndarray, np.ndarray]:
    """(symbols (N*P,), tables (N*P, 256)) in coding order for a band of image rows.

    out: raw outputs (h, W, OUTPUTS); rgb and base: (3, h, W) for the same rows.
    """
    flat_out = out.reshape(-1, out.shape[-1])
    known = rgb.reshape(3, -1).T.astype(np.int64)
    flat_base = base.reshape(3, -1).T
    params = [channel_params(flat_out, c, known, flat_base) for c in range(planes)]
    mu4 = np.stack([p[0] for p in params], axis=1).reshape(-1)  # pixel-major, then plane
    ls8 = np.stack([p[1] for p in params], axis=1).reshape(-1)
    return known[:, :planes].reshape(-1), logistic_tables(mu4, ls8)


def encode_batch(engine: Engine, images: list[np.ndarray]) -> list[Coded]:
    """Payloads for same-sized images, each (P, H, W) uint8."""
    planes, h, w = images[0].shape
    per_pass = max(1, PASS_PIXELS // (h * w))
    coded = []
    for start in range(0, len(images), per_pass):
        group = np.stack([as_rgb(im) for im in images[start : start + per_pass]])
        outs = engine.parallel(group)
        for out, rgb in zip(outs, group, strict=True):
            coded.append(_encode_one(out, rgb, planes))
    return coded


def _encode_one(out: np.ndarray, rgb: np.ndarray, planes: int) -> Coded:
    coder, bits = entropy.encoder(), 0.0
    base = base_prediction(rgb)
    rows_per_chunk = max(1, CHUNK // (out.shape[1] * planes))
    for y in range(0, out.shape[0], rows_per_chunk):
        band = slice(y, y + rows_per_chunk)
        symbols, tables = image_tables(out[band], rgb[:, band], base[:, band], planes)
        entropy.encode(coder, symbols, tables)
        bits += entropy.cross_entropy_bits(symbols, tables, total=TABLE_TOTAL)
    return Coded(entropy.finish(coder), bits)


def decode_batch(engine: Engine, payloads: list[bytes], planes: int, height: int,
                 width: int, progress=None, trace=None) -> np.ndarray:
    """Decode same-sized images together; returns (B, P, H, W) uint8.

    `progress`, if given, is called with 1 after each row; `trace`, if given, with
    (y, x, c, tables) for every subpixel, so tests can compare with the encoder's tables.
    """
    decoders = [entropy.decoder(p) for p in payloads]
    batch = len(payloads)
    img = np.zeros((batch, 3, height, width), np.uint8)
    state = engine.start(batch, width)
    known = np.zeros((batch, 3), np.int64)
    family = entropy.FAMILY
    for y in range(height):
        above = img[:, :, y - 1] if y else None
        acc_rows = engine.next_row(state, above)
        row = img[:, :, y]
        for x in range(width):
            out = engine.pixel(acc_rows, row, x)
            base = base_at(row, above, x)
            for c in range(planes):
                tables = logistic_tables(*channel_params(out, c, known, base))
                if trace is not None:
                    trace(y, x, c, tables)
                known[:, c] = [dec.decode(family, tables[b : b + 1])[0]
                               for b, dec in enumerate(decoders)]
            row[:, :, x] = known if planes == 3 else known[:, :1]
        if progress is not None:
            progress(1)
    return img[:, :planes]
