"""Integer-exact inference of the predictor on numpy: a parallel pass for the encoder and
an incremental pass for the decoder, both giving the same integers on any machine.

Activations are channel-last arrays (B, H, W, C). A layer's accumulators are its bias plus,
for each kernel tap, a plain matrix product of the shifted activations with that tap's
weights. Integers travel in float32 (or float64) arrays only because every layer's
accumulator bound, checked when the model is loaded, keeps all partial sums exact in that
type; so any BLAS, thread count or summation order gives the same sums. Requantisation is
out = floor((acc * mult + 2**(shift-1)) / 2**shift), clamped to 0..255 after ReLU layers; it
runs in float64, where every step is exact (see `requantise`). No torch at run time: it is
needed only to train.
"""

from __future__ import annotations

import functools

import numpy as np

from rowcast import family as fam
from rowcast.quantize import EXACT_F32, IntLayer, IntModel

HEAD_PIXELS = 2048  # pixels per band of the encoder's head: its activations stay in cache
INT32_SAFE = 1 << 31  # a layer whose bound reaches this cannot sum in int32


def _dtype(layer: IntLayer) -> type:
    return np.float32 if layer.bound < EXACT_F32 else np.float64


@functools.cache
def _taps(layer: IntLayer) -> tuple[np.ndarray, np.ndarray]:
    """The weights as (kh, kw, cin, cout) and the bias, in the layer's float type (exact:
    every value is an integer below the layer's bound)."""
    dt = _dtype(layer)
    return (np.ascontiguousarray(layer.weight.transpose(2, 3, 1, 0), dtype=dt),
            layer.bias.astype(dt))


@functools.cache
def _scale(layer: IntLayer) -> np.ndarray:
    return layer.mult.astype(np.float64) * 2.0**-layer.shift  # exact: a power-of-two scale


def requantise(acc: np.ndarray, layer: IntLayer) -> np.ndarray:
    """Requantise exact integer accumulators (..., C) per channel; a new float64 array.

    Computed as floor(acc * (mult / 2**shift) + 1/2), which equals the definition above
    step by step: mult / 2**shift is exact (a power-of-two scale), |acc * mult| < 2**52
    (checked at load) so the product is exact, and the sum is the definition's numerator
    over 2**shift, exact for shift <= 52 (the model loader's limit).
    """
    y = np.multiply(acc, _scale(layer), dtype=np.float64)
    y += 0.5
    np.floor(y, out=y)
    return np.clip(y, 0.0, 255.0, out=y) if layer.relu else y


def _padded(a: np.ndarray, layer: IntLayer, pad_top: bool) -> np.ndarray:
    """Zero padding for a vertically causal kernel: kh - 1 rows on top (none when the rows
    above are already there), kw // 2 columns on each side."""
    kh, kw = layer.weight.shape[2:]
    return np.pad(a, ((0, 0), (kh - 1 if pad_top else 0, 0), (kw // 2, kw // 2), (0, 0)))


def conv_fast(a: np.ndarray, layer: IntLayer, pad_top: bool = True) -> np.ndarray:
    """Accumulators (B, H', W, cout) of one layer for activations a (B, H, W, cin): each
    pixel's kh x kw window laid out as one row (kh * kw * cin inputs), then one matrix
    product, valid under the layer's bound (long rows keep BLAS near its peak)."""
    taps, bias = _taps(layer)
    kh, kw, cin, cout = taps.shape
    if kh == kw == 1:  # the head: one product, no padding
        acc = a.reshape(-1, cin).astype(taps.dtype, copy=False) @ taps[0, 0]
        acc += bias
        return acc.reshape(*a.shape[:-1], cout)
    p = _padded(a, layer, pad_top)
    b, h, w = p.shape[0], p.shape[1] - kh + 1, p.shape[2] - kw + 1
    windows = np.empty((b, h, w, kh, kw, cin), taps.dtype)
    for i in range(kh):
        for j in range(kw):
            windows[:, :, :, i, j] = p[:, i : i + h, j : j + w]
    acc = windows.reshape(-1, kh * kw * cin) @ taps.reshape(-1, cout)
    acc += bias
    return acc.reshape(b, h, w, cout)


def conv_reference(a: np.ndarray, layer: IntLayer, pad_top: bool = True) -> np.ndarray:
    """The same accumulators in int64 over kernel taps: slow, order-free, the definition."""
    kh, kw = layer.weight.shape[2:]
    p = _padded(a.astype(np.int64), layer, pad_top)
    w = layer.weight.astype(np.int64)
    h, width = p.shape[1] - kh + 1, p.shape[2] - kw + 1
    acc = np.broadcast_to(layer.bias.astype(np.int64), (p.shape[0], h, width, len(w))).copy()
    for i in range(kh):
        for j in range(kw):
            acc += np.einsum("bhwc,oc->bhwo", p[:, i : i + h, j : j + width], w[:, :, i, j])
    return acc


def with_valid(x: np.ndarray) -> np.ndarray:
    """Append a plane that is 255 on real pixels, so zero padding is told apart from black."""
    return np.concatenate([x, np.full(x.shape[:-1] + (1,), 255.0, x.dtype)], -1)


def row_stack_input(x: np.ndarray) -> np.ndarray:
    """Pixels (B, H, W, 3) with their valid plane, shifted down one row: row y holds y-1."""
    v = with_valid(x)
    return np.concatenate([np.zeros_like(v[:, :1]), v[:, :-1]], 1)


def left_window(x: np.ndarray, left: int) -> np.ndarray:
    """The pixels (with valid plane) at x-1 .. x-left of the same row, zero past the edge."""
    v = with_valid(x)
    w = v.shape[2]
    return np.concatenate([np.pad(v, ((0, 0), (0, 0), (d, 0), (0, 0)))[:, :, :w]
                           for d in range(1, left + 1)], -1)


def activity_planes(x: np.ndarray) -> np.ndarray:
    """`family.row_activity` of pixels x (B, H, W, 3), spread over each row (B, H, W, 3)."""
    act = fam.row_activity(x.transpose(0, 3, 1, 2)).astype(x.dtype)  # (B, 3, H)
    return np.broadcast_to(act.transpose(0, 2, 1)[:, :, None], x.shape)


class Engine:
    """Runs an IntModel with fast kernels; its float convolutions fall back to the int64
    reference if their known-answer check fails (`self_test`, on their first use: the
    int8 kernels that code and decode never need it, and it costs 0.08 s)."""

    def __init__(self, model: IntModel) -> None:
        self.model = model
        self.rows = model.layers[: model.depth]
        self.head1, self.head2, self.out = model.layers[model.depth :]
        # the encoder's kernels: int8 products summed in int32 where every bound allows
        self.int8 = all(layer.bound < INT32_SAFE for layer in model.layers)
        # The decoder folds each head layer's requantisation into its weights: with
        # s = mult / 2**shift, (acc + bias) * s + 1/2 = sum(a * w * s) + (bias * s + 1/2),
        # exact in float64 because every term and partial sum is a multiple of 2**-shift
        # below 2**52 of them (the loader checks bound * mult < 2**52).
        s1, s2, s3 = (_scale(layer) for layer in (self.head1, self.head2, self.out))
        w1 = self.head1.weight[:, :, 0, 0].T.astype(np.float64)  # exact: bounds < 2**53
        self._w1_rows = w1[: model.width].astype(_dtype(self.head1))
        self._s1, self._c1 = s1, self.head1.bias * s1 + 0.5
        self._w1_activity = w1[w1.shape[0] - 3 :] * s1 if model.activity else None
        # The head's left window: weights of pixel x - d at rows 4(d-1)..4(d-1)+3 (R, G, B,
        # valid). With n pixels to the left: their RGB weights in column order; the valid
        # planes' terms go in with the row (`next_row`).
        self.left = model.left
        left = w1[model.width : model.width + 4 * self.left].reshape(self.left, 4, -1) * s1
        self._left = [left[:n][::-1, :3].reshape(3 * n, left.shape[2])
                      for n in range(self.left + 1)]
        self._valid = np.cumsum(255.0 * left[:, 3], axis=0)  # row n-1: n pixels to the left
        self._valid_rows: dict[int, np.ndarray] = {}
        # float32 where the layer's bound keeps every partial sum exact in it: 10% faster
        self._w2 = self.head2.weight[:, :, 0, 0].T.astype(_dtype(self.head2))
        self._s2, self._c2 = s2, self.head2.bias * s2 + 0.5
        self._w3 = self.out.weight[:, :, 0, 0].T.astype(np.float64) * s3
        self._c3 = self.out.bias * s3 + 0.5

    def conv(self, a: np.ndarray, layer: IntLayer, pad_top: bool = True) -> np.ndarray:
        """A layer's accumulators: `conv_fast` where it passes `self_test`, else
        `conv_reference`."""
        return (conv_fast if self_test(self.model) else conv_reference)(a, layer, pad_top)

    # -- encoder: everything at once -------------------------------------------------------
    def parallel(self, x: np.ndarray) -> np.ndarray:
        """Raw integer outputs (B, H, W, OUTPUTS) int64 for images x (B, 3, H, W) uint8: the
        int8 kernels (`intkernels`) where every layer's sums fit int32, else `conv`."""
        if self.int8:
            return self._parallel_int8(x)
        t = x.transpose(0, 2, 3, 1).astype(np.float32)
        a = row_stack_input(t)
        for layer in self.rows:
            a = requantise(self.conv(a, layer), layer).astype(np.float32)
        head_in = [a, left_window(t, self.left)]
        if self.model.activity:
            head_in.append(activity_planes(t))
        h = np.concatenate(head_in, -1)
        for layer in (self.head1, self.head2, self.out):
            h = requantise(self.conv(h, layer), layer).astype(np.float32)
        return h.astype(np.int64)

    def _parallel_int8(self, x: np.ndarray) -> np.ndarray:
        """`parallel` on uint8 activations: each row-stack layer one `conv_rows` over its
        input padded in place, the head a band of rows at a time (its activations stay in
        cache)."""
        from rowcast import native
        from rowcast.intkernels import conv_weights

        kernels = native.kernels()

        b, _, h, w = x.shape
        t = x.transpose(0, 2, 3, 1)
        a = row_stack_input(t)
        for layer in self.rows:
            kw, cin = layer.weight.shape[3], layer.weight.shape[1]
            p = np.zeros((b, h + 1, w + kw - 1, -(-cin // 4) * 4), np.uint8)
            p[:, 1:, kw // 2 : kw // 2 + w, :cin] = a
            a = np.empty((b, h, w, len(layer.weight)), np.uint8)
            kernels.conv_rows(p, conv_weights(layer), layer.bias, layer.mult, layer.shift, True, a)
        head_in = [a, left_window(t, self.left)]
        if self.model.activity:
            head_in.append(activity_planes(t))
        joined = np.concatenate(head_in, -1)
        head = [(layer, conv_weights(layer)) for layer in (self.head1, self.head2)]
        last = conv_weights(self.out)
        rows = max(1, HEAD_PIXELS // (b * w))
        out = []
        for y in range(0, h, rows):  # the head is per pixel: bands of rows
            band = joined[:, y : y + rows]
            u = np.zeros((*band.shape[:3], -(-band.shape[3] // 4) * 4), np.uint8)
            u[..., : band.shape[3]] = band
            for layer, weights in head:
                v = np.zeros((*band.shape[:3], -(-len(layer.weight) // 4) * 4), np.uint8)
                kernels.conv_rows(u, weights, layer.bias, layer.mult, layer.shift, True, v)
                u = v
            out.append(np.empty((*band.shape[:3], len(self.out.weight)), np.int64))
            kernels.conv_rows_wide(u, last, self.out.bias, self.out.mult, self.out.shift, False,
                                   out[-1])
        return np.concatenate(out, 1)

    # -- decoder: a row at a time, then a pixel at a time ------------------------------------
    def start(self, batch: int, width: int) -> list[np.ndarray]:
        """Row-stack state before row 0: each layer's previous input row is top padding."""
        chans = [4] + [layer.weight.shape[0] for layer in self.rows[:-1]]
        return [np.zeros((batch, 1, width, c), np.float32) for c in chans]

    def next_row(self, state: list[np.ndarray], above: np.ndarray | None,
                 activity: np.ndarray) -> np.ndarray:
        """Advance the row stack by one row; returns head 1's folded accumulators (W, B,
        hidden) for the new row, with every term but those of the pixels to the left.

        `above` is the last decoded row (B, 3, W) uint8, or None before row 0; `activity`
        (B, 3) is the row's `family.row_activity` (unused by models without it).
        """
        acc = (self.row_features(state, above) @ self._w1_rows).astype(np.float64)
        acc *= self._s1
        acc += self._valid_terms(len(acc))
        if self._w1_activity is not None:
            acc += activity @ self._w1_activity
        return acc

    def row_features(self, state: list[np.ndarray], above: np.ndarray | None) -> np.ndarray:
        """Advance the row stack by one row (`above`: the last decoded row (B, 3, W) uint8,
        or None before row 0); returns its output for the new row, (W, B, width) in head
        1's float type (exact integers)."""
        if above is None:
            a = np.zeros_like(state[0])
        else:
            a = with_valid(above.transpose(0, 2, 1)[:, None].astype(np.float32))
        for i, layer in enumerate(self.rows):
            pair = np.concatenate([state[i], a], 1)
            state[i] = a
            a = requantise(self.conv(pair, layer, pad_top=False), layer).astype(np.float32)
        return a[:, 0].transpose(1, 0, 2).astype(self._w1_rows.dtype)

    def _valid_terms(self, width: int) -> np.ndarray:
        """(W, 1, hidden): head 1's folded bias and the valid planes of the pixels left of
        each column."""
        if width not in self._valid_rows:
            n = np.minimum(np.arange(width), self.left)  # pixels left of each column
            valid = np.concatenate([np.zeros((1, len(self._c1))), self._valid])[n]
            self._valid_rows[width] = (valid + self._c1)[:, None]
        return self._valid_rows[width]

    def pixel(self, acc_rows: np.ndarray, row: np.ndarray, x: int) -> np.ndarray:
        """Raw integer outputs (B, OUTPUTS) at column x, from the row's accumulators and the
        current row (B, 3, W) so far; column x's accumulators are used up."""
        acc = acc_rows[x]
        n = min(x, self.left)  # pixels to the left that exist
        if n:
            acc += row[:, :, x - n : x].transpose(0, 2, 1).reshape(len(row), 3 * n) @ self._left[n]
        acc = (_floor_to_byte(acc).astype(self._w2.dtype) @ self._w2) * self._s2
        acc += self._c2
        acc = _floor_to_byte(acc) @ self._w3
        acc += self._c3
        return np.floor(acc, out=acc).astype(np.int64)


def _floor_to_byte(a: np.ndarray) -> np.ndarray:
    """floor(a) clamped to 0..255, in place: a ReLU layer's folded requantisation."""
    np.floor(a, out=a)
    np.maximum(a, 0.0, out=a)
    return np.minimum(a, 255.0, out=a)


@functools.cache
def self_test(model: IntModel) -> bool:
    """Known-answer check on first use: fast kernels vs the int64 reference on fixed inputs.

    True when they agree on every layer; otherwise the engine uses the reference path.
    """
    rng = np.random.default_rng(1234)
    for layer in model.layers:
        cin = layer.weight.shape[1]
        a = rng.integers(0, 256, size=(2, 5, 9, cin)).astype(np.float32)
        a[0, 0] = 255.0  # include the extreme inputs that reach the bound
        if not np.array_equal(conv_fast(a, layer).astype(np.int64), conv_reference(a, layer)):
            return False
    return True
