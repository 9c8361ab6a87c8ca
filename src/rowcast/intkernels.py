"""Compiled integer kernels shared by the encoder's parallel pass and the decoder's loop.

Requantisation as the model file defines it: out = (acc * mult + 2**(shift - 1)) >> shift
in int64 (exact: the loader checks |acc| * mult < 2**52), clamped to 0..255 after ReLU
layers. numba compiles these on first use; importing this module imports numba, so the
commands that decode nothing never load it.
"""

from __future__ import annotations

import numpy as np
from numba import njit


@njit(cache=True, nogil=True)
def requantised(acc: np.int64, mult: np.int64, shift: int, relu: bool) -> np.int64:
    """One accumulator requantised."""
    out = (acc * mult + (np.int64(1) << (shift - 1))) >> shift
    if relu:
        out = min(max(out, 0), 255)
    return out


@njit(cache=True, nogil=True)
def requantise_into(acc, mult, shift, relu, out):
    """out[i, c] = requantised(acc[i, c]) for accumulators (N, C), bias included, held
    exactly in a float or integer array, into a float32 array: one pass instead of numpy's
    five."""
    for i in range(acc.shape[0]):
        for c in range(acc.shape[1]):
            out[i, c] = requantised(np.int64(acc[i, c]), mult[c], shift, relu)
    return out
