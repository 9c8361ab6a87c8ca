"""The rowcast predictor: a PixelCNN-family network shaped for cheap exact decoding.

Raster order, and inside a pixel R, then G, then B. The network has two parts:

* the **row stack** sees only rows strictly above the current one. Its input is the image
  shifted down by one row, and every convolution is padded on top only (kernel height 2), so
  output row y depends on rows < y. The decoder runs it once per finished row.
* the **pixel head** joins the row-stack features at (y, x) with the pixels to the left
  in the same row (a mask-A window: never the current pixel) through two 1x1 layers, and
  emits for each channel a discretised logistic. It may also see the row's *activity*: how
  far the base prediction missed on all rows above, a running measure of the image's noise.
  The channel masks are the last step: G's mean moves linearly with R, and B's with R and
  G, as decoded values become known. A model may emit a second logistic per subpixel, mixed
  with the first by a weight in 64ths (`family`).

Every layer is quantisation-aware: weights round to int8 per output channel, activations to
uint8 with a learned step, the output parameters to the grid of `family`. What training sees
in quantised mode is what the integer network in `predictor` computes.
"""

from __future__ import annotations

import math

import torch
import torch.nn.functional as F
from torch import nn

from rowcast import family as fam

PIXEL_STEP = 1.0 / 255.0  # pixels enter as integers 0..255 with this real step
LEFT = 3  # pixels to the left that the head sees, unless a model says otherwise


def round_ste(x: torch.Tensor) -> torch.Tensor:
    """Round half up, with a straight-through gradient."""
    return x + (torch.floor(x + 0.5) - x).detach()


class QConv(nn.Module):
    """A convolution over integer-valued activations, vertically causal by top padding.

    `forward` takes activations as integers (carried in floats) and the real step of each
    input channel; it returns the next integer activations (ReLU layers) or real outputs.
    """

    def __init__(self, cin: int, cout: int, kh: int, kw: int, relu: bool = True) -> None:
        super().__init__()
        self.kh, self.kw, self.relu = kh, kw, relu
        self.weight = nn.Parameter(torch.empty(cout, cin, kh, kw))
        nn.init.kaiming_uniform_(self.weight, a=math.sqrt(5))
        self.bias = nn.Parameter(torch.zeros(cout))
        self.log_step = nn.Parameter(torch.zeros(())) if relu else None

    @property
    def step(self) -> torch.Tensor:
        return self.log_step.exp()

    def effective_weight(self, in_step: torch.Tensor) -> torch.Tensor:
        """Weights that act on integer activations: W times each input channel's step."""
        return self.weight * in_step.view(1, -1, 1, 1)

    def weight_scale(self, w_eff: torch.Tensor) -> torch.Tensor:
        """Per-output-channel step so that the largest weight maps to 127."""
        return w_eff.detach().abs().amax(dim=(1, 2, 3)).clamp_min(1e-12) / 127.0

    def pre_activation(self, a: torch.Tensor, in_step: torch.Tensor, quant: bool) -> torch.Tensor:
        """The real-valued output before the activation, from integer-valued inputs."""
        w = self.effective_weight(in_step)
        a = F.pad(a, (self.kw // 2, self.kw // 2, self.kh - 1, 0))
        if not quant:
            return F.conv2d(a, w) + self.bias.view(1, -1, 1, 1)
        s = self.weight_scale(w)
        w_int = round_ste(w / s.view(-1, 1, 1, 1))
        b_int = round_ste(self.bias / s)
        return (F.conv2d(a, w_int) + b_int.view(1, -1, 1, 1)) * s.view(1, -1, 1, 1)

    def forward(self, a: torch.Tensor, in_step: torch.Tensor, quant: bool) -> torch.Tensor:
        y = self.pre_activation(a, in_step, quant)
        if not self.relu:
            return y
        if quant:
            return torch.clamp(round_ste(y / self.step), 0.0, 255.0)
        return F.relu(y) / self.step


class Predictor(nn.Module):
    """Row stack + pixel head; see the module docstring."""

    def __init__(self, width: int = 48, hidden: int = 64, depth: int = 4,
                 left: int = LEFT, activity: bool = False, components: int = 1,
                 base: str = "median") -> None:
        super().__init__()
        self.width, self.hidden, self.depth, self.left = width, hidden, depth, left
        self.activity, self.components, self.base = activity, components, base
        rows = [QConv(4, width, 2, 5)] + [QConv(width, width, 2, 3) for _ in range(depth - 1)]
        self.rows = nn.ModuleList(rows)
        self.head1 = QConv(width + 4 * left + 3 * activity, hidden, 1, 1)
        self.head2 = QConv(hidden, hidden, 1, 1)
        self.out = QConv(hidden, fam.outputs(components), 1, 1, relu=False)
        with torch.no_grad():  # start at a scale of ~4.5 px around the base prediction
            self.out.bias[1 : 2 * fam.CHANNELS : 2] = 1.5
        self.quant = False

    def layers(self) -> list[QConv]:
        return [*self.rows, self.head1, self.head2, self.out]

    def in_steps(self) -> list[torch.Tensor]:
        """The real step of each input channel of each layer, in `layers()` order."""
        px = torch.full((4,), PIXEL_STEP, device=self.out.weight.device)
        steps = [px]
        for layer in self.rows[:-1]:
            steps.append(layer.step.expand(self.width))
        steps.append(torch.cat([self.rows[-1].step.expand(self.width), px.repeat(self.left),
                                px[: 3 * self.activity]]))
        steps.append(self.head1.step.expand(self.hidden))
        steps.append(self.head2.step.expand(self.hidden))
        return steps

    def forward(self, x: torch.Tensor) -> torch.Tensor:
        """Raw last-layer outputs (B, OUTPUTS, H, W) for pixels x (B, 3, H, W) in 0..255."""
        steps = self.in_steps()
        a = row_stack_input(x)
        for layer, step in zip(self.rows, steps, strict=False):
            a = layer(a, step, self.quant)
        head_in = [a, left_window(x, self.left)] + [activity_planes(x)] * self.activity
        h = self.head1(torch.cat(head_in, 1), steps[len(self.rows)], self.quant)
        h = self.head2(h, steps[-2], self.quant)
        return self.out(h, steps[-1], self.quant)


def with_valid(x: torch.Tensor) -> torch.Tensor:
    """Append a plane that is 255 on real pixels, so zero padding is told apart from black."""
    return torch.cat([x, torch.full_like(x[:, :1], 255.0)], 1)


def row_stack_input(x: torch.Tensor) -> torch.Tensor:
    """The image with its valid plane, shifted down one row: row y holds row y-1."""
    return F.pad(with_valid(x), (0, 0, 1, 0))[:, :, :-1]


def left_window(x: torch.Tensor, left: int) -> torch.Tensor:
    """The pixels (with valid plane) at x-1 .. x-left of the same row, zero past the edge."""
    v = with_valid(x)
    return torch.cat([F.pad(v, (d, 0))[..., : v.shape[-1]] for d in range(1, left + 1)], 1)


def activity_planes(x: torch.Tensor) -> torch.Tensor:
    """`family.row_activity` of pixels x (B, 3, H, W), spread over each row."""
    act = torch.from_numpy(fam.row_activity(x.detach().cpu().numpy())).to(x)
    return act.unsqueeze(-1).expand(-1, -1, -1, x.shape[-1])


def clamp_ste(x: torch.Tensor, lo: float, hi: float) -> torch.Tensor:
    """Clamp, with the identity's gradient (so that a clamped output can come back)."""
    return x + (torch.clamp(x, lo, hi) - x).detach()


def parameters_from_output(y: torch.Tensor, x: torch.Tensor, quant: bool,
                           base: str = "median") -> dict:
    """Logistic parameters on the integer grid of `family` (rounded when `quant`).

    Returns mu4 (B,3,H,W) in quarter pixels (base prediction + correction + channel
    coupling to the earlier channels' residuals), and ls8 (B,3,H,W); with a second
    component also mu4b, ls8b and the first component's weight w (0..64). And `excess`:
    how far the means (in pixels) and log-scale levels lay outside the family's range
    before they were clamped, on average; zero inside it. The clamps pass no gradient, so
    a network that early in training drives its scales to the top of the range and its
    means below 0 (its base prediction far off, as on raw colour-filter-array frames)
    would stay there: training adds a little of `excess` to its loss to bring them back.
    """
    r = round_ste if quant else (lambda t: t)
    components = 1 + (y.shape[1] - fam.OUTPUTS) // fam.MIX_OUTPUTS
    gains = torch.tensor(fam.output_gains(components), dtype=y.dtype, device=y.device)
    q = r(y * gains.view(1, -1, 1, 1))
    base = torch.from_numpy(fam.model_base(x.detach().cpu().numpy(), base)).to(x)
    cp = torch.clamp(q[:, 2 * fam.CHANNELS : fam.OUTPUTS], -fam.COUPLE_MAX, fam.COUPLE_MAX)
    res = x - base
    shift_g = r(cp[:, 0] * res[:, 0] / 16.0)
    shift_b = r((cp[:, 1] * res[:, 0] + cp[:, 2] * res[:, 1]) / 16.0)
    zero = torch.zeros_like(shift_g)
    shift = torch.stack([zero, shift_g, shift_b], 1)

    excess = []

    def component(mu_raw: torch.Tensor, ls_raw: torch.Tensor) -> tuple:
        mu = mu_raw + fam.MU_SCALE * base + shift
        excess.append((F.relu(fam.MU_LO - mu) + F.relu(mu - fam.MU_HI)).mean() / fam.MU_SCALE
                      + (F.relu(fam.LS_LO - ls_raw) + F.relu(ls_raw - fam.LS_HI)).mean())
        return torch.clamp(mu, fam.MU_LO, fam.MU_HI), torch.clamp(ls_raw, fam.LS_LO, fam.LS_HI)

    mu4, ls8 = component(q[:, 0 : 2 * fam.CHANNELS : 2], q[:, 1 : 2 * fam.CHANNELS : 2])
    params = {"mu4": mu4, "ls8": ls8}
    if components == 2:
        mix = q[:, fam.OUTPUTS :]
        params["mu4b"], params["ls8b"] = component(mix[:, 0::3], mix[:, 1::3])
        params["w"] = clamp_ste(mix[:, 2::3], 0.0, float(fam.WEIGHT_ONE))
    params["excess"] = sum(excess)
    return params


def _bin_log_probability(mu4: torch.Tensor, ls8: torch.Tensor, x: torch.Tensor) -> torch.Tensor:
    """Natural log of each value's bin under a discretised logistic (end bins take the tails)."""
    mu = mu4 / fam.MU_SCALE
    log_s = ls8 / fam.LS_SCALE
    centred = x - mu
    inv_s = torch.exp(-log_s)
    plus = inv_s * (centred + 0.5)
    minus = inv_s * (centred - 0.5)
    log_cdf_plus = plus - F.softplus(plus)
    log_sf_minus = -F.softplus(minus)
    delta = torch.sigmoid(plus) - torch.sigmoid(minus)
    mid = inv_s * centred
    log_pdf_mid = mid - log_s - 2.0 * F.softplus(mid)
    log_mid = torch.where(delta > 1e-5, torch.log(delta.clamp_min(1e-12)), log_pdf_mid)
    return torch.where(x < 0.5, log_cdf_plus, torch.where(x > 254.5, log_sf_minus, log_mid))


def log2_likelihood(params: dict, x: torch.Tensor) -> torch.Tensor:
    """log2 of each subpixel's probability (B,3,H,W) under its discretised logistic (or the
    mixture of two), with the coder's +1 count per value mirrored so that training sees what
    the coder pays."""
    total = 2.0**fam.CDF_BITS

    def log_count(mu4: torch.Tensor, ls8: torch.Tensor) -> torch.Tensor:
        """ln of the coder's count: 2**16 x the bin's probability, plus one."""
        log_p = _bin_log_probability(mu4, ls8, x)
        return torch.logaddexp(log_p + math.log(total), torch.zeros_like(log_p))

    floored = log_count(params["mu4"], params["ls8"])
    if "w" in params:
        floored_b = log_count(params["mu4b"], params["ls8b"])
        w = params["w"] / fam.WEIGHT_ONE
        return torch.log2(w * floored.exp() + (1.0 - w) * floored_b.exp()) - math.log2(
            total + 256.0)
    return (floored - math.log(total + 256.0)) / math.log(2.0)
