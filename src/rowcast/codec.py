"""Images to payloads and back with the integer predictor and the range coder.

Coding order: raster order over pixels, and inside a pixel its planes in order (R, G, B;
gray has one). The encoder gets every table from one parallel pass; the decoder walks the
same order, a row of the row stack and then one pixel of the head at a time, for a batch of
same-sized images at once, each with its own range decoder.
"""

from __future__ import annotations

import functools
from collections.abc import Sequence
from dataclasses import dataclass, replace

import numpy as np

from rowcast import entropy, feedback, tuning
from rowcast import family as fam
from rowcast.predictor import Engine
from rowcast.tables import (
    LENGTH_ONE,
    LEVELS,
    MEANS,
    TABLE_TOTAL,
    all_tables,
    code_lengths,
    count_index,
    mixture_tables,
    symbol_columns,
    symbol_counts,
    symbol_lengths,
    table_rows,
)
from rowcast.workers import run_split, shares

CHUNK = 2048  # subpixels per encoder call: keeps the tables in cache
PASS_PIXELS = 1 << 13  # pixels per parallel pass: activations stay in cache (encoding
# 64-px thumbnails 2 a pass is 22-25% faster than 8 a pass, measured) and memory bounded


# How a payload carries its tuning: "full" headers of 16 or 18 bytes ahead of the coder's
# little-endian words (archive formats 1 to 4); "compact" headers for gray images (format
# 5); "streamed": the tuning fields range-coded ahead of the pixels under fixed priors
# (`tuning.fields`) and the coder's ending trimmed (`entropy.finish`), format 6 on.
LAYOUTS = ("full", "compact", "streamed")
# Payload methods: "model" (untuned), "tuned" (scale and coupling offsets), "adaptive"
# (and the neighbours' feedback gains), "difference" (an adaptive one whose G and B are
# coded on the colour-difference base, `family.difference_base`; "streamed" layout only)
METHODS = ("model", "tuned", "adaptive", "difference")
FEEDBACK = ("adaptive", "difference")  # methods whose fields carry the feedback gains
BASES = ("either", "plain", "difference")  # what `plan_of` may code G and B on


def as_rgb(planes: np.ndarray) -> np.ndarray:
    """Three planes for the network: gray is repeated, RGB is unchanged."""
    return planes if planes.shape[0] == 3 else np.repeat(planes, 3, axis=0)


@dataclass(frozen=True)
class Coded:
    """One image's payload, its method ("adaptive" or "tuned": the coder's code with its
    tuning, "model": without), the model's cross-entropy for its pixels and what its tuning
    costs (`header_length`), in bits: the payload's floor is their sum."""

    payload: bytes
    cross_entropy: float
    method: str = "model"
    tuning_bits: float = 0.0


def base_at(row: np.ndarray, above: tuple | None, x: int) -> np.ndarray:
    """`base_prediction` of column x only, for a batch: row is (B, 3, W), above the row
    above's `base_terms` or None on the top row."""
    return median_at(row[:, :, x - 1] if x else None, above, x, 128, row.shape[:2])


def colour_steps_at(row: np.ndarray, above: tuple | None, x: int) -> np.ndarray:
    """The colour-difference base's steps at column x (B, 3): 0, the median predictor on
    G - R and on B - G (`family.difference_base`), for a batch: row is (B, 3, W), above
    the row above's `base_terms` of its `channel_steps`, or None on the top row."""
    return median_at(channel_steps(row[:, :, x - 1]) if x else None, above, x, 0,
                     row.shape[:2])


def channel_steps(values: np.ndarray) -> np.ndarray:
    """(0, G - R, B - G) of values (B, 3, ...), int64."""
    v = values.astype(np.int64)
    return np.concatenate([np.zeros_like(v[:, :1]), v[:, 1:] - v[:, :-1]], axis=1)


def median_at(left: np.ndarray | None, above: tuple | None, x: int, origin: int,
              shape: tuple[int, int]) -> np.ndarray:
    """`family.median_predictor` at column x (`shape` (B, 3)): left is column x - 1 (None
    at x = 0), above the row above's `base_terms` or None on the top row."""
    if above is None:
        return left.astype(np.int64) if x else np.full(shape, origin, np.int64)
    up, slope = above
    if x == 0:
        return up[x]
    left = left.astype(np.int64)
    # the median of left, up and left + up - corner is that last value clamped to [lo, hi]
    return np.minimum(np.maximum(left + slope[x], np.minimum(left, up[x])),
                      np.maximum(left, up[x]))


def base_terms(above: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """(up, up - corner), each (W, B, 3) int64, of a row above (B, 3, W) for `base_at`."""
    up = above.transpose(2, 0, 1).astype(np.int64)
    return up, up - np.concatenate([up[:1], up[:-1]])


@dataclass(frozen=True)
class Tune:
    """An image's tuning (or a batch's, one per image): scale offsets (3, bands) or
    (B, 3, bands), coupling offsets (3,) or (B, 3), the feedback's scale and bias gains
    (3,) or (B, 3) each, and the offset of every level: the channels' maps
    (`tuning.offset_map`) end to end in `levels`, channel c's offset for level l at
    levels[origin[..., c] + l]; for a batch, which images use the colour-difference base
    (B,) bool (method "difference"), else None."""

    offsets: np.ndarray
    couplings: np.ndarray
    gains: np.ndarray
    biases: np.ndarray
    levels: np.ndarray
    origin: np.ndarray
    difference: np.ndarray | None = None

    @property
    def tuned(self) -> np.ndarray:
        """The tuned level of every level, laid out as `levels`."""
        untuned = np.tile(np.arange(fam.LS_LO, fam.LS_HI + 1), self.levels.size // LEVELS)
        return tuning.apply(untuned, self.levels)

    @classmethod
    def of(cls, offsets: np.ndarray, couplings: np.ndarray, gains: np.ndarray | None = None,
           biases: np.ndarray | None = None, difference: np.ndarray | None = None) -> Tune:
        levels = tuning.offset_map(offsets)
        starts = np.arange(levels.size, step=levels.shape[-1]).reshape(levels.shape[:-1])
        gains = np.zeros_like(couplings) if gains is None else gains
        biases = np.zeros_like(couplings) if biases is None else biases
        return cls(offsets, couplings, gains, biases, levels.reshape(-1), starts - fam.LS_LO,
                   difference)

    @property
    def feedback(self) -> bool:
        """Whether the neighbours' feedback moves anything (method "adaptive")."""
        return bool(self.gains.any() or self.biases.any())

    @property
    def carried_gains(self) -> tuple[np.ndarray, np.ndarray] | None:
        """(scale gains, bias gains) when the feedback moves anything, else None: what a
        header or the fields carry beyond the offsets."""
        return (self.gains, self.biases) if self.feedback else None

    @property
    def method(self) -> str:
        """The coding method that carries this tuning."""
        return "adaptive" if self.feedback else "tuned"


@dataclass(frozen=True)
class Params:
    """Integer parameters of N pixels, each (N, 3): means before the channel masks,
    log-scales and couplings; with a second component, its means and log-scales and the
    first component's weight (0..64), else None."""

    means: np.ndarray
    ls8: np.ndarray
    couplings: np.ndarray
    means_b: np.ndarray | None = None
    ls8_b: np.ndarray | None = None
    weight: np.ndarray | None = None


def _log_scales(raw: np.ndarray) -> np.ndarray:
    return np.minimum(np.maximum(raw, fam.LS_LO), fam.LS_HI)


def pixel_params(out: np.ndarray, base: np.ndarray, tune: Tune | None = None,
                 tune_levels: bool = True) -> Params:
    """The parameters of N pixels from raw outputs (N, outputs) and the base prediction
    (N, 3), tuned by `tune` (None: untuned); with `tune_levels` false the levels stay
    untuned, for a caller that looks up their tuned forms itself."""
    lead = fam.MU_SCALE * base
    ls8 = _log_scales(out[:, 1 : 2 * fam.CHANNELS : 2])
    couplings = np.minimum(np.maximum(out[:, 2 * fam.CHANNELS : fam.OUTPUTS], -fam.COUPLE_MAX),
                           fam.COUPLE_MAX)
    tuned = tune is not None and tune_levels
    shift = tune.levels.take(tune.origin + ls8) if tuned else None  # per level
    params = Params(out[:, 0 : 2 * fam.CHANNELS : 2] + lead,
                    ls8 if shift is None else tuning.apply(ls8, shift),
                    couplings if tune is None else tuning.couple(couplings, tune.couplings))
    if out.shape[1] == fam.OUTPUTS:
        return params
    mix = out[:, fam.OUTPUTS :]
    ls8_b = _log_scales(mix[:, 1::3])
    return Params(params.means, params.ls8, params.couplings, mix[:, 0::3] + lead,
                  ls8_b if shift is None else tuning.apply(ls8_b, shift),
                  np.minimum(np.maximum(mix[:, 2::3], 0), fam.WEIGHT_ONE))


def coupling_move(couplings: np.ndarray, c: int, residuals: np.ndarray) -> np.ndarray | int:
    """How far the channel masks move plane c's means (quarter pixels, (N,)): couplings
    times the residuals (value minus base, (N, 3)) of the planes before it."""
    if c == 0:
        return 0
    if c == 1:
        return (couplings[:, 0] * residuals[:, 0] + 8) >> 4
    return (couplings[:, 1] * residuals[:, 0] + couplings[:, 2] * residuals[:, 1] + 8) >> 4


def _on_grid(mu4: np.ndarray) -> np.ndarray:
    return np.minimum(np.maximum(mu4, fam.MU_LO), fam.MU_HI)


def plane_grid(p: Params, c: int, residuals: np.ndarray,
               levels_moved: np.ndarray | None = None,
               means_moved: np.ndarray | int = 0) -> tuple:
    """((means, levels) of the first component, of the second or None) for plane c (N,),
    with the levels moved by `levels_moved` ((N,): each its own), or (K, N) moved by each of
    K offsets (K, 1) or K moves (K, N), and the means by `means_moved` ((N,) or (K, N))."""
    move = coupling_move(p.couplings, c, residuals) + means_moved

    def grid(means: np.ndarray, ls8: np.ndarray) -> tuple:
        levels = ls8[:, c] if levels_moved is None else tuning.apply(ls8[:, c], levels_moved)
        return _on_grid(means[:, c] + move), levels

    return grid(p.means, p.ls8), None if p.weight is None else grid(p.means_b, p.ls8_b)


def plane_rows(p: Params, c: int, residuals: np.ndarray,
               levels_moved: np.ndarray | None = None,
               means_moved: np.ndarray | int = 0) -> tuple:
    """(table rows of the first component, of the second or None): `plane_grid` as rows
    of `all_tables()`."""
    first, second = plane_grid(p, c, residuals, levels_moved, means_moved)
    return table_rows(*first), None if second is None else table_rows(*second)


@dataclass(frozen=True)
class Feedback:
    """What the neighbours' feedback (`feedback`) does to an image's N subpixels of P
    planes, each (N, P): their errors' sums e_left + e_up, the moves of their means (for
    the tuning's bias gains) and their surprises' sums S."""

    errors: np.ndarray
    means_moved: np.ndarray
    sums: np.ndarray

    @classmethod
    def of(cls, p: Params, known: np.ndarray, residuals: np.ndarray, shape: tuple[int, int],
           biases: np.ndarray) -> Feedback:
        """From an image's tuned parameters, values (N, P), residuals (N, 3) and biases."""
        from rowcast.tuningkernel import feedback_arrays  # numba: only when coding

        return cls(*feedback_arrays(p.means, p.couplings, residuals, known, p.ls8, biases,
                                    shape[1]))

    def band(self, pixels: slice) -> Feedback:
        """The feedback of some of the pixels (a band of rows)."""
        return Feedback(self.errors[pixels], self.means_moved[pixels], self.sums[pixels])


def level_moves(sums: np.ndarray, c: int, gains: np.ndarray | int) -> np.ndarray:
    """How far the surprise feedback moves the levels of plane c with surprise sums `sums`
    (`feedback.level_moves`, before clamping)."""
    return feedback.level_moves(feedback.feedback_table(c + 2)[sums], gains)


def _tables(rows: np.ndarray, rows_b: np.ndarray | None, weight: np.ndarray | None):
    return np.take(all_tables(), rows, axis=0) if rows_b is None else mixture_tables(
        rows, rows_b, weight)


def image_tables(out: np.ndarray, rgb: np.ndarray, base: np.ndarray, planes: int,
                 tune: Tune | None = None,
                 near: Feedback | None = None) -> tuple[np.ndarray, np.ndarray]:
    """(symbols (N*P,), tables (N*P, 256)) in coding order for a band of image rows.

    out: raw outputs (h, W, outputs); rgb and base: (3, h, W) for the same rows; tune:
    the image's tuning, or None; near: the band's `Feedback`, needed when the tuning has
    feedback gains.
    """
    symbols, first, second, weight = image_rows(out, rgb, base, planes, tune, near)
    return symbols, _tables(first, second, weight)


def image_rows(out: np.ndarray, rgb: np.ndarray, base: np.ndarray, planes: int,
               tune: Tune | None = None, near: Feedback | None = None) -> tuple:
    """`image_tables` as rows of `all_tables()`: (symbols, the first component's rows, the
    second's or None, the weights or None), each (N*P,) in coding order."""
    known = rgb.reshape(3, -1).T.astype(np.int64)
    flat_base = base.reshape(3, -1).T
    p = pixel_params(out.reshape(-1, out.shape[-1]), flat_base, tune)
    residuals = known - flat_base

    def rows(c: int) -> tuple:
        if tune is None or not tune.feedback:
            return plane_rows(p, c, residuals)
        return plane_rows(p, c, residuals, level_moves(near.sums[:, c], c, tune.gains[c]),
                          near.means_moved[:, c])

    rows = [rows(c) for c in range(planes)]  # in coding order:
    first = np.stack([r[0] for r in rows], axis=1).reshape(-1)  # pixel-major, then plane
    second = None if p.weight is None else np.stack([r[1] for r in rows], 1).reshape(-1)
    weight = None if p.weight is None else p.weight[:, :planes].reshape(-1)
    return known[:, :planes].reshape(-1), first, second, weight


def encode_batch(engine: Engine, images: list[np.ndarray], method: str = "adaptive",
                 workers: int | None = None, layout: str = "streamed",
                 quick: bool = False, base: str = "either") -> list[Coded]:
    """Payloads for same-sized images, each (P, H, W) uint8. `method` is the richest
    method allowed: with "adaptive", each image gets the tuning and feedback gains that
    shorten it (method "adaptive", or "tuned" when every gain is zero) if that saves more
    than it costs; "tuned" tunes without gains (format versions 2 and 3); "model" never
    tunes. `layout` is how the payload carries its tuning (`LAYOUTS`); `quick` skips the
    tuning's second search (`tuning_of`); `base` which base G and B may be coded on
    (`plan_of`). Like decoding, a large batch is shared by single-threaded processes
    (`workers.shares`); the bytes are the same for any split."""
    if method not in ("adaptive", "tuned", "model"):
        raise ValueError(f"no encoder for method {method!r}")
    if layout not in LAYOUTS:
        raise ValueError(f"no payload layout {layout!r}")
    if base not in BASES:
        raise ValueError(f"no base {base!r}")
    pixels = images[0].shape[1] * images[0].shape[2] if images else 0
    parts = [images[a:b] for a, b in shares(len(images), workers, pixels)]
    if len(parts) > 1:
        load_compiled(engine, "encode")
    return [c for part in run_split(lambda part, _: _encode(engine, part, method, layout,
                                                            quick, base), parts) for c in part]


def _encode(engine: Engine, images: list[np.ndarray], method: str,
            layout: str, quick: bool, base: str) -> list[Coded]:
    planes, h, w = images[0].shape
    per_pass = max(1, PASS_PIXELS // (h * w))
    coded = []
    for start in range(0, len(images), per_pass):
        group = np.stack([as_rgb(im) for im in images[start : start + per_pass]])
        outs = engine.parallel(group)
        for out, rgb in zip(outs, group, strict=True):
            coded.append(_encode_one(out, rgb, planes, method, layout, quick, base,
                                     engine.model.base))
    return coded


def tuning_of(out: np.ndarray, rgb: np.ndarray, base: np.ndarray, planes: int,
              method: str = "adaptive", layout: str = "streamed",
              quick: bool = False) -> tuple[Tune | None, Feedback | None]:
    """(the tuning that gives this image the shortest code, or None when it would not save
    what it costs in the payload's `layout` (`header_length`); its `Feedback` when it has
    feedback gains, else None): what `image_tables` needs for the encoder's tables. The
    search: scale offsets band by band, then coupling offsets, then with method "adaptive"
    the bias gains, the scale gains, and unless `quick` the scale offsets and scale gains
    once more (`_offsets_again`: measured on 64 photo thumbnails, 0.24% fewer bytes for
    30% more encoding time)."""
    if method == "model":
        return None, None
    from rowcast.tuningkernel import coupled_sums, plane_lengths  # numba: only when coding

    known = rgb.reshape(3, -1).T.astype(np.int64)
    flat_base = base.reshape(3, -1).T
    raw = out.reshape(-1, out.shape[-1])
    p = pixel_params(raw, flat_base)
    residuals = known - flat_base
    columns = [symbol_columns(known[:, c]) for c in range(planes)]
    lengths, counts = symbol_lengths(), symbol_counts()
    mixed_lengths = None if raw.shape[1] == fam.OUTPUTS else code_lengths(fam.WEIGHT_ONE)

    def bits(p: Params, c: int, d: np.ndarray | None = None, m: np.ndarray | int = 0,
             after: np.ndarray | None = None) -> np.ndarray:
        """Code lengths in 1/LENGTH_ONE bit (exact integers: `code_lengths`) of plane c's
        subpixels (N,), or (K, N) with the levels moved by each of K offsets d (K, 1) or
        moves (K, N), or the means by moves m; with `after` (N,) the moved levels,
        clamped, move again by it (the feedback's moves of tuned levels)."""
        if p.weight is None:
            return plane_lengths(lengths, columns[c], p.ls8[:, c],
                                 p.means[:, c] + coupling_move(p.couplings, c, residuals),
                                 0 if d is None else d, m, after)
        if after is not None:
            level = p.ls8[:, c]
            d = tuning.apply(level + (0 if d is None else d), 0) + after - level
        first, second = plane_grid(p, c, residuals, d, m)
        w = p.weight[:, c]  # w x a + (64 - w) x b: a pure table's count times 64 too
        return mixed_lengths[w * counts[count_index(*first, columns[c])]
                             + (fam.WEIGHT_ONE - w) * counts[count_index(*second, columns[c])]]

    price = _prices(layout)
    offsets, saved = tuning.choose(lambda c, d: bits(p, c, d), p.ls8[:, :planes],
                                   price("offsets"))
    tune, near = Tune.of(offsets, np.zeros(3, np.int64)), None
    if planes == 3:
        tuned = pixel_params(raw, flat_base, tune)
        trial = Params(tuned.means, tuned.ls8, tuned.couplings.copy(), tuned.means_b,
                       tuned.ls8_b, tuned.weight)

        def plane_bits(k: int, offsets: np.ndarray, candidates: np.ndarray) -> np.ndarray:
            """The bits (K,) of the plane coupling k moves, offsets[k] set to each
            candidate."""
            plane, moved = (1, [0]) if k == 0 else (2, [1, 2])  # what coupling_move reads
            if tuned.weight is None:  # one compiled pass for all the candidates
                c, r = tuned.couplings, residuals  # G moves with R; B with R and G
                trial_offsets = [np.full(len(candidates), offsets[j]) for j in (1, 2)]
                if k == 0:
                    nothing = np.zeros_like(c[:, 0])  # no second coupling moves G
                    return coupled_sums(lengths, columns[1], tuned.ls8[:, 1], tuned.means[:, 1],
                                        (c[:, 0], nothing), (r[:, 0], nothing), candidates,
                                        np.zeros_like(candidates))
                trial_offsets[k - 1] = candidates
                return coupled_sums(lengths, columns[2], tuned.ls8[:, 2], tuned.means[:, 2],
                                    (c[:, 1], c[:, 2]), (r[:, 0], r[:, 1]), *trial_offsets)
            trials = []
            for d in candidates:
                for j in moved:
                    trial.couplings[:, j] = tuning.couple(tuned.couplings[:, j],
                                                          d if j == k else offsets[j])
                trials.append(float(bits(trial, plane).sum()))
            return np.array(trials)

        couplings, more = tuning.choose_couplings(plane_bits, price("couplings"))
        tune, saved = Tune.of(offsets, couplings), saved + more
    if method == "adaptive":  # bias gains first: surprises are measured from moved means
        tuned = pixel_params(raw, flat_base, tune)
        shape, values = out.shape[:2], known[:, :planes]
        errors = Feedback.of(tuned, values, residuals, shape, np.zeros(3, np.int64)).errors

        def bias_bits(c: int, b: np.ndarray) -> np.ndarray:
            return bits(tuned, c, None, feedback.mean_moves(errors[:, c], b)).sum(axis=1)

        biases, by_means = tuning.choose_gains(bias_bits, planes, feedback.BIASES,
                                               price("biases"))
        near = Feedback.of(tuned, values, residuals, shape, biases)

        gains, by_scales = tuning.choose_gains(_scale_gain_cost(bits, tuned, near), planes,
                                               price=price("gains"))
        tune = Tune.of(tune.offsets, tune.couplings, gains, biases)
        saved += by_means + by_scales
        if not quick:
            tune, near, more = _offsets_again(tune, tuned, near, raw, flat_base, bits, planes,
                                              shape, p.ls8[:, :planes], values, residuals,
                                              layout)
            saved += more
    if saved <= header_length(tune, planes, layout):
        return None, None
    return tune, near if tune.feedback else None


def _prices(layout: str):
    """name -> the code lengths of a tuning field's values (`tuning.prices`) where the
    layout range-codes them, so the search weighs each choice's own cost; else None (a
    header's bytes cost the same whatever they hold)."""
    return tuning.prices if layout == "streamed" else lambda name: None


def _fields(tune: Tune, planes: int, method: str | None = None) -> list:
    """`tuning.fields` of one image's tuning: with its gains when it has feedback, and
    always in method "difference"."""
    gains = (tune.gains, tune.biases) if method == "difference" else tune.carried_gains
    return tuning.fields(tune.offsets, tune.couplings, gains, planes)


def header_length(tune: Tune, planes: int, layout: str, method: str | None = None) -> int:
    """What an image's tuning costs its payload, in 1/LENGTH_ONE bit: its header's bytes,
    or in the "streamed" layout its fields' code length under their priors (`method`:
    the payload's, where it is "difference")."""
    if layout == "streamed":
        return tuning.fields_length(_fields(tune, planes, method))
    return 8 * tuning.header_bytes(tune.method, planes, layout == "compact") * LENGTH_ONE


def _scale_gain_cost(bits, params: Params, near: Feedback):
    """cost(c, k) for `tuning.choose_gains`: plane c's code length (K,) for K scale gains
    k (K, 1), with `near`'s surprises and mean moves."""

    def cost(c: int, k: np.ndarray) -> np.ndarray:
        return bits(params, c, level_moves(near.sums[:, c], c, k),
                    near.means_moved[:, c]).sum(axis=1)

    return cost


def _offsets_again(tune: Tune, tuned: Params, near: Feedback, raw: np.ndarray,
                   flat_base: np.ndarray, bits, planes: int, shape: tuple, levels: np.ndarray,
                   values: np.ndarray, residuals: np.ndarray,
                   layout: str) -> tuple[Tune, Feedback, float]:
    """(tuning, its feedback, subpixels' code length saved): the scale offsets chosen again
    with the feedback's moves in place (the scale gains' level moves and the bias gains'
    mean moves), then the scale gains again, each kept only if the exact code length (the
    surprises measured anew; in the "streamed" layout with the fields' own) falls. The
    first offsets were chosen before any feedback, which moves levels on average, so they
    leave bits behind. `tuned` and `near` are the parameters and feedback of `tune`
    (neither depends on the scale gains)."""
    price = _prices(layout)

    def own(t: Tune) -> int:  # what the fields cost where they are range-coded
        return header_length(t, planes, layout) if layout == "streamed" else 0

    def total(t: Tune, tp: Params, nb: Feedback) -> float:
        """The subpixels' code length under t, its parameters tp and feedback nb."""
        return sum(float(bits(tp, c, level_moves(nb.sums[:, c], c, t.gains[c]),
                              nb.means_moved[:, c]).sum()) for c in range(planes))

    untuned = pixel_params(raw, flat_base)
    coupled = replace(untuned, couplings=tuning.couple(untuned.couplings, tune.couplings))

    def moved_bits(c: int, d: np.ndarray) -> np.ndarray:
        """Code lengths (K, N) of plane c for K offsets d (K, 1), with the level moves of
        `near`'s surprises (a second component's level is clamped once, not twice: this
        only proposes)."""
        return bits(coupled, c, d, near.means_moved[:, c],
                    level_moves(near.sums[:, c], c, tune.gains[c]))

    best, best_near = tune, near
    best_bits = before = total(tune, tuned, near)
    offsets, _ = tuning.choose(moved_bits, levels, price("offsets"))
    trial = Tune.of(offsets, tune.couplings, tune.gains, tune.biases)
    tp = pixel_params(raw, flat_base, trial)
    trial_near = Feedback.of(tp, values, residuals, shape, trial.biases)
    trial_bits = total(trial, tp, trial_near)
    if trial_bits + own(trial) < best_bits + own(best):
        best, best_near, best_bits = trial, trial_near, trial_bits
        gains, _ = tuning.choose_gains(_scale_gain_cost(bits, tp, trial_near), planes,
                                       price=price("gains"))
        trial = Tune.of(offsets, tune.couplings, gains, tune.biases)
        trial_bits = total(trial, tp, trial_near)
        if trial_bits + own(trial) < best_bits + own(best):
            best, best_near, best_bits = trial, trial_near, trial_bits
    return best, best_near, before - best_bits


def tuned_coder(tune: Tune | None, planes: int, layout: str, method: str | None = None):
    """A range encoder ready for an image's pixels: in the "streamed" layout its tuning's
    fields are coded first, under their priors (`method`: the payload's)."""
    coder = entropy.encoder()
    if layout == "streamed" and tune is not None:
        for name, rows, symbols in _fields(tune, planes, method):
            entropy.encode(coder, symbols, tuning.prior_tables(name)[rows])
    return coder


def payload_of(coder, tune: Tune | None, planes: int, layout: str) -> bytes:
    """An image's payload once `tuned_coder`'s coder has its pixels: the code, behind the
    tuning's header in the layouts that have one."""
    code = entropy.finish(coder, trimmed=layout == "streamed")
    if tune is None or layout == "streamed":
        return code
    return tuning.pack(tune.offsets, tune.couplings, tune.carried_gains,
                       planes == 1 and layout == "compact") + code


@dataclass(frozen=True)
class Plan:
    """How the encoder codes one image: the raw outputs (H, W, outputs) and base (3, H, W)
    it codes with, its tuning and feedback (`tuning_of`) and its payload method."""

    out: np.ndarray
    base: np.ndarray
    tune: Tune | None
    near: Feedback | None
    method: str


def plan_of(out: np.ndarray, rgb: np.ndarray, planes: int, method: str = "adaptive",
            layout: str = "streamed", quick: bool = False, base: str = "either",
            model_base: str = "median") -> Plan:
    """The encoder's plan for an image: with method "adaptive", three planes and a
    one-component model of the median base, the colour-difference base without the
    network's G and B terms (method "difference", `family.difference_base`) when `base`
    is "difference", or is "either" and that base codes G and B shorter untuned
    (`_difference_saves`); else the model's own base (`model_base`: its card's). Then
    the tuning that shortens the payload most."""
    plain = fam.model_base(rgb, model_base)
    if (base != "plain" and method == "adaptive" and planes == 3 and layout == "streamed"
            and out.shape[-1] == fam.OUTPUTS and model_base == "median"):
        if base == "difference" or _difference_saves(out, rgb, plain) > 0:
            other, other_base = fam.ignoring_colour(out), fam.difference_base(rgb)
            tune, near = tuning_of(other, rgb, other_base, planes, method, layout, quick)
            zero = np.zeros(3, np.int64)
            tune = Tune.of(np.zeros((3, len(tuning.BANDS) + 1), np.int64), zero, zero,
                           zero) if tune is None else tune
            return Plan(other, other_base, tune, near, "difference")
    tune, near = tuning_of(out, rgb, plain, planes, method, layout, quick)
    return Plan(out, plain, tune, near, "model" if tune is None else tune.method)


def _difference_saves(out: np.ndarray, rgb: np.ndarray, plain: np.ndarray) -> int:
    """How much shorter (in 1/LENGTH_ONE bit) G and B code untuned on the
    colour-difference base than on the plain base (`tuningkernel.colour_costs`): how the
    encoder weighs the two. (Measured on 240 retina tiles and 96 photo thumbnails:
    weighing them after each base's best scale offsets chose no better, at three times
    the cost.)"""
    from rowcast.tuningkernel import colour_costs  # numba: only when coding

    on_plain, on_difference = colour_costs(symbol_lengths(), out.reshape(-1, out.shape[-1]),
                                           rgb.reshape(3, -1).T, plain.reshape(3, -1).T,
                                           rgb.shape[-1])
    return on_plain - on_difference


def _encode_one(out: np.ndarray, rgb: np.ndarray, planes: int, method: str,
                layout: str, quick: bool, base: str, model_base: str) -> Coded:
    plan = plan_of(out, rgb, planes, method, layout, quick, base, model_base)
    out, base, chosen, near = plan.out, plan.base, plan.tune, plan.near
    coder = tuned_coder(chosen, planes, layout, plan.method)
    if out.shape[-1] == fam.OUTPUTS:  # one component: the coder's shared models of the rows
        from rowcast import tablecdfs  # numba: only when coding

        symbols, rows, _, _ = image_rows(out, rgb, base, planes, chosen, near)
        tablecdfs.encode_rows(coder, symbols, rows)
        counts = symbol_counts()[count_index(rows % MEANS + fam.MU_LO,
                                             rows // MEANS + fam.LS_LO, symbol_columns(symbols))]
        bits = float(-np.log2(counts / TABLE_TOTAL).sum())
    else:
        bits = 0.0
        rows_per_chunk = max(1, CHUNK // (out.shape[1] * planes))
        for y in range(0, out.shape[0], rows_per_chunk):
            band = slice(y, y + rows_per_chunk)
            pixels = slice(y * out.shape[1], (y + rows_per_chunk) * out.shape[1])
            symbols, tables = image_tables(out[band], rgb[:, band], base[:, band], planes,
                                           chosen, None if near is None else near.band(pixels))
            entropy.encode(coder, symbols, tables)
            bits += entropy.cross_entropy_bits(symbols, tables)
    payload = payload_of(coder, chosen, planes, layout)
    if chosen is None:
        return Coded(payload, bits)
    return Coded(payload, bits, plan.method,
                 header_length(chosen, planes, layout, plan.method) / LENGTH_ONE)


def decode_batch(engine: Engine, payloads: list[bytes], planes: int, height: int,
                 width: int, progress=None, trace=None, workers: int | None = None,
                 methods: Sequence[str] | str = "model", layout: str = "streamed",
                 compiled: bool = True) -> np.ndarray:
    """Decode same-sized images together; returns (B, P, H, W) uint8.

    `methods` names each payload's method ("model", "tuned" or "adaptive"), or one for
    all: an untuned image is a tuned one with zero offsets, and a tuned one an adaptive one
    with zero gains, so all kinds share a batch. `layout`: how the payloads carry their
    tuning (`LAYOUTS`).
    A large batch is shared by single-threaded processes (`workers.shares`: `workers` of
    them if given), each decoding its images together. `progress`, if given, is
    called with the number of images of a part after each of its rows; `trace`, if given,
    with (y, x, c, tables) for every subpixel (in this process), so tests can compare with
    the encoder's tables. numpy's BLAS runs single-threaded (`workers.run_split`).
    `compiled`: the compiled loop (`rowdecoder`), else the reference decoder in Python;
    tracing always runs the reference.
    """
    methods = [methods] * len(payloads) if isinstance(methods, str) else list(methods)

    def run(part: tuple[list[bytes], list[str]], report) -> np.ndarray:
        return _decode(engine, *part, planes, height, width, report, trace, layout,
                       compiled and trace is None)

    cuts = shares(len(payloads), 1 if trace is not None else workers, height * width)
    parts = [(payloads[a:b], methods[a:b]) for a, b in cuts]
    if compiled and trace is None and len(parts) > 1:
        load_compiled(engine, "decode")
    return np.concatenate(run_split(run, parts, progress))


@functools.cache
def load_compiled(engine: Engine, side: str) -> None:
    """Load (or compile) the compiled code of one side ("encode" or "decode") for an engine
    once, by coding a 1 x 1 image, so that processes forked afterwards inherit it instead
    of each loading it again."""
    if side == "encode":
        encode_batch(engine, [np.zeros((3, 1, 1), np.uint8)], workers=1)
    else:
        _decode(engine, [b""], ["model"], 3, 1, 1, lambda n: None, None, "streamed", True)


@functools.cache
def _models() -> entropy.Models:
    """The coder's models of all tables, built as decoding meets them (at most 59k, 66 MB)."""
    return entropy.Models(all_tables())


def open_payloads(payloads: list[bytes], methods: list[str], planes: int, layout: str,
                  opener=entropy.decoder) -> tuple:
    """(a range decoder over each payload's code, the batch's Tune or None), the tuning
    read from each payload's header, or in the "streamed" layout decoded from its code.
    `opener(payload, trimmed=...)` makes a decoder: constriction's, or the compiled
    loop's `rowdecoder.Stream`."""
    streamed = layout == "streamed"
    if all(m == "model" for m in methods):
        return [opener(p, trimmed=streamed) for p in payloads], None
    offsets = np.zeros((len(payloads), fam.CHANNELS, len(tuning.BANDS) + 1), np.int64)
    couplings = np.zeros((len(payloads), 3), np.int64)
    gains = np.zeros((len(payloads), 3), np.int64)
    biases = np.zeros((len(payloads), 3), np.int64)
    decoders = []
    for i, (payload, method) in enumerate(zip(payloads, methods, strict=True)):
        if method not in METHODS or (method == "difference" and not streamed):
            raise ValueError(f"no decoder for method {method!r} in layout {layout!r}")
        if method != "model" and not streamed:
            size = tuning.header_bytes(method, planes, layout == "compact")
            if len(payload) < size:
                raise entropy.PayloadError("payload is shorter than its tuning header")
            try:
                offsets[i], couplings[i], gains[i], biases[i] = tuning.unpack(payload[:size])
            except ValueError as exc:
                raise entropy.PayloadError(str(exc)) from None
            payload = payload[size:]
        decoders.append(opener(payload, trimmed=streamed))
        if method != "model" and streamed:
            symbols = {name: decoders[-1].decode(entropy.FAMILY, tuning.prior_tables(name)[rows])
                       for name, rows in tuning.field_rows(planes, method in FEEDBACK)}
            offsets[i], couplings[i], gains[i], biases[i] = tuning.from_fields(symbols, planes)
    difference = np.array([m == "difference" for m in methods])
    return decoders, Tune.of(offsets, couplings, gains, biases,
                             difference if planes == 3 and difference.any() else None)


def _decode(engine: Engine, payloads: list[bytes], methods: list[str], planes: int,
            height: int, width: int, progress, trace, layout: str,
            compiled: bool) -> np.ndarray:
    if "difference" in methods and engine.out.weight.shape[0] != fam.OUTPUTS:
        raise entropy.PayloadError("method 'difference' needs a one-component model")
    kernel = None
    if compiled:
        from rowcast import rowdecoder  # numba: loaded only when pixels are decoded

        kernel = rowdecoder.kernel_of(engine)
    try:
        if kernel is not None:
            streams, tune = open_payloads(payloads, methods, planes, layout, rowdecoder.Stream)
            return rowdecoder.decode_rows(engine, kernel, streams, tune, planes, height, width,
                                          progress)
        return _decode_rows(engine, *open_payloads(payloads, methods, planes, layout), planes,
                            height, width, progress, trace)
    except AssertionError:  # constriction's word for data its models cannot have produced
        raise entropy.PayloadError("a payload is not what its model codes (damaged data, "
                                   "or another model)") from None


SUMS = 4 * feedback.Q_MAX + 1  # sums of up to four surprises


@functools.cache
def _moved_level_rows() -> np.ndarray:
    """The decoder's surprise feedback in one lookup: `table_rows(0, level)` of level l
    moved for gain k, plane c and sum S, flat, at (k * 3 + c) * LEVELS * SUMS +
    (l - LS_LO) * SUMS + S."""
    levels = np.arange(fam.LS_LO, fam.LS_HI + 1)[:, None]
    out = np.empty((len(feedback.GAINS), fam.CHANNELS, len(levels), SUMS), np.int64)
    for c in range(fam.CHANNELS):
        f = feedback.feedback_table(c + 2)  # sums past a plane's range never occur
        f = np.pad(f, (0, SUMS - len(f)), mode="edge")
        for i, k in enumerate(feedback.GAINS):
            out[i, c] = table_rows(0, feedback.move(levels, f, k))
    return out.reshape(-1).astype(np.int32)  # small, to stay in cache


@functools.cache
def _signed_surprises() -> np.ndarray:
    """`feedback.surprise_table` over signed distances 4v - mu4, flat, at
    (l - LS_LO) * (2 DISTANCES - 1) + DISTANCES - 1 + 4v - mu4: the decoder's one lookup."""
    q = feedback.surprise_table()
    return np.concatenate([q[:, :0:-1], q], axis=1).reshape(-1).astype(np.int8)


def _decode_rows(engine: Engine, decoders: list, tune: Tune | None, planes: int,
                 height: int, width: int, progress, trace) -> np.ndarray:
    batch = len(decoders)
    img = np.zeros((batch, 3, height, width), np.uint8)
    state = engine.start(batch, width)
    residuals = np.zeros((batch, 3), np.int64)
    misses = np.zeros((batch, 3), np.int64)  # sum of |residual| over the rows so far
    models = _models()
    decode = type(decoders[0]).decode
    tables = all_tables()
    # Each image's tuned levels, looked up per pixel by `tune.origin + level` as the parts
    # of table indices they give: the table row's level part, or with the neighbours'
    # feedback the level parts of its moved-row and surprise lookups (`_moved_level_rows`,
    # `_signed_surprises`).
    active = tune is not None and tune.feedback
    if tune is not None and not active:
        row_map = table_rows(0, tune.tuned)
    if active:  # errors and surprises of the row above and of the current row, (W, 3, B)
        q_above = np.full((width, fam.CHANNELS, batch), feedback.NEUTRAL, np.int64)
        q_row = q_above.copy()  # planes a gray image lacks stay neutral
        e_above = np.zeros((width, fam.CHANNELS, batch), np.int64)
        e_row = e_above.copy()
        moved, signed = _moved_level_rows(), _signed_surprises()
        gains, biases = tune.gains.T, tune.biases.T  # (3, B)
        lead_map = (tune.gains * fam.CHANNELS + np.arange(3)) * LEVELS * SUMS
        level_index = tune.tuned - fam.LS_LO
        lead_map = level_index * SUMS + np.repeat(lead_map.reshape(-1), LEVELS)
        q_map = level_index * (2 * feedback.DISTANCES - 1) + feedback.DISTANCES - 1
    ignored, colour = colour_flags(engine, tune, batch, planes)  # (B, 1) each, or None
    for y in range(height):
        above = img[:, :, y - 1] if y else None
        acc_rows = engine.next_row(state, above, fam.activity_from_sums(misses, y, width))
        terms = None if above is None else base_terms(above)
        steps = None if above is None or colour is None else base_terms(channel_steps(above))
        row = img[:, :, y]
        for x in range(width):
            base = base_at(row, terms, x)
            raw = engine.pixel(acc_rows, row, x)
            if ignored is not None:
                raw = np.where(ignored, fam.ignoring_colour(raw), raw)
            if colour is not None:  # G's and B's base waits for R's and G's values
                step = colour_steps_at(row, steps, x)
            coding = base if colour is None else base.copy()  # the base the planes are coded on
            p = pixel_params(raw, base, tune, tune_levels=False)
            if tune is None:  # a table's row is its level's row + its mean
                level_rows = table_rows(0, p.ls8)
            else:
                at = tune.origin + p.ls8
                if active:  # and what the neighbours say: (3, B) each
                    near = q_above[x] + (q_row[x - 1] if x else feedback.NEUTRAL)
                    lead, q_lead = lead_map.take(at.T), q_map.take(at.T)
                    lead += near
                    shift = feedback.mean_moves(e_above[x] + e_row[x - 1] if x else e_above[x],
                                                biases)
                else:
                    level_rows = row_map.take(at)
            if p.weight is not None:
                ls8_b = p.ls8_b if tune is None else tuning.apply(p.ls8_b, tune.levels.take(at))
                level_rows_b = table_rows(0, ls8_b)
                pure = (p.weight % fam.WEIGHT_ONE == 0).any(axis=0)
            earlier = None  # the surprises of this pixel's planes so far, summed
            for c in range(planes):
                if colour is not None and c:
                    coding[:, c] = np.where(colour[:, 0], np.clip(
                        row[:, c - 1, x].astype(np.int64) + step[:, c], 0, 255), base[:, c])
                    p.means[:, c] += fam.MU_SCALE * (coding[:, c] - base[:, c])
                move = coupling_move(p.couplings, c, residuals)
                if active:
                    ahead = p.means[:, c] + move  # the mean the errors are measured from
                    mean = _on_grid(ahead + shift[c])
                    rows = moved.take(lead[c] if c == 0 else lead[c] + earlier) + mean
                else:
                    mean = _on_grid(p.means[:, c] + move)
                    rows = level_rows[:, c] + mean
                if p.weight is None:
                    if trace is not None:
                        trace(y, x, c, tables[rows])
                    found = map(models.__getitem__, rows.tolist())
                else:
                    if active:
                        sums = near[c] if c == 0 else near[c] + earlier
                        levels_b = tuning.apply(ls8_b[:, c], level_moves(sums, c, gains[c]))
                        level_rows_b[:, c] = table_rows(0, levels_b)
                    moved_b = p.means_b[:, c] + move + (shift[c] if active else 0)
                    rows_b = level_rows_b[:, c] + _on_grid(moved_b)
                    mixed = mixture_tables(rows, rows_b, p.weight[:, c])
                    if trace is not None:
                        trace(y, x, c, mixed)
                    found = _mixed_models(models, mixed, rows, rows_b, p.weight[:, c], pure[c])
                values = np.fromiter(map(decode, decoders, found), np.int64, batch)
                row[:, c, x] = values
                residuals[:, c] = values - coding[:, c]
                if active:
                    values *= 4
                    e_row[x, c] = values - ahead
                    values += q_lead[c] - mean
                    q_row[x, c] = q = signed.take(values)
                    if c + 1 < planes:
                        earlier = q if c == 0 else earlier + q
            if planes == 1:
                row[:, 1:, x] = row[:, :1, x]
            misses += np.abs(row[:, :, x] - base)  # the plain base's misses, whatever codes
        if active:
            q_above, q_row = q_row, q_above
            e_above, e_row = e_row, e_above
        progress(batch)
    return img[:, :planes]


def colour_flags(engine: Engine, tune: Tune | None, batch: int,
                 planes: int) -> tuple[np.ndarray | None, np.ndarray | None]:
    """(which images' network G and B means and couplings are left out, which images'
    G and B are coded on the colour-difference base), each (B, 1) bool or None for none:
    the images of method "difference", and every RGB image of a model of that base."""
    ignored = None if tune is None or tune.difference is None else tune.difference[:, None]
    if planes == 3 and engine.model.base == "difference":
        return ignored, np.ones((batch, 1), bool)
    return ignored, ignored


def _mixed_models(models: entropy.Models, mixed: np.ndarray, rows: np.ndarray,
                  rows_b: np.ndarray, weight: np.ndarray, pure: bool):
    """The coder's model of each two-component table: built from the mixed table, or the
    prebuilt one of a pure table where one component has all the weight."""
    if not pure:
        return map(entropy.model_of, mixed)
    which = np.where(weight == fam.WEIGHT_ONE, rows, np.where(weight == 0, rows_b, -1)).tolist()
    return [models[r] if r >= 0 else entropy.model_of(t) for r, t in zip(which, mixed,
                                                                          strict=True)]
