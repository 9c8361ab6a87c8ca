"""The fixed-point distribution family shared by training and the integer coder.

Each subpixel gets a discretised logistic. Its mean, in quarter pixels, is a fixed integer
base prediction (median of left, above and left + above - above-left) plus the network's
correction; its log-scale is in eighths. G's and B's means also move linearly with the
residuals of the channels already known (value minus base), through coefficients in 64ths.
These constants define that grid; changing any of them changes every archive, so they are
part of the format (docs/FORMAT.md).

A model may ask for a second component per subpixel (its card says `"components": 2`): a
second mean (moved by the same channel coupling) and log-scale, and the first component's
weight in 64ths. Star fields, specular spots and edges are bimodal (the pixel continues the
neighbour or drops back to the background), which one logistic cannot say.
"""

import numpy as np

CHANNELS = 3  # the network always predicts R, G, B; gray images use the R head alone

MU_SCALE = 4  # mean resolution: 1/4 pixel
MU_GAIN = 128  # mu4 = 4 * base + round(128 * raw): raw 1 moves the mean 32 px off the base
MU_LO = -16  # -4 px
MU_HI = 1036  # 259 px

LS_SCALE = 8  # log-scale resolution: 1/8 (natural log)
LS_LO = -20  # scale exp(-2.5) ~ 0.08 px
LS_HI = 35  # scale exp(4.375) ~ 79 px

COUPLE_SCALE = 64  # coupling-coefficient resolution: mu4 += round(c * residual / 16)
COUPLE_MAX = 128  # |coefficient| <= 2

ACTIVITY_SCALE = 4  # the activity input is 4 x the mean |value - base| of the rows above

CDF_BITS = 16  # the CDF is an integer in [0, 2**16]; each value's count gets +1 on top

# Output layout of the network's last layer: (mu, log-scale) for R, G, B, then the
# couplings G<-R, B<-R, B<-G.
OUTPUTS = 2 * CHANNELS + 3


WEIGHT_ONE = 64  # the first component's weight is an integer 0..64 (64ths)
# A second component adds, per channel, (mean, log-scale, first component's weight).
MIX_OUTPUTS = 3 * CHANNELS


def outputs(components: int) -> int:
    """Number of raw outputs of a model with 1 or 2 components."""
    return OUTPUTS + MIX_OUTPUTS * (components - 1)


def output_gains(components: int = 1) -> list[float]:
    """Factor from the last layer's real output to each integer parameter, in layout order."""
    return ([MU_GAIN, LS_SCALE] * CHANNELS + [COUPLE_SCALE] * 3
            + [MU_GAIN, LS_SCALE, WEIGHT_ONE] * CHANNELS * (components - 1))


def median_predictor(x: np.ndarray, origin: int) -> np.ndarray:
    """Median of left, above and left + above - above-left for every value of x (..., H,
    W), int64; the left value on the top row, the one above in the first column, `origin`
    at the origin."""
    x = x.astype(np.int64)
    left, up, corner = np.zeros_like(x), np.zeros_like(x), np.zeros_like(x)
    left[..., 1:] = x[..., :-1]
    up[..., 1:, :] = x[..., :-1, :]
    corner[..., 1:, 1:] = x[..., :-1, :-1]
    lo, hi = np.minimum(left, up), np.maximum(left, up)
    med = np.where(corner >= hi, lo, np.where(corner <= lo, hi, left + up - corner))
    med[..., 0, :] = left[..., 0, :]
    med[..., :, 0] = up[..., :, 0]
    med[..., 0, 0] = origin
    return med


def base_prediction(img: np.ndarray) -> np.ndarray:
    """The family's integer base prediction for every pixel of img (..., 3, H, W), int64:
    the `median_predictor` of each channel, 128 at the origin. The network's mean corrects
    it; the activity input measures the misses of this base whatever base codes."""
    return median_predictor(img, 128)


# The colour-difference base (payload method "difference", one-component models): R's base
# as above, G's the pixel's R plus the median predictor on G - R, B's its G plus the median
# predictor on B - G (0 at the origin), clamped to 0..255. The network's G and B means and
# channel couplings are left out (its outputs at these indices count as 0): they were
# learned for the plain base. The per-image tuning's coupling offsets still apply.
DIFFERENCE_IGNORED = (2, 4, 2 * CHANNELS, 2 * CHANNELS + 1, 2 * CHANNELS + 2)


def difference_base(img: np.ndarray) -> np.ndarray:
    """The colour-difference base of every pixel of img (..., 3, H, W), int64."""
    x = img.astype(np.int64)
    base = np.empty_like(x)
    base[..., 0, :, :] = median_predictor(x[..., 0, :, :], 128)
    for c in (1, 2):
        step = median_predictor(x[..., c, :, :] - x[..., c - 1, :, :], 0)
        base[..., c, :, :] = np.clip(x[..., c - 1, :, :] + step, 0, 255)
    return base


# The base a model's card names (`architecture.base`, model file version 2; version 1 cards
# are "median"): its network's means correct it for every RGB image it codes.
MODEL_BASES = ("median", "difference")


def model_base(img: np.ndarray, kind: str) -> np.ndarray:
    """The base of every pixel of img (..., 3, H, W) that a model of base `kind` codes on."""
    return difference_base(img) if kind == "difference" else base_prediction(img)


def ignoring_colour(out: np.ndarray) -> np.ndarray:
    """Raw outputs (..., outputs) with those the colour-difference base leaves out set to
    0 (a copy)."""
    kept = out.copy()
    kept[..., list(DIFFERENCE_IGNORED)] = 0
    return kept


def activity_from_sums(sums: np.ndarray, rows: np.ndarray | int, width: int) -> np.ndarray:
    """Activity of a row from the sum of |value - base| over the `rows` rows above it:
    ACTIVITY_SCALE x their mean, floored and clamped to 0..255 (0 on the top row)."""
    return np.minimum(ACTIVITY_SCALE * sums // np.maximum(rows * width, 1), 255)


def row_activity(img: np.ndarray) -> np.ndarray:
    """Activity (..., 3, H) of every row of img (..., 3, H, W): how far the base prediction
    missed on the rows above, per channel. It tells the network how noisy this image is."""
    x = img.astype(np.int64)
    per_row = np.abs(x - base_prediction(x)).sum(-1)
    above = np.cumsum(per_row, -1) - per_row
    return activity_from_sums(above, np.arange(x.shape[-2]), x.shape[-1])
