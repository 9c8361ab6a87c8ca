"""Images to payloads and back with the integer predictor and the range coder.

Coding order: raster order over pixels, and inside a pixel its planes in order (R, G, B;
gray has one). The encoder gets every table from one parallel pass; the decoder walks the
same order, a row of the row stack and then one pixel of the head at a time, for a batch of
same-sized images at once, each with its own range decoder.
"""

from __future__ import annotations

import functools
from dataclasses import dataclass

import numpy as np
from threadpoolctl import threadpool_limits

from rowcast import entropy
from rowcast import family as fam
from rowcast.family import base_prediction
from rowcast.planes import as_rgb
from rowcast.predictor import Engine
from rowcast.tables import TABLE_TOTAL, all_tables, logistic_tables, table_rows

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
    left = row[:, :, x - 1].astype(np.int64)
    # the median of left, up and left + up - corner is that last value clamped to [lo, hi]
    return np.minimum(np.maximum(left + up - above[:, :, x - 1], np.minimum(left, up)),
                      np.maximum(left, up))


def pixel_params(out: np.ndarray, base: np.ndarray) -> tuple:
    """(means before the channel masks, log-scales, couplings), each (N, 3), for N pixels.

    out: raw outputs (N, OUTPUTS); base: the base prediction (N, 3).
    """
    means = out[:, 0 : 2 * fam.CHANNELS : 2] + fam.MU_SCALE * base
    ls8 = np.minimum(np.maximum(out[:, 1 : 2 * fam.CHANNELS : 2], fam.LS_LO), fam.LS_HI)
    couplings = np.minimum(np.maximum(out[:, 2 * fam.CHANNELS :], -fam.COUPLE_MAX),
                           fam.COUPLE_MAX)
    return means, ls8, couplings


def plane_mean(means: np.ndarray, couplings: np.ndarray, c: int,
               residuals: np.ndarray) -> np.ndarray:
    """mu4 (N,) of plane c: its mean moved by the residuals (value minus base, (N, 3)) of
    the planes before it (the channel masks), then clamped to the grid."""
    mu4 = means[:, c]
    if c == 1:
        mu4 = mu4 + ((couplings[:, 0] * residuals[:, 0] + 8) >> 4)
    elif c == 2:
        shift = couplings[:, 1] * residuals[:, 0] + couplings[:, 2] * residuals[:, 1]
        mu4 = mu4 + ((shift + 8) >> 4)
    return np.minimum(np.maximum(mu4, fam.MU_LO), fam.MU_HI)


def image_tables(out: np.ndarray, rgb: np.ndarray, base: np.ndarray,
                 planes: int) -> tuple[np.ndarray, np.ndarray]:
    """(symbols (N*P,), tables (N*P, 256)) in coding order for a band of image rows.

    out: raw outputs (h, W, OUTPUTS); rgb and base: (3, h, W) for the same rows.
    """
    known = rgb.reshape(3, -1).T.astype(np.int64)
    flat_base = base.reshape(3, -1).T
    means, ls8, couplings = pixel_params(out.reshape(-1, out.shape[-1]), flat_base)
    residuals = known - flat_base
    mu4 = np.stack([plane_mean(means, couplings, c, residuals) for c in range(planes)], axis=1)
    return known[:, :planes].reshape(-1), logistic_tables(mu4.reshape(-1),
                                                          ls8[:, :planes].reshape(-1))


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
    numpy's BLAS runs single-threaded here: the per-pixel products are tiny, and its
    threads would only contend with torch's for the same cores (measured: 1.7x slower).
    """
    with threadpool_limits(limits=1, user_api="blas"):
        return _decode(engine, payloads, planes, height, width, progress, trace)


@functools.cache
def _models() -> entropy.Models:
    """The coder's models of all tables, built as decoding meets them (at most 59k, 66 MB)."""
    return entropy.Models(all_tables())


def _decode(engine: Engine, payloads: list[bytes], planes: int, height: int, width: int,
            progress, trace) -> np.ndarray:
    decoders = [entropy.decoder(p) for p in payloads]
    batch = len(payloads)
    img = np.zeros((batch, 3, height, width), np.uint8)
    state = engine.start(batch, width)
    residuals = np.zeros((batch, 3), np.int64)
    misses = np.zeros((batch, 3), np.int64)  # sum of |residual| over the rows so far
    models = _models()
    decode = type(decoders[0]).decode
    for y in range(height):
        above = img[:, :, y - 1] if y else None
        acc_rows = engine.next_row(state, above, fam.activity_from_sums(misses, y, width))
        row = img[:, :, y]
        for x in range(width):
            base = base_at(row, above, x)
            means, ls8, couplings = pixel_params(engine.pixel(acc_rows, row, x), base)
            scale_rows = table_rows(0, ls8)  # the row of mean 0; the mean adds to it
            for c in range(planes):
                mu4 = plane_mean(means, couplings, c, residuals)
                if trace is not None:
                    trace(y, x, c, logistic_tables(mu4, ls8[:, c]))
                rows = map(models.__getitem__, (scale_rows[:, c] + mu4).tolist())
                row[:, c, x] = list(map(decode, decoders, rows))
                residuals[:, c] = row[:, c, x] - base[:, c]
            if planes == 1:
                row[:, 1:, x] = row[:, :1, x]
                residuals[:, 1:] = residuals[:, :1]
            misses += np.abs(residuals)
        if progress is not None:
            progress(1)
    return img[:, :planes]
