"""The decoder's compiled loop: a batch of images one row at a time, and inside the row every
pixel's head, parameters, tuning, feedback, frequency table and range decoding without a
return to Python.

It computes exactly what `codec._decode_rows` computes, which stays the reference that the
tests hold it against (same pixels on golden archives and random images). Every layer's
products run through `intkernels` (uint8 activations times int8 weights, summed in int32:
every layer's bound is far below 2**31, checked in `Kernel.of`), requantised as the model
file defines it. The row stack runs once per row for the whole batch; the head once per
column for the whole batch, so each product is a matrix of images. Tables become the
coder's fixed-point distributions with `rangecoder.quantise`; a single component's are
cached per table row, so each is built once per process.

The loop's kernels are compiled by `native` (ahead of time once per machine, or by numba's
JIT); Python calls them through `native.kernels()`.
"""

from __future__ import annotations

import functools
from dataclasses import dataclass

import numpy as np

from rowcast import codec, entropy, feedback, native, rangecoder, tablecdfs
from rowcast import family as fam
from rowcast.intkernels import LANES, conv_weights, dense, packed, requantise_into, requantised
from rowcast.native import jit
from rowcast.predictor import INT32_SAFE, Engine
from rowcast.tablecdfs import build_row
from rowcast.tables import MEANS, SPAN


class Stream:
    """A range decoder over one payload's code, for `codec.open_payloads`: it decodes the
    tuning fields ahead of the pixels, then hands its state to the compiled loop."""

    def __init__(self, payload: bytes, trimmed: bool = True) -> None:
        if trimmed:
            payload += bytes(-len(payload) % 4)
        elif len(payload) % 4:
            raise entropy.PayloadError("payload length is not a whole number of 32-bit words")
        order = ">u4" if trimmed else "<u4"
        self.words = np.frombuffer(payload, order).astype(np.uint32)
        self.state = native.kernels().decoder_start(self.words)

    def decode(self, _family, tables: np.ndarray) -> np.ndarray:
        """One symbol for each table (rows, values), as constriction's decoder does."""
        k = native.kernels()
        out = np.empty(len(tables), np.int64)
        for i, table in enumerate(np.ascontiguousarray(tables, np.float32)):
            cdf = np.empty(len(table) + 1, np.uint32)
            k.quantise(table, cdf)
            out[i] = k.decode_symbol(self.state, self.words, cdf, -1)
            if out[i] < 0:
                raise entropy.PayloadError("a payload is not what its model codes")
        return out


@dataclass(frozen=True)
class Kernel:
    """A model's network in the integers the loop takes: every product runs through
    `intkernels` (uint8 activations, int8 weights packed for it, int32 sums)."""

    left: np.ndarray  # head 1's weights of the RGB of the pixels to the left, nearest first
    lefts: int  # how many pixels to the left the head sees
    m1: np.ndarray
    s1: int
    w2: np.ndarray
    b2: np.ndarray
    m2: np.ndarray
    s2: int
    w3: np.ndarray
    b3: np.ndarray
    m3: np.ndarray
    s3: int
    stack: tuple  # the row stack's layers: (`conv_weights`, outputs, kw, bias, mult, shift)
    rows: np.ndarray  # head 1's weights of the row stack's features, packed
    valid: np.ndarray  # head 1's bias plus the valid planes' terms, (left + 1, hidden) int64
    activity: np.ndarray | None  # head 1's weights of the activity inputs (3, hidden)

    @classmethod
    def of(cls, engine: Engine) -> Kernel | None:
        """The kernel of an engine's model, or None when a bound rules int32 out."""
        model = engine.model
        if any(layer.bound >= INT32_SAFE for layer in model.layers):
            return None
        h1, h2, out = engine.head1, engine.head2, engine.out
        w1 = h1.weight[:, :, 0, 0].T.astype(np.int64)  # (inputs, hidden)
        width, left = model.width, model.left
        by_pixel = w1[width : width + 4 * left].reshape(left, 4, -1)
        valid = np.ascontiguousarray(np.concatenate([np.zeros((1, w1.shape[1]), np.int64),
                                                     np.cumsum(255 * by_pixel[:, 3], axis=0)])
                                     + h1.bias)
        stack = tuple((conv_weights(layer), len(layer.weight), layer.weight.shape[3],
                       layer.bias, layer.mult, layer.shift) for layer in engine.rows)
        return cls(packed(by_pixel[:, :3].reshape(3 * left, -1).T), left, h1.mult, h1.shift,
                   conv_weights(h2)[0], h2.bias, h2.mult, h2.shift,
                   conv_weights(out)[0], out.bias, out.mult, out.shift, stack,
                   packed(w1[:width].T), valid, w1[len(w1) - 3 :] if model.activity else None)

    def start(self, batch: int, width: int) -> list[np.ndarray]:
        """Each stack layer's input rows before row 0, (B, 2, W + kw - 1, cin) uint8: the
        previous and the current row with kw // 2 zero columns either side."""
        inputs = [4] + [cout for _, cout, *_ in self.stack[:-1]]
        return [np.zeros((batch, 2, width + kw - 1, -(-cin // 4) * 4), np.uint8)
                for (_, _, kw, *_), cin in zip(self.stack, inputs, strict=True)]

    def row_features(self, state: list[np.ndarray], above: np.ndarray | None) -> np.ndarray:
        """Advance the row stack by one row (`above`: the last decoded row (B, 3, W) uint8,
        or None before row 0) and return its output for the new row, (B, W, width) uint8."""
        batch, width = state[0].shape[0], state[0].shape[2] - self.stack[0][2] + 1
        a = np.zeros((batch, width, 4), np.uint8)
        if above is not None:
            a[..., :3] = above.transpose(0, 2, 1)
            a[..., 3] = 255
        for pair, (w, cout, kw, bias, mult, shift) in zip(state, self.stack, strict=True):
            pair[:, 0] = pair[:, 1]
            pair[:, 1, kw // 2 : kw // 2 + width, : a.shape[2]] = a
            a = np.empty((batch, 1, width, cout), np.uint8)
            native.kernels().conv_rows(pair, w, bias, mult, shift, True, a)
            a = a[:, 0]
        return a

    def head_rows(self, feats: np.ndarray, activity: np.ndarray) -> np.ndarray:
        """Head 1's accumulators (B, W, hidden) int32 of a row, every term but the RGB of
        the pixels to the left, from the row stack's features (B, W, width) uint8."""
        terms = np.zeros((len(feats), self.valid.shape[1]), np.int64)
        if self.activity is not None:
            terms += activity.astype(np.int64) @ self.activity
        return native.kernels().head_rows(feats, self.rows, self.valid, terms)


@functools.cache
def kernel_of(engine: Engine) -> Kernel | None:
    """The compiled loop's kernel of an engine, made once per engine."""
    return Kernel.of(engine)


@functools.cache
def _lookups() -> tuple[np.ndarray, ...]:
    """(symbol_counts, each symbol's column in it, surprise table, feedback tables of 2, 3
    and 4 terms padded to SUMS, the cache of quantised tables, which rows it holds)."""
    counts, columns, cdfs, built = tablecdfs.cache()
    sums = 4 * feedback.Q_MAX + 1
    ftab = np.stack([np.pad(feedback.feedback_table(c + 2),
                            (0, sums - len(feedback.feedback_table(c + 2))), mode="edge")
                     for c in range(fam.CHANNELS)])
    return counts, columns, feedback.surprise_table(), ftab, cdfs, built


def decode_rows(engine: Engine, kernel: Kernel, streams: list[Stream], tune, planes: int,
                height: int, width: int, progress) -> np.ndarray:
    """Decode same-sized images from their streams (tuning fields already read) into
    (B, P, H, W) uint8: `codec._decode_rows` compiled. `tune` is the batch's `codec.Tune`
    or None."""
    batch = len(streams)
    img = np.zeros((batch, 3, height, width), np.uint8)
    state = kernel.start(batch, width)
    misses = np.zeros((batch, 3), np.int64)
    tuned = tune is not None
    zeros = np.zeros((batch, 3), np.int64)
    levels = tune.levels if tuned else np.zeros(1, np.int64)
    origin = tune.origin if tuned else zeros
    couplings = tune.couplings if tuned else zeros
    gains = tune.gains if tuned else zeros
    biases = tune.biases if tuned else zeros
    active = tuned and tune.feedback
    ignored, colour = (np.zeros(batch, np.bool_) if f is None else f[:, 0]
                       for f in codec.colour_flags(engine, tune, batch, planes))
    q = np.full((2, width, 3, batch), feedback.NEUTRAL, np.int64)  # above, this row
    e = np.zeros((2, width, 3, batch), np.int64)
    states = np.stack([s.state for s in streams])
    ends = np.cumsum([len(s.words) for s in streams])
    words = np.concatenate([s.words for s in streams] + [np.zeros(0, np.uint32)])
    hidden, hidden2, outputs = len(kernel.m1), len(kernel.b2), len(kernel.b3)
    scratch = (np.zeros((batch, -(-3 * kernel.lefts // 4) * 4), np.uint8),
               np.empty((batch, -(-hidden // LANES) * LANES), np.int32),
               np.zeros((batch, -(-hidden // 4) * 4), np.uint8),
               np.empty((batch, -(-hidden2 // LANES) * LANES), np.int32),
               np.zeros((batch, -(-hidden2 // 4) * 4), np.uint8),
               np.empty((batch, -(-outputs // LANES) * LANES), np.int32),
               np.empty((batch, outputs), np.int64))
    counts, columns, surprise, ftab, cdfs, built = _lookups()
    row = native.kernels().row
    for y in range(height):
        above = img[:, :, y - 1] if y else None
        feats = kernel.row_features(state, above)
        acc = kernel.head_rows(feats, fam.activity_from_sums(misses, y, width))
        bad = row(y, acc, img, planes, kernel.left, kernel.lefts, kernel.m1, kernel.s1, kernel.w2,
                   kernel.b2, kernel.m2, kernel.s2, kernel.w3, kernel.b3, kernel.m3, kernel.s3,
                   tuned, levels, origin, couplings, active, gains, biases, ignored, colour, q, e,
                   misses,
                   counts, columns, surprise, ftab, cdfs, built, states, words, ends, *scratch)
        if bad:
            raise entropy.PayloadError("a payload is not what its model codes (damaged data, "
                                       "or another model)")
        q[[0, 1]], e[[0, 1]] = q[[1, 0]], e[[1, 0]]
        progress(batch)
    return img[:, :planes]


@jit
def _head_rows(feats, w, valid, activity):
    """Head 1's accumulators (B, W, hidden) int32 of a row from the row stack's features
    (B, W, width) uint8: their products, the bias and valid planes' terms of each column
    (`valid` by pixels to its left) and each image's activity terms (B, hidden)."""
    batch, width, chans = feats.shape
    hidden = valid.shape[1]
    flat = np.zeros((batch * width, -(-chans // 4) * 4), np.uint8)
    flat[:, :chans] = feats.reshape(batch * width, chans)
    acc = np.empty((batch * width, -(-hidden // LANES) * LANES), np.int32)
    dense(flat, w, acc)
    out = np.empty((batch, width, hidden), np.int32)
    for b in range(batch):
        for x in range(width):
            n = min(x, valid.shape[0] - 1)
            for k in range(hidden):
                out[b, x, k] = acc[b * width + x, k] + valid[n, k] + activity[b, k]
    return out


@jit
def _head(x, y, acc, img, wl, left, m1, s1, w2, b2, m2, s2, w3, b3, m3, s3, lefts, acc1, a1,
          acc2, a2, acc3, raw):
    """The raw outputs (B, outputs) of column x into `raw`. Scratch: lefts (B, 3 * left
    padded to 4) and a1, a2 (B, hidden padded to 4) uint8; acc1, acc2, acc3 (B, outputs
    padded to 16) int32."""
    batch, hidden = acc.shape[0], acc.shape[2]
    n = min(x, left)
    lefts[:] = 0
    for b in range(batch):
        for d in range(n):
            for c in range(3):
                lefts[b, 3 * d + c] = img[b, c, y, x - 1 - d]
    dense(lefts, wl, acc1)
    for b in range(batch):
        for k in range(hidden):
            a1[b, k] = requantised(np.int64(acc[b, x, k]) + acc1[b, k], m1[k], s1, True)
    dense(a1, w2, acc2)
    requantise_into(acc2, b2, m2, s2, True, a2)
    dense(a2, w3, acc3)
    requantise_into(acc3, b3, m3, s3, False, raw)


@jit
def _clamp(v, lo, hi):
    return min(max(v, lo), hi)


@jit(inline="always")
def edge_median(left, up, corner, x, y, origin):
    """The median predictor from a value's left, upper and upper-left neighbours, at the
    edges as `family.median_predictor`: the left one on the top row, the upper one in the
    first column, `origin` at the origin (neighbours outside the image are not read)."""
    if y == 0:
        return left if x else origin
    if x == 0:
        return up
    return _clamp(left + up - corner, min(left, up), max(left, up))


@jit(inline="always")
def channel_move(c, k0, k1, k2, r0, r1):
    """How far the channel couplings k (G<-R, B<-R, B<-G) move plane c's mean, from the
    residuals r0, r1 of R and G: floor((k r + 8) / 16), as `codec.coupling_move`."""
    if c == 0:
        return 0
    if c == 1:
        return (k0 * r0 + 8) >> 4
    return (k1 * r0 + k2 * r1 + 8) >> 4


@jit
def _row(y, acc, img, planes, wl, lefts_seen, m1, s1, w2, b2, m2, s2, w3, b3, m3, s3, tuned, levels,
         origin, couplings, active, gains, biases, ignored, colour, q, e, misses, counts, columns,
         surprise, ftab, cdfs, built, states, words, ends, lefts, acc1, a1, acc2, a2, acc3, raw):
    """Decode row y of every image in place; returns 1 when a payload is not decodable.
    ignored[b]: image b's network G and B means and couplings count as 0; colour[b]: its
    G and B are coded on the colour-difference base (`codec.colour_flags`)."""
    batch, width = img.shape[0], img.shape[3]
    two = raw.shape[1] > fam.OUTPUTS
    table = np.empty(256, np.float32)
    other = np.empty(256, np.float32)
    mixed = np.empty((1, 257), np.uint32)  # a mixture's model, as a one-row table
    base = np.empty(3, np.int64)
    mean = np.empty(3, np.int64)
    ls8 = np.empty(3, np.int64)
    cp = np.empty(3, np.int64)
    res = np.zeros(3, np.int64)
    step = np.zeros(3, np.int64)
    for x in range(width):
        _head(x, y, acc, img, wl, lefts_seen, m1, s1, w2, b2, m2, s2, w3, b3, m3, s3, lefts,
              acc1, a1, acc2, a2, acc3, raw)
        for b in range(batch):
            for c in range(3):
                base[c] = edge_median(np.int64(img[b, c, y, x - 1]) if x else 0,
                                      np.int64(img[b, c, y - 1, x]) if y else 0,
                                      np.int64(img[b, c, y - 1, x - 1]) if x and y else 0,
                                      x, y, 128)
            if ignored[b]:
                for k in fam.DIFFERENCE_IGNORED:
                    raw[b, k] = 0
            if colour[b]:
                for c in range(1, 3):
                    step[c] = _colour_step(img, b, c, y, x)
            for c in range(3):
                mean[c] = raw[b, 2 * c] + fam.MU_SCALE * base[c]
                ls8[c] = _clamp(raw[b, 2 * c + 1], fam.LS_LO, fam.LS_HI)
                cp[c] = _clamp(raw[b, 2 * fam.CHANNELS + c], -fam.COUPLE_MAX, fam.COUPLE_MAX)
                if tuned:
                    cp[c] = _clamp(cp[c] + couplings[b, c], -fam.COUPLE_MAX, fam.COUPLE_MAX)
            earlier = 0
            for c in range(planes):
                coding = base[c]  # the base plane c is coded on
                if colour[b] and c:
                    coding = _clamp(np.int64(img[b, c - 1, y, x]) + step[c], 0, 255)
                    mean[c] += fam.MU_SCALE * (coding - base[c])
                move = channel_move(c, cp[0], cp[1], cp[2], res[0], res[1])
                offset = levels[origin[b, c] + ls8[c]] if tuned else 0
                level = _clamp(ls8[c] + offset, fam.LS_LO, fam.LS_HI)  # tuned
                shift, feedback_f = 0, 0
                if active:
                    near = q[0, x, c, b] + (q[1, x - 1, c, b] if x else feedback.NEUTRAL)
                    feedback_f = ftab[c, near + earlier]
                    errors = e[0, x, c, b] + (e[1, x - 1, c, b] if x else 0)
                    shift = (biases[b, c] * errors + 16) >> 5
                    moved = level + ((gains[b, c] * feedback_f + 8) >> 4)
                else:
                    moved = level
                ahead = mean[c] + move
                mu = _clamp(ahead + shift, fam.MU_LO, fam.MU_HI)
                row = (_clamp(moved, fam.LS_LO, fam.LS_HI) - fam.LS_LO) * MEANS + mu - fam.MU_LO
                models, at = cdfs, row  # the model: models[at]
                if not two:
                    build_row(row, counts, columns, cdfs, built, table)
                else:
                    k = fam.OUTPUTS + 3 * c
                    weight = _clamp(raw[b, k + 2], 0, fam.WEIGHT_ONE)
                    level_b = _clamp(_clamp(raw[b, k + 1], fam.LS_LO, fam.LS_HI) + offset,
                                     fam.LS_LO, fam.LS_HI)
                    if active:
                        level_b = level_b + ((gains[b, c] * feedback_f + 8) >> 4)
                    mu_b = _clamp(raw[b, k] + fam.MU_SCALE * base[c] + move + shift,
                                  fam.MU_LO, fam.MU_HI)
                    row_b = ((_clamp(level_b, fam.LS_LO, fam.LS_HI) - fam.LS_LO) * MEANS
                             + mu_b - fam.MU_LO)
                    if weight == fam.WEIGHT_ONE:
                        build_row(row, counts, columns, cdfs, built, table)
                    elif weight == 0:
                        build_row(row_b, counts, columns, cdfs, built, table)
                        at = row_b
                    else:
                        la, ma = row // MEANS + fam.LS_LO, row % MEANS + fam.MU_LO
                        lb, mb = row_b // MEANS + fam.LS_LO, row_b % MEANS + fam.MU_LO
                        for s in range(256):
                            table[s] = counts[columns[s] + la * SPAN - ma]
                            other[s] = counts[columns[s] + lb * SPAN - mb]
                            table[s] = (np.float32(weight) * table[s]
                                        + np.float32(fam.WEIGHT_ONE - weight) * other[s])
                        rangecoder.quantise(table, mixed[0])
                        models, at = mixed, 0
                start = ends[b - 1] if b else 0
                value = rangecoder.decode_at(states, b, words, start, ends[b], models, at,
                                             _clamp((mu + 2) >> 2, 0, 255))
                if value < 0:
                    return 1
                img[b, c, y, x] = value
                res[c] = value - coding
                if active:
                    e[1, x, c, b] = 4 * value - ahead
                    qv = surprise[level - fam.LS_LO, abs(4 * value - mu)]
                    q[1, x, c, b] = qv
                    earlier += qv
            if planes == 1:
                img[b, 1, y, x] = img[b, 0, y, x]
                img[b, 2, y, x] = img[b, 0, y, x]
            for c in range(3):  # the plain base's misses, whatever base codes
                misses[b, c] += abs(np.int64(img[b, c, y, x]) - base[c])
    return 0


@jit(inline="always")
def _colour_step(img, b, c, y, x):
    """The colour-difference base's step of plane c (1: G - R, 2: B - G) at (y, x): the
    median predictor on that difference, as `family.difference_base`."""
    left = (np.int64(img[b, c, y, x - 1]) - np.int64(img[b, c - 1, y, x - 1])) if x else 0
    up = (np.int64(img[b, c, y - 1, x]) - np.int64(img[b, c - 1, y - 1, x])) if y else 0
    corner = (np.int64(img[b, c, y - 1, x - 1]) - np.int64(img[b, c - 1, y - 1, x - 1])
              if x and y else 0)
    return edge_median(left, up, corner, x, y, 0)
