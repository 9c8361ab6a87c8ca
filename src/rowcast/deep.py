"""Deep values (9 to 16 bits) as one 8-bit plane for the predictor and a code for the rest.

A coding group's values (P, H, W) uint16 become `(v - low) >> shift`, where `low` is the
group's minimum and `2**shift` the largest power of two dividing every `v - low`. Their
top 8 bits, `coarse = that >> k` with k = max(0, bit length of the range - 8), are the
plane the predictor codes; the k low bits, `fine`, are range-coded here given the coarse
plane (`fine_code`): each value's predicted position (the median of left, above and
left + above - above-left, on the full values decoded so far) and a logistic scale learned
from the errors of pixels of similar activity give a discretised logistic restricted to the
value's coarse bin. Pixels are visited in waves (2y + x constant), so that each wave's left,
above and above-right neighbours are known and the decoder decodes a whole wave at once.
Measured against other splits and coders in benchmarks/sixteen_bit.md.

The parameters are 4 bytes: `FORMAT`, low (big-endian), then shift x 16 + k.
"""

from __future__ import annotations

import decimal
import functools

import numpy as np

from rowcast import entropy
from rowcast import family as fam
from rowcast.tables import D_MIN, LEVELS, logistic_cdf

FORMAT = 1  # the first parameter byte: this mapping
MAX_PLANES = 1  # predictor planes per group
MAX_PARAMS = 4  # parameter bytes
MAX_K = 8  # fine bits at most: 16 bits = 8 coarse + 8 fine
BUCKETS = 16  # activity buckets (bit length of the activity, capped)
SCALE_GAIN = 170  # the logistic's scale is 170/256 of the mean absolute error ...
SCALE_BIAS = 16  # ... plus 16/256 of a value
MARGIN4 = 12  # the prediction is clamped to 3 values (in quarters) outside the bin


def split(values: np.ndarray, extra: int = 0) -> tuple[bytes, list[np.ndarray],
                                                       np.ndarray | None]:
    """(params, [coarse (P, H, W) uint8], the fine bits' code as uint8 bytes or None when
    there are none) for a group's values (P, H, W) of 0..65535. `extra` moves that many
    more bits (up to `MAX_K` in all) from the coarse plane to the fine code: an encoder may
    try 0 and 1 and keep the shorter (`join` reads k from the parameters)."""
    params, v = _mapped(values, extra)
    k = params[3] & 15
    coarse = (v >> k).astype(np.uint8)
    code = fine_code(coarse, k, v & ((1 << k) - 1)) if k else None
    return params, [coarse], code


def coarse(values: np.ndarray) -> np.ndarray:
    """The plane (P, H, W) uint8 that `split` gives the predictor for these values, without
    coding the fine bits: what training on deep images learns from."""
    params, v = _mapped(values, 0)
    return (v >> (params[3] & 15)).astype(np.uint8)


def _mapped(values: np.ndarray, extra: int) -> tuple[bytes, np.ndarray]:
    """(params, (v - low) >> shift as int64) of a group's values; ValueError if they are
    not (P, H, W) values of 0..65535."""
    v = np.asarray(values)
    if v.ndim != 3 or v.size == 0:
        raise ValueError(f"16-bit values of shape {v.shape}: want (planes, height, width)")
    if v.min() < 0 or v.max() > 0xFFFF:
        raise ValueError("16-bit values outside 0..65535")
    v = v.astype(np.int64)
    low = int(v.min())
    v -= low
    common = int(np.bitwise_or.reduce(v, axis=None))
    shift = (common & -common).bit_length() - 1 if common else 0
    v >>= shift
    k = min(MAX_K, max(0, int(v.max()).bit_length() - 8) + extra)
    return bytes([FORMAT, low >> 8, low & 0xFF, shift << 4 | k]), v


def join(params: bytes, model_planes: list[np.ndarray], literal: np.ndarray | None,
         shape: tuple[int, int, int]) -> np.ndarray:
    """The values (P, H, W) uint16 that `split` gave these pieces; ValueError when the
    parameters or pieces do not describe such values."""
    if len(params) != MAX_PARAMS or params[0] != FORMAT:
        raise ValueError(f"16-bit parameters {bytes(params).hex()} are not format {FORMAT}")
    low, shift, k = params[1] << 8 | params[2], params[3] >> 4, params[3] & 15
    if k > MAX_K or len(model_planes) != 1:
        raise ValueError(f"16-bit parameters {bytes(params).hex()} are malformed")
    coarse = np.asarray(model_planes[0])
    if coarse.shape != tuple(shape) or coarse.dtype != np.uint8:
        raise ValueError(f"16-bit coarse plane {coarse.shape} {coarse.dtype} for {shape}")
    if k == 0 and literal is not None and len(literal):
        raise ValueError("16-bit group has fine bits but no fine code")
    code = b"" if literal is None else np.asarray(literal, np.uint8).tobytes()
    v = coarse.astype(np.int64) << k
    if k:
        v |= fine_values(coarse, k, code)
    v = (v << shift) + low
    if v.max() > 0xFFFF:
        raise ValueError(f"16-bit parameters {bytes(params).hex()} give values above 65535")
    return v.astype(np.uint16)


def fine_code(coarse: np.ndarray, k: int, fine: np.ndarray) -> np.ndarray:
    """The range code (uint8 bytes) of the k-bit fine values (P, H, W) given the coarse."""
    coder = entropy.encoder()
    for c, f in zip(coarse, fine, strict=True):
        _walk(c, k, lambda tables, at, f=f: _put(coder, tables, f[at]))
    return np.frombuffer(entropy.finish(coder), np.uint8)


def fine_values(coarse: np.ndarray, k: int, code: bytes) -> np.ndarray:
    """The fine values (P, H, W) int64 that `fine_code` coded in `code`."""
    try:
        coder = entropy.decoder(code)
        return np.stack([_walk(c, k, lambda tables, at: _get(coder, tables)) for c in coarse])
    except (ValueError, RuntimeError) as e:
        raise ValueError(f"16-bit fine code does not decode: {e}") from e


def _put(coder, tables: np.ndarray, symbols: np.ndarray) -> np.ndarray:
    coder.encode(symbols.astype(np.int32), entropy.FAMILY, tables)
    return symbols


def _get(coder, tables: np.ndarray) -> np.ndarray:
    return coder.decode(entropy.FAMILY, tables).astype(np.int64)


@functools.cache
def _level_bounds() -> np.ndarray:
    """The least scale (in 1/256 of a value) of each log-scale level above the lowest:
    256 exp((level + LS_LO - 1/2) / 8) rounded up, in decimal arithmetic (the same on
    every machine)."""
    ctx = decimal.Context(prec=30)
    return np.array([int((ctx.exp(decimal.Decimal(2 * (lv + fam.LS_LO) - 1) / 16) * 256)
                         .to_integral_value(decimal.ROUND_CEILING))
                     for lv in range(1, LEVELS)], np.int64)


def _walk(coarse: np.ndarray, k: int, step) -> np.ndarray:
    """Visit one plane's pixels wave by wave; `step(tables (N, 2**k), (ys, xs))` codes a
    wave's fine values with their tables and returns them. Returns the fine plane (H, W)."""
    h, w = coarse.shape
    n = 1 << k
    cdf = logistic_cdf().astype(np.int64)
    bounds = _level_bounds()
    c = coarse.astype(np.int64)
    centre = (c << k) + n // 2
    pad = np.pad(c, 1, mode="edge")
    slope = ((np.abs(pad[1:-1, 2:] - pad[1:-1, :-2]) + np.abs(pad[2:, 1:-1] - pad[:-2, 1:-1]))
             << k) >> 1
    full = np.full((h + 1, w + 2), -1, np.int64)  # decoded values; -1: none (yet)
    fine = np.zeros((h, w), np.int64)
    errors = np.zeros(BUCKETS, np.int64)
    counts = np.ones(BUCKETS, np.int64)
    errors[:] = (1 << np.arange(BUCKETS)) // 4 + n // 8
    js = 4 * np.arange(n) - D_MIN
    powers = 1 << np.arange(BUCKETS - 1)
    for t in range(2 * (h - 1) + w):
        ys = np.arange(max(0, (t - w + 2) // 2), min(h, t // 2 + 1))
        if not len(ys):
            continue  # one column: odd waves are empty
        xs = t - 2 * ys
        cen = centre[ys, xs]

        def near(dy: int, dx: int, ys=ys, xs=xs, cen=cen) -> np.ndarray:
            got = full[ys + dy + 1, xs + dx + 1]
            return np.where(got < 0, cen, got)

        left, up, corner, right = near(0, -1), near(-1, 0), near(-1, -1), near(-1, 1)
        lo, hi = np.minimum(left, up), np.maximum(left, up)
        guess = np.clip(left + up - corner, lo, hi)
        activity = (np.abs(left - corner) + np.abs(up - corner) + np.abs(up - right)
                    + slope[ys, xs])
        bucket = np.searchsorted(powers, activity, side="right")  # bit length, capped
        scale = errors[bucket] * SCALE_GAIN // counts[bucket] + SCALE_BIAS
        level = np.searchsorted(bounds, scale, side="right")
        base = c[ys, xs] << k
        mu4 = np.clip(4 * (guess - base), -MARGIN4, 4 * (n - 1) + MARGIN4)
        upper = cdf[level[:, None], js[None, :] + 2 - mu4[:, None]]
        lower = cdf[level[:, None], js[None, :] - 2 - mu4[:, None]]
        got = step((upper - lower + 1).astype(np.float32), (ys, xs))
        if got.min() < 0 or got.max() >= n:
            raise ValueError("fine value out of range")
        fine[ys, xs] = got
        value = base + got
        full[ys + 1, xs + 1] = value
        np.add.at(errors, bucket, np.abs(value - guess))
        np.add.at(counts, bucket, 1)
    return fine
