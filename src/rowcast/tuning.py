"""Per-image tuning: the encoder measures how sure the model should have been.

A network trained on many images is calibrated on average, not on each one: on a noisy
star field it is too sure, on a smooth sky too unsure, and how strongly G follows R varies
from scene to scene. The encoder therefore picks, for each channel and each band of
log-scale levels, a small offset to every level in that band, and an offset to each of the
three channel couplings, and (method "adaptive", format 4) each channel's bias and scale
gains for the neighbours' feedback (`feedback`), that give the shortest code, and stores
them in 16 or 18 bytes ahead of the coder's words (archive formats 2 to 5) or, from format
6, range-codes them ahead of the pixels under fixed priors (`fields`, `PRIORS`). The
decoder applies them with a few lookups and additions per pixel; nothing else changes.
Measured on the bundled model: the scale offsets -2.4% bits on the corpus validation tiles
and -1.5% on the held-out thumbnails; the coupling offsets a further -1.2% and -0.85%; the
feedback gains a further -1.8% and -1.7%; choosing the scale offsets again with the gains
in place (the feedback moves levels on average) a further -0.40% and -0.43%; range-coding
them (format 6) about -0.12% more on both (offline checks, side information included).
"""

from __future__ import annotations

import functools

import numpy as np

from rowcast import family as fam
from rowcast.feedback import BIASES, GAINS
from rowcast.tables import LENGTH_ONE

BANDS = np.array([-8, 0, 4, 8, 12, 16, 24])  # band k holds levels l with BANDS[k-1] <= l < BANDS[k]
OFFSETS = np.arange(-8, 8)  # each offset is one signed 4-bit nibble
SCALE_BYTES = fam.CHANNELS * (len(BANDS) + 1) // 2  # 3 channels x 8 bands x 4 bits
COUPLING_OFFSETS = np.arange(-32, 33, 4)  # tried for each coupling, in its 64ths
# then G<-R, B<-R, B<-G as signed bytes, and a zero byte ("tuned") or the feedback gains
HEADER_BYTES = {"tuned": SCALE_BYTES + 4, "adaptive": SCALE_BYTES + 6}
# A gray image's header since archive format 5 holds only its one plane's fields: R's
# scale offsets and, for "adaptive", R's scale and bias gains.
GRAY_HEADER_BYTES = {"tuned": SCALE_BYTES // fam.CHANNELS,
                     "adaptive": SCALE_BYTES // fam.CHANNELS + 1}


def header_bytes(method: str, planes: int, compact: bool = True) -> int:
    """The bytes of tuning ahead of a payload's coder words: none for "model"; for a gray
    image (one plane) with `compact` (archive format 5 on) GRAY_HEADER_BYTES, else
    HEADER_BYTES."""
    if method not in HEADER_BYTES:
        return 0
    return (GRAY_HEADER_BYTES if planes == 1 and compact else HEADER_BYTES)[method]


# Format 6 range-codes the tuning fields ahead of the pixels (`fields`), each with a fixed
# count table from PRIORS: one plus how often the encoder chose the value on corpus
# thumbnails (scripts/tuning_priors.py). Row: the band (offsets), the coupling or the channel.
PRIOR_SHAPES = {"offsets": (len(BANDS) + 1, len(OFFSETS)), "couplings": (3, len(COUPLING_OFFSETS)),
                "gains": (fam.CHANNELS, len(GAINS)), "biases": (fam.CHANNELS, len(BIASES))}
PRIORS: dict[str, tuple[tuple[int, ...], ...]] = {
    "offsets": (
        (256, 25, 39, 47, 94, 166, 356, 578, 1630, 582, 316, 195, 106, 82, 43, 120),
        (208, 21, 32, 41, 70, 214, 570, 1290, 1292, 448, 218, 98, 44, 28, 30, 31),
        (471, 77, 82, 98, 131, 272, 648, 890, 1177, 458, 139, 86, 33, 29, 12, 32),
        (488, 63, 88, 94, 128, 270, 585, 897, 1243, 413, 199, 71, 29, 20, 15, 32),
        (346, 46, 63, 87, 153, 291, 492, 770, 1696, 392, 160, 51, 18, 20, 8, 42),
        (257, 54, 70, 116, 214, 319, 457, 537, 2077, 295, 102, 47, 27, 23, 10, 30),
        (839, 119, 119, 134, 240, 292, 349, 531, 976, 270, 160, 133, 112, 74, 69, 218),
        (419, 55, 62, 127, 155, 164, 284, 340, 2548, 187, 115, 89, 43, 41, 2, 4),
    ),
    "couplings": (
        (1, 1, 1, 1, 2, 1, 25, 118, 768, 173, 56, 19, 16, 3, 3, 1, 1),
        (1, 1, 1, 1, 1, 1, 24, 91, 783, 247, 20, 9, 5, 2, 1, 1, 1),
        (1, 1, 1, 1, 1, 2, 12, 104, 903, 113, 26, 9, 8, 3, 1, 3, 1),
    ),
    "gains": (
        (533, 720, 474, 352, 64, 73, 13, 7, 1, 2, 1, 1, 1, 1, 1, 1),
        (91, 59, 52, 123, 86, 281, 148, 191, 10, 109, 27, 6, 2, 1, 1, 1),
        (26, 50, 55, 127, 68, 268, 120, 286, 8, 123, 18, 24, 6, 7, 1, 1),
    ),
    "biases": (
        (25, 15, 195, 108, 157, 205, 220, 147, 415, 353, 161, 104, 35, 64, 23, 18),
        (77, 68, 114, 103, 63, 108, 114, 84, 241, 115, 49, 27, 9, 9, 6, 1),
        (4, 42, 64, 85, 82, 149, 148, 112, 276, 70, 84, 47, 16, 5, 3, 1),
    ),
}


def field_rows(planes: int, adaptive: bool) -> list[tuple[str, np.ndarray]]:
    """What format 6 codes ahead of an image's pixels, in order: (prior name, table rows)
    for the coded planes' scale offsets band by band, for RGB the three coupling offsets,
    and for method "adaptive" the planes' scale gains and then their bias gains."""
    out = [("offsets", np.tile(np.arange(len(BANDS) + 1), planes))]
    if planes == 3:
        out.append(("couplings", np.arange(3)))
    if adaptive:
        out += [("gains", np.arange(planes)), ("biases", np.arange(planes))]
    return out


def fields(offsets: np.ndarray, couplings: np.ndarray,
           gains: tuple[np.ndarray, np.ndarray] | None,
           planes: int) -> list[tuple[str, np.ndarray, np.ndarray]]:
    """An image's tuning as format 6 codes it: `field_rows` (adaptive when `gains`, the
    scale and bias gains as for `pack`, is given) with each field's symbol, its index among
    the values of its prior. ValueError for a coupling offset that is not one of
    COUPLING_OFFSETS."""
    steps = np.searchsorted(COUPLING_OFFSETS, couplings)
    if planes == 3 and not np.array_equal(
            COUPLING_OFFSETS[np.minimum(steps, len(COUPLING_OFFSETS) - 1)], couplings):
        raise ValueError(f"coupling offsets {couplings.tolist()} are not all of -32..32 in "
                         "steps of 4")
    symbols = {"offsets": offsets[:planes].reshape(-1) - OFFSETS[0], "couplings": steps}
    if gains is not None:
        scale, bias = gains
        symbols |= {"gains": scale[:planes] - GAINS[0], "biases": bias[:planes] - BIASES[0]}
    return [(name, rows, symbols[name]) for name, rows in field_rows(planes, gains is not None)]


def from_fields(symbols: dict[str, np.ndarray], planes: int) -> tuple[np.ndarray, ...]:
    """(scale offsets (3, 8), coupling offsets (3,), scale gains (3,), bias gains (3,))
    from the symbols of `fields` by prior name; what an image lacks is zero."""
    zero = np.zeros(fam.CHANNELS, np.int64)
    offsets = np.zeros((fam.CHANNELS, len(BANDS) + 1), np.int64)
    offsets[:planes] = symbols["offsets"].reshape(planes, -1) + OFFSETS[0]
    couplings = COUPLING_OFFSETS[symbols["couplings"]] if "couplings" in symbols else zero
    gains, biases = zero.copy(), zero.copy()
    if "gains" in symbols:
        gains[:planes] = symbols["gains"] + GAINS[0]
        biases[:planes] = symbols["biases"] + BIASES[0]
    return offsets, couplings, gains, biases


def prior_tables(name: str) -> np.ndarray:
    """A prior's count tables (rows, values), float32 as the range coder takes them."""
    return np.array(PRIORS[name], np.float32)


@functools.cache
def prices(name: str) -> np.ndarray:
    """The code length of every value of a prior's rows, round(2^16 log2(total / count)),
    in 1/LENGTH_ONE bit (int64 (rows, values)): exact integers, as the encoder's search
    counts, so every machine chooses alike."""
    counts = np.array(PRIORS[name], np.float64)
    return np.floor(np.log2(counts.sum(axis=1, keepdims=True) / counts) * LENGTH_ONE
                    + 0.5).astype(np.int64)


def fields_length(coded: list[tuple[str, np.ndarray, np.ndarray]]) -> int:
    """The code length of `fields` under their priors, in 1/LENGTH_ONE bit: what tuning
    must save to pay for itself."""
    return sum(int(prices(name)[rows, symbols].sum()) for name, rows, symbols in coded)


def band_of(levels: np.ndarray) -> np.ndarray:
    """The band (0..7) of each log-scale level."""
    return np.searchsorted(BANDS, levels, side="right")


def offset_map(offsets: np.ndarray) -> np.ndarray:
    """(..., 3, levels): the offset for every level of every channel, from offsets
    (..., 3, 8). A subpixel whose (first component's) level is l gets every level of its
    components moved by the offset of l, then clamped to the family's range."""
    return offsets[..., band_of(np.arange(fam.LS_LO, fam.LS_HI + 1))]


def apply(levels: np.ndarray, offsets: np.ndarray) -> np.ndarray:
    """Tuned levels: levels + offsets, clamped to the family's range."""
    return np.minimum(np.maximum(levels + offsets, fam.LS_LO), fam.LS_HI)


def couple(couplings: np.ndarray, offsets: np.ndarray) -> np.ndarray:
    """Tuned couplings: couplings + offsets, clamped to the family's range."""
    return np.minimum(np.maximum(couplings + offsets, -fam.COUPLE_MAX), fam.COUPLE_MAX)


def _nibbles(values: np.ndarray) -> bytes:
    """Values -8..15 as nibbles (two's complement below 0), low nibble first (an odd count
    ends in a zero one)."""
    nibbles = (np.append(values, np.zeros(len(values) % 2, np.int64)) & 0xF).astype(np.uint8)
    return (nibbles[0::2] | (nibbles[1::2] << 4)).tobytes()


def _unsigned_nibbles(raw: bytes) -> np.ndarray:
    data = np.frombuffer(raw, np.uint8)
    return np.stack([data & 0xF, data >> 4], axis=1).reshape(-1).astype(np.int64)


def _signed_nibbles(raw: bytes) -> np.ndarray:
    nibbles = _unsigned_nibbles(raw)
    return np.where(nibbles >= 8, nibbles - 16, nibbles)


def pack(offsets: np.ndarray, couplings: np.ndarray,
         gains: tuple[np.ndarray, np.ndarray] | None = None, gray: bool = False) -> bytes:
    """The header of method "tuned" (16 bytes: scale offsets (3, 8) as nibbles,
    channel-major, low nibble first; the coupling offsets (3,) as signed bytes; a zero
    byte), or with feedback gains (scale gains (3,), bias gains (3,)) of method "adaptive"
    (18 bytes: the same 15, then the scale gains 0..15 and the bias gains -8..7 as nibbles,
    R, G, B each). With `gray`, a gray image's compact header: R's scale offsets (4
    bytes), then for "adaptive" R's scale gain and bias gain (one byte, low nibble first)."""
    if gray:
        head = _nibbles(offsets[0])
        return head if gains is None else head + _nibbles(np.array([gains[0][0], gains[1][0]]))
    head = _nibbles(offsets.reshape(-1)) + couplings.astype(np.int8).tobytes()
    return head + (b"\0" if gains is None else _nibbles(np.concatenate(gains)))


def unpack(header: bytes) -> tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray]:
    """(scale offsets (3, 8), coupling offsets (3,), scale gains (3,), bias gains (3,))
    from a header that `pack` wrote, full or gray (its length tells which; what a header
    lacks is zero); ValueError if a 16-byte header's last byte is not zero."""
    if len(header) in GRAY_HEADER_BYTES.values():
        offsets, zero = np.zeros((fam.CHANNELS, len(BANDS) + 1), np.int64), np.zeros(3, np.int64)
        offsets[0] = _signed_nibbles(header[: GRAY_HEADER_BYTES["tuned"]])
        gains, biases = zero.copy(), zero.copy()
        if len(header) == GRAY_HEADER_BYTES["adaptive"]:
            gains[0], biases[0] = _unsigned_nibbles(header[-1:])[0], _signed_nibbles(header[-1:])[1]
        return offsets, zero, gains, biases
    if len(header) == HEADER_BYTES["tuned"] and header[-1]:
        raise ValueError("tuning header's reserved byte is not zero")
    offsets = _signed_nibbles(header[:SCALE_BYTES]).reshape(fam.CHANNELS, -1)
    couplings = np.frombuffer(header[SCALE_BYTES : SCALE_BYTES + 3], np.int8).astype(np.int64)
    tail = header[SCALE_BYTES + 3 :]
    if len(tail) == 1:
        return offsets, couplings, np.zeros(3, np.int64), np.zeros(3, np.int64)
    return offsets, couplings, _unsigned_nibbles(tail)[:3], _signed_nibbles(tail)[3:]


def choose(cost, levels: np.ndarray, price: np.ndarray | None = None
           ) -> tuple[np.ndarray, float]:
    """(offsets (3, 8) that minimise the code length band by band, bits saved by them).

    levels: the untuned (first component's) levels (N, P) of an image's subpixels (P
    planes); cost(c, d) gives the code lengths (K, N) of plane c's subpixels for each of K
    offsets d (K, 1). Bands are independent, so the choice is exact; a plane not coded keeps zero
    offsets, and ties go to the offset nearest zero (an empty band stays at 0). With
    `price` (bands, offsets: `prices("offsets")`) each offset's own code length counts too;
    the bits saved are the subpixels' alone.
    """
    offsets = np.zeros((fam.CHANNELS, len(BANDS) + 1), np.int64)
    order = np.argsort(np.abs(OFFSETS), kind="stable")
    candidates = OFFSETS[order]  # zero first
    saved = 0.0
    for c in range(levels.shape[1]):
        in_band = (band_of(levels[:, c])[:, None] == np.arange(len(BANDS) + 1)).astype(float)
        # (offsets, bands); float64 BLAS sums integer costs exactly (all below 2**53)
        per_band = cost(c, candidates[:, None]).astype(float) @ in_band
        best = np.argmin(per_band if price is None else per_band + price[:, order].T, axis=0)
        offsets[c] = candidates[best]
        saved += float((per_band[0] - per_band[best, np.arange(len(best))]).sum())
    return offsets, saved


def choose_couplings(cost, price: np.ndarray | None = None) -> tuple[np.ndarray, float]:
    """(coupling offsets (3,), bits saved by them): each offset in turn, G<-R, B<-R, B<-G
    and B<-R again, set to the candidate of COUPLING_OFFSETS that minimises the bits of the
    plane that coupling k moves (G for k = 0, else B), plus with `price` (3, offsets:
    `prices("couplings")`) the offset's own code length. cost(k, offsets, candidates)
    gives those bits (K,) with offsets[k] replaced by each of K candidates. G's bits depend
    on coupling 0 alone, so the best trial of each plane's last pass is its final cost."""
    offsets = np.zeros(3, np.int64)
    zero = np.zeros(1, np.int64)
    before = [float(cost(0, offsets, zero)[0]), float(cost(1, offsets, zero)[0])]
    after = list(before)
    order = np.argsort(np.abs(COUPLING_OFFSETS), kind="stable")
    candidates = COUPLING_OFFSETS[order]  # zero first: ties keep the smaller move
    for k in (0, 1, 2, 1):
        trials = np.asarray(cost(k, offsets, candidates), np.float64)
        best = int(np.argmin(trials if price is None else trials + price[k, order]))
        offsets[k], after[min(k, 1)] = candidates[best], float(trials[best])
    return offsets, before[0] + before[1] - after[0] - after[1]


def choose_gains(cost, planes: int, candidates: np.ndarray = GAINS,
                 price: np.ndarray | None = None) -> tuple[np.ndarray, float]:
    """(feedback gains (3,), bits saved by them): for each coded plane c, the gain of
    `candidates` (the scale gains, or BIASES) that minimises cost(c, gains) (bits (K,) for
    K candidate gains (K, 1)), plus with `price` (3, candidates: `prices("gains")` or
    `prices("biases")`) the gain's own code length. A plane's gain moves only its own levels
    (or means), so the choice is exact; ties go to the gain nearest zero."""
    gains = np.zeros(3, np.int64)
    order = np.argsort(np.abs(candidates), kind="stable")
    candidates = candidates[order][:, None]
    saved = 0.0
    for c in range(planes):
        bits = cost(c, candidates)
        best = int(np.argmin(bits if price is None else bits + price[c, order]))
        gains[c], saved = candidates[best, 0], saved + float(bits[0] - bits[best])
    return gains, saved
