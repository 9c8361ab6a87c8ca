"""Integer-exact inference of the predictor: a parallel pass for the encoder and an
incremental pass for the decoder, both giving the same integers on any machine.

Integers travel in float32 (or float64) tensors only because every layer's accumulator bound,
checked when the model is loaded, keeps all partial sums exact in that type; so every kernel,
thread count and summation order gives the same sums. Requantisation is
out = floor((acc * mult + 2**(shift-1)) / 2**shift), clamped to 0..255 after ReLU layers; it
runs in float64, where every step is exact (see `requantise`).
"""

from __future__ import annotations

import functools

import numpy as np
import torch
import torch.nn.functional as F

from rowcast.network import activity_planes, left_window, row_stack_input, with_valid
from rowcast.quantize import EXACT_F32, IntLayer, IntModel

CHANNELS_LAST = torch.channels_last  # the encoder's layout: 5-15% faster convolutions here
HEAD_PIXELS = 2048  # pixels per band of the encoder's head: its activations stay in cache

torch.backends.cudnn.allow_tf32 = False
torch.backends.cuda.matmul.allow_tf32 = False


def _dtype(layer: IntLayer) -> torch.dtype:
    return torch.float32 if layer.bound < EXACT_F32 else torch.float64


@functools.cache
def _weights(layer: IntLayer) -> tuple[torch.Tensor, torch.Tensor]:
    dt = _dtype(layer)
    return torch.from_numpy(layer.weight.astype(np.float64)).to(dt), torch.from_numpy(
        layer.bias.astype(np.float64)).to(dt)


def requantise(acc: torch.Tensor, layer: IntLayer) -> torch.Tensor:
    """Requantise exact integer accumulators (B, C, H, W) per channel; float64 result.

    Computed as floor(acc * (mult / 2**shift) + 1/2), which equals the definition above
    step by step: mult / 2**shift is exact (a power-of-two scale), |acc * mult| < 2**52
    (checked at load) so the product is exact, and the sum is the definition's numerator
    over 2**shift, exact for shift <= 52 (the model loader's limit).
    """
    y = acc.to(torch.float64)  # a new tensor unless acc is float64 already: never a caller's
    y = y.clone() if y is acc else y
    y.mul_(torch.from_numpy(_scale(layer)).view(1, -1, 1, 1)).add_(0.5).floor_()
    return y.clamp_(0.0, 255.0) if layer.relu else y


@functools.cache
def _scale(layer: IntLayer) -> np.ndarray:
    return layer.mult.astype(np.float64) * 2.0**-layer.shift  # exact: a power-of-two scale


def conv_fast(a: torch.Tensor, layer: IntLayer, pad_top: bool = True) -> torch.Tensor:
    """Accumulators of one layer with torch's kernels, valid under the layer's bound."""
    w, b = _weights(layer)
    kh, kw = layer.weight.shape[2:]
    top = kh - 1 if pad_top else 0
    # conv2d pads top and bottom alike; the first H output rows are the top-padded ones
    y = F.conv2d(a.to(w.dtype), w, b, padding=(top, kw // 2))
    return y[:, :, : y.shape[2] - top] if top else y


def conv_reference(a: torch.Tensor, layer: IntLayer, pad_top: bool = True) -> torch.Tensor:
    """The same accumulators in int64 loops over kernel taps: slow, order-free, the definition."""
    kh, kw = layer.weight.shape[2:]
    a = F.pad(a.to(torch.int64), (kw // 2, kw // 2, kh - 1 if pad_top else 0, 0))
    w = torch.from_numpy(layer.weight.astype(np.int64))
    h_out, w_out = a.shape[2] - kh + 1, a.shape[3] - kw + 1
    acc = torch.from_numpy(layer.bias).view(1, -1, 1, 1).expand(a.shape[0], -1, h_out, w_out)
    acc = acc.clone()
    for i in range(kh):
        for j in range(kw):
            tap = a[:, :, i : i + h_out, j : j + w_out]
            acc += torch.einsum("bchw,oc->bohw", tap, w[:, :, i, j])
    return acc


class Engine:
    """Runs an IntModel with fast kernels, or with the int64 reference if the self-test fails."""

    def __init__(self, model: IntModel) -> None:
        self.model = model
        self.rows = model.layers[: model.depth]
        self.head1, self.head2, self.out = model.layers[model.depth :]
        self.conv = conv_fast if self_test(model) else conv_reference
        # The decoder folds each head layer's requantisation into its weights: with
        # s = mult / 2**shift, (acc + bias) * s + 1/2 = sum(a * w * s) + (bias * s + 1/2),
        # exact in float64 because every term and partial sum is a multiple of 2**-shift
        # below 2**52 of them (the loader checks bound * mult < 2**52).
        s1, s2, s3 = (_scale(layer) for layer in (self.head1, self.head2, self.out))
        w1 = self.head1.weight[:, :, 0, 0].T.astype(np.float64)  # exact: bounds < 2**53
        self._w1_rows = torch.from_numpy(w1[: model.width]).to(_dtype(self.head1))
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
        self._w2 = self.head2.weight[:, :, 0, 0].T.astype(
            np.float32 if self.head2.bound < EXACT_F32 else np.float64)
        self._s2, self._c2 = s2, self.head2.bias * s2 + 0.5
        self._w3 = self.out.weight[:, :, 0, 0].T.astype(np.float64) * s3
        self._c3 = self.out.bias * s3 + 0.5

    # -- encoder: everything at once -------------------------------------------------------
    def parallel(self, x: np.ndarray) -> np.ndarray:
        """Raw integer outputs (B, H, W, OUTPUTS) int64 for images x (B, 3, H, W) uint8."""
        t = torch.from_numpy(x).to(torch.float32)
        a = row_stack_input(t).contiguous(memory_format=CHANNELS_LAST)
        for layer in self.rows:
            a = requantise(self.conv(a, layer), layer)
        head_in = [a.to(torch.float32), left_window(t, self.left)]
        if self.model.activity:
            head_in.append(activity_planes(t))
        joined = torch.cat(head_in, 1).contiguous(memory_format=CHANNELS_LAST)
        rows = max(1, HEAD_PIXELS // (x.shape[0] * x.shape[3]))
        outs = []
        for y in range(0, x.shape[2], rows):  # the head is per pixel: bands of rows
            h = joined[:, :, y : y + rows]
            for layer in (self.head1, self.head2, self.out):
                h = requantise(self.conv(h, layer), layer)
            outs.append(h)
        return torch.cat(outs, 2).permute(0, 2, 3, 1).to(torch.int64).numpy()

    # -- decoder: a row at a time, then a pixel at a time ------------------------------------
    def start(self, batch: int, width: int) -> list[torch.Tensor]:
        """Row-stack state before row 0: each layer's previous input row is top padding."""
        chans = [4] + [layer.weight.shape[0] for layer in self.rows[:-1]]
        return [torch.zeros(batch, c, 1, width) for c in chans]

    def next_row(self, state: list[torch.Tensor], above: np.ndarray | None,
                 activity: np.ndarray) -> np.ndarray:
        """Advance the row stack by one row; returns head 1's folded accumulators (W, B,
        hidden) for the new row, with every term but those of the pixels to the left.

        `above` is the last decoded row (B, 3, W) uint8, or None before row 0; `activity`
        (B, 3) is the row's `family.row_activity` (unused by models without it).
        """
        if above is None:
            a = torch.zeros_like(state[0])
        else:
            a = with_valid(torch.from_numpy(above).to(torch.float32).unsqueeze(2))
        for i, layer in enumerate(self.rows):
            pair = torch.cat([state[i], a], 2)
            state[i] = a
            a = requantise(self.conv(pair, layer, pad_top=False), layer).to(torch.float32)
        feats = a[:, :, 0].permute(2, 0, 1).to(self._w1_rows.dtype)  # (W, B, width)
        acc = (feats @ self._w1_rows).to(torch.float64).numpy()
        acc *= self._s1
        acc += self._valid_terms(len(acc))
        if self._w1_activity is not None:
            acc += activity @ self._w1_activity
        return acc

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
    """Known-answer check at load: fast kernels vs the int64 reference on fixed inputs.

    True when they agree on every layer; otherwise the engine uses the reference path.
    """
    rng = np.random.default_rng(1234)
    for layer in model.layers:
        cin = layer.weight.shape[1]
        a = torch.from_numpy(rng.integers(0, 256, size=(2, cin, 5, 9)).astype(np.float32))
        a[0, :, 0] = 255.0  # include the extreme inputs that reach the bound
        if not torch.equal(conv_fast(a, layer).to(torch.int64), conv_reference(a, layer)):
            return False
    return True

