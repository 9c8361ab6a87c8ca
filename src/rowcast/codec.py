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
from rowcast.planes import as_rgb
from rowcast.predictor import Engine
from rowcast.tables import logistic_tables

CHUNK = 2048  # subpixels per encoder call: keeps the tables in cache
PASS_PIXELS = 1 << 15  # pixels per parallel pass: bounds the memory of activations


@dataclass(frozen=True)
class Coded:
    """One image's payload and the model's cross-entropy for it, in bits."""

    payload: bytes
    cross_entropy: float


def channel_params(out: np.ndarray, c: int, known: np.ndarray) -> tuple:
    """(mu4, ls8), each (N,), for plane c of N pixels from raw outputs (N, OUTPUTS).

    `known` (N, 3) holds the pixel's values in the planes before c (the channel masks).
    """
    mu4 = out[:, 2 * c] + fam.MU_CENTRE
    ls8 = np.minimum(np.maximum(out[:, 2 * c + 1], fam.LS_LO), fam.LS_HI)
    if c > 0:
        cp = np.minimum(np.maximum(out[:, 2 * fam.CHANNELS :], -fam.COUPLE_MAX), fam.COUPLE_MAX)
        shift = cp[:, 0 if c == 1 else 1] * (2 * known[:, 0].astype(np.int64) - 255)
        if c == 2:
            shift += cp[:, 2] * (2 * known[:, 1].astype(np.int64) - 255)
        mu4 = mu4 + ((shift + 16) >> 5)
    return np.minimum(np.maximum(mu4, fam.MU_LO), fam.MU_HI), ls8


def image_tables(out: np.ndarray, rgb: np.ndarray, planes: int) -> tuple[np.ndarray, np.ndarray]:
    """(symbols (N*P,), tables (N*P, 256)) in coding order for one image.

    out: raw outputs (H, W, OUTPUTS); rgb: the image as three planes (3, H, W).
    """
    flat_out = out.reshape(-1, out.shape[-1])
    known = rgb.reshape(3, -1).T
    tables = np.stack([logistic_tables(*channel_params(flat_out, c, known))
                       for c in range(planes)], axis=1)
    return known[:, :planes].reshape(-1), tables.reshape(-1, 256)


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
    rows_per_chunk = max(1, CHUNK // (out.shape[1] * planes))
    for y in range(0, out.shape[0], rows_per_chunk):
        symbols, tables = image_tables(out[y : y + rows_per_chunk],
                                       rgb[:, y : y + rows_per_chunk], planes)
        entropy.encode(coder, symbols, tables)
        bits += entropy.cross_entropy_bits(symbols, tables)
    return Coded(entropy.finish(coder), bits)


def decode_batch(engine: Engine, payloads: list[bytes], planes: int, height: int,
                 width: int, progress=None) -> np.ndarray:
    """Decode same-sized images together; returns (B, P, H, W) uint8.

    `progress`, if given, is called with the number of rows finished so far.
    """
    decoders = [entropy.decoder(p) for p in payloads]
    batch = len(payloads)
    img = np.zeros((batch, 3, height, width), np.uint8)
    state = engine.start(batch, width)
    known = np.zeros((batch, 3), np.int64)
    family = entropy.FAMILY
    for y in range(height):
        acc_rows = engine.next_row(state, img[:, :, y - 1] if y else None)
        row = img[:, :, y]
        for x in range(width):
            out = engine.pixel(acc_rows, row, x)
            for c in range(planes):
                tables = logistic_tables(*channel_params(out, c, known))
                for b in range(batch):
                    known[b, c] = decoders[b].decode(family, tables[b : b + 1])[0]
            row[:, :, x] = known if planes == 3 else known[:, :1]
        if progress is not None:
            progress(y + 1)
    return img[:, :planes]
