"""Train the predictor on a directory of images: float first, then quantisation-aware.

The schedule is set by wall-clock time so that a run fits a budget on a small machine:
cosine learning rate over the whole budget; at `qat_at` of it, the activation steps are
calibrated from a batch and the rest of the run trains the quantised network.
Checkpoints (safetensors + JSON: loading them runs no code) are written every few
minutes and at the end.
"""

from __future__ import annotations

import json
import math
import time
from collections.abc import Sequence
from dataclasses import asdict, dataclass, replace
from pathlib import Path

import numpy as np
import torch
from PIL import Image
from safetensors.torch import load_file, save_file

from rowcast import deep, imagefile
from rowcast import family as fam
from rowcast.errors import DataError, RowcastError, UsageError
from rowcast.network import (
    Predictor,
    QConv,
    log2_likelihood,
    parameters_from_output,
)
from rowcast.pixelformats import BY_NAME

PHOTO_SCALES = (2, 3, 4, 6, 8, 12, 16)
THUMBNAIL = 256  # images this small on their short side are trained on at their own size
CUTOUT_SCALES = (1, 2, 3)
VALIDATION = ("volna.png", "animals-mammals-cats-lion-2.png", "food-fruit-kiwi.png",
              "plants-lavender.png", "vehicles-garbagetruck.png", "animals-birds-pelican.png",
              "seasonal-christmas-Mince_Pie.png", "household-tools-spade.png",
              "plants-trees-holm_oak.png")
IMAGE_SUFFIXES = {".png", ".jpg", ".jpeg", ".bmp", ".tif", ".tiff", ".webp"}


@dataclass
class Config:
    """Everything a training run depends on; written beside each checkpoint."""

    data: str
    out: str
    minutes: float = 60.0
    batch: int = 24
    crop: int = 32
    lr: float = 2e-3
    qat_at: float = 0.35
    gray_fraction: float = 0.15
    cutout_fraction: float = 0.5
    dark_fraction: float = 0.15
    sensor_fraction: float = 0.0  # of the crops not under-exposed (`sensor_frame`)
    validation: tuple[str, ...] = VALIDATION
    held_out: str | None = None  # a folder of the user's images to validate on instead
    width: int = 48
    hidden: int = 64
    depth: int = 4
    left: int = 3
    activity: bool = False
    components: int = 1
    base: str = "median"  # what the network's means correct (`family.MODEL_BASES`)
    seed: int = 0
    threads: int = 2
    device: str = "cpu"  # where training runs: "cpu", or a torch device such as "cuda"
    resume: str | None = None  # a run, model file or bundled model name to continue from
    patience: int = 0  # with validation: stop after this many checks without a better
    # quantised figure and keep the best (0: train for the whole budget)
    narrow: bool = False  # resuming: cut the head down to `hidden` units (`narrow`)
    biases_only: bool = False  # train the layers' biases alone; weights and steps stay, so
    # the model differs from its start in a few hundred numbers (`compress --adapt`)


# Named architectures for a network trained from scratch (`Config` fields). "standard" is
# the bundled default's; "fast" halves its head (about 98k multiply-adds a pixel instead
# of 158k); "small" is a quick network for experiments.
PRESETS = {
    "standard": {"width": 48, "hidden": 256, "depth": 6, "left": 6, "activity": True},
    "fast": {"width": 48, "hidden": 128, "depth": 6, "left": 6, "activity": True},
    "small": {"width": 48, "hidden": 64, "depth": 4, "left": 3, "activity": False},
}
CHECKS = 10  # validation checks in a run that may stop early (at least every 5 minutes)
RANGE_WEIGHT = 0.1  # of the parameters' `excess` in the loss: without it a network trained from
# scratch on raw colour-filter-array frames sat at 8.65 bits per subpixel for good; with it
# 5.46 after 80 steps (small preset)


def command(cfg: Config) -> str:
    """The command line that runs `cfg`."""
    extra = f" --resume {cfg.resume}" if cfg.resume else ""
    extra += f" --lr {cfg.lr:g}" * bool(cfg.resume or cfg.lr != Config.lr)
    extra += f" --batch {cfg.batch}" * (cfg.batch != Config.batch)
    extra += f" --seed {cfg.seed}" * (cfg.seed != Config.seed)
    extra += f" --hidden {cfg.hidden} --left {cfg.left}" + " --activity" * cfg.activity
    extra += f" --components {cfg.components}" * (cfg.components > 1)
    extra += f" --base {cfg.base}" * (cfg.base != Config.base)
    extra += f" --depth {cfg.depth}" * (cfg.depth != Config.depth)
    extra += f" --width {cfg.width}" * (cfg.width != Config.width)
    extra += f" --device {cfg.device}" * (cfg.device != Config.device)
    extra += f" --sensor {cfg.sensor_fraction:g}" * (cfg.sensor_fraction > 0)
    extra += f" --held-out {cfg.held_out}" * (cfg.held_out is not None)
    extra += f" --patience {cfg.patience}" * (cfg.patience > 0)
    extra += " --biases-only" * cfg.biases_only
    return f"python -m rowcast.train {cfg.data} {cfg.out} --minutes {cfg.minutes:g}{extra}"


def _composite(rgba: np.ndarray, background: np.ndarray) -> np.ndarray:
    """An RGBA cut-out over an RGB or gray background of the same size, in integers."""
    rgb = rgba[..., :3].astype(np.int32)
    a = rgba[..., 3:4].astype(np.int32)
    under = background.astype(np.int32).reshape(*background.shape[:2], -1)
    return ((rgb * a + under * (255 - a) + 127) // 255).astype(np.uint8)


def _pyramid(img: Image.Image, scales: tuple[int, ...], crop: int) -> list[np.ndarray]:
    """Box-filtered reductions of an image, as thumbnails of it would be made; an image
    that is a thumbnail already (THUMBNAIL px or less on its short side, as a user's own
    camera images may be) is also used as it is."""
    if min(img.size) <= THUMBNAIL and 1 not in scales:
        scales = (1, *scales)
    out = []
    for s in scales:
        small = img.reduce(s) if s > 1 else img
        if min(small.size) >= crop:
            out.append(np.asarray(small))
    return out


def load_pools(cfg: Config) -> tuple[list[np.ndarray], list[np.ndarray], list[np.ndarray]]:
    """(photo pyramids RGB or gray, cut-out pyramids RGBA, validation images RGBA or gray)
    from a directory, each read as `read_image` reads it.

    A sub-folder named `cutouts` holds RGBA cut-outs; everything else is a photograph.
    The images in the folder `cfg.held_out` are the validation images if it is given (and
    never trained on, even inside the data folder); otherwise those whose file names are in
    `cfg.validation`.
    """
    photos, cutouts, held = [], [], []
    own = None if cfg.held_out is None else Path(cfg.held_out).resolve()
    if own is not None:
        held = [read_image(path) for path in _images(own)]
        if not held:
            raise DataError(f"{cfg.held_out}: no images to validate on")
    for path in _images(Path(cfg.data)):
        if own is not None and own in path.resolve().parents:
            continue
        image = read_image(path)
        if own is None and path.name in cfg.validation:
            held.append(image)
        elif "cutouts" in path.parts and image.ndim == 3:
            cutouts += _pyramid(Image.fromarray(image), CUTOUT_SCALES, cfg.crop)
        else:
            photos += _pyramid(Image.fromarray(image if image.ndim == 2 else image[..., :3]),
                               PHOTO_SCALES, cfg.crop)
    if not photos:
        raise DataError(f"{cfg.data}: no training photographs found")
    return photos, cutouts, held


def _images(folder: Path) -> list[Path]:
    return [p for p in sorted(folder.rglob("*")) if p.suffix.lower() in IMAGE_SUFFIXES]


def read_image(path: Path) -> np.ndarray:
    """An image file as training sees it: (H, W) uint8 for gray, (H, W, 4) RGBA otherwise.
    16-bit files are read at full depth (`imagefile`) and become the 8-bit plane the
    predictor codes for them (`deep.coarse`), never values clipped at 255; a file the
    archive refuses (floating-point, CMYK, ...) is a DataError naming it and why."""
    sniffed = imagefile.sniff(path)
    if sniffed.action == "refused":
        raise DataError(f"{path}: {sniffed.reason}")
    fmt = BY_NAME.get(sniffed.format)
    if fmt is not None and fmt.bits == 16:
        colour = list(fmt.groups[0])
        planes = deep.coarse(imagefile.read_picture(path).values[colour])
        if len(colour) == 1:
            return planes[0]
        return np.dstack([*planes, np.full(planes.shape[1:], 255, np.uint8)])
    with Image.open(path) as im:
        return np.asarray(im.convert("L" if im.mode in ("L", "LA", "1") else "RGBA"))


def _random_crop(rng: np.random.Generator, img: np.ndarray, c: int) -> np.ndarray:
    y = rng.integers(img.shape[0] - c + 1)
    x = rng.integers(img.shape[1] - c + 1)
    return img[y : y + c, x : x + c]


def _cutout_crop(rng: np.random.Generator, img: np.ndarray, c: int, photos) -> np.ndarray:
    """A crop that is mostly object (the most opaque of a few tries) over a photo crop."""
    tries = [_random_crop(rng, img, c) for _ in range(6)]
    best = max(tries, key=lambda t: int(t[..., 3].sum()))
    return _composite(best, _random_crop(rng, photos[rng.integers(len(photos))], c))


def sensor_frame(rng: np.random.Generator, crop: np.ndarray) -> np.ndarray:
    """The scene as a faint sensor frame: a small gain, a black level per channel, read and
    shot noise, rounded and clipped; what telescopes, microscopes and night cameras give."""
    signal = crop * rng.uniform(0.03, 0.5)
    black = rng.uniform(0.0, 24.0) + rng.uniform(-3.0, 3.0, crop.shape[-1])
    variance = rng.uniform(0.1, 4.0) + signal * rng.uniform(0.0, 0.5)
    noisy = signal + black + rng.normal(size=crop.shape) * np.sqrt(variance)
    return np.clip(np.floor(noisy + 0.5), 0, 255).astype(np.uint8)


def augment(rng: np.random.Generator, crop: np.ndarray, cfg: Config) -> np.ndarray:
    """One of the 8 flips/rotations of the square, and sometimes an under-exposure
    (every value scaled by one factor and rounded), as dim scenes give, or a faint
    noisy sensor frame (`sensor_frame`)."""
    if rng.random() < 0.5:
        crop = crop[:, ::-1]
    if rng.random() < 0.5:
        crop = crop[::-1]
    if rng.random() < 0.5:
        crop = crop.transpose(1, 0, 2)
    if rng.random() < cfg.dark_fraction:
        gain = rng.uniform(0.2, 0.9)
        crop = np.floor(crop * gain + 0.5).astype(np.uint8)
    elif rng.random() < cfg.sensor_fraction:
        crop = sensor_frame(rng, crop)
    return crop


def sample_batch(rng: np.random.Generator, cfg: Config, photos, cutouts) -> tuple:
    """Random crops (B,3,c,c) and a mask (B,3) that is 0 on channels a gray crop lacks:
    crops of gray images, and a `gray_fraction` of the colour ones turned gray."""
    xs, masks = [], []
    for _ in range(cfg.batch):
        if cutouts and rng.random() < cfg.cutout_fraction:
            crop = _cutout_crop(rng, cutouts[rng.integers(len(cutouts))], cfg.crop, photos)
        else:
            crop = _random_crop(rng, photos[rng.integers(len(photos))], cfg.crop)
        gray = crop.ndim == 2
        crop = augment(rng, np.repeat(crop[..., None], 3, axis=2) if gray else crop, cfg)
        if gray or rng.random() < cfg.gray_fraction:
            crop = np.repeat((crop[..., 0] if gray else gray_of(crop))[..., None], 3, axis=2)
            masks.append([1.0, 0.0, 0.0])
        else:
            masks.append([1.0, 1.0, 1.0])
        xs.append(np.ascontiguousarray(crop.transpose(2, 0, 1)))
    return torch.from_numpy(np.stack(xs)).float(), torch.tensor(masks)


def gray_of(rgb: np.ndarray) -> np.ndarray:
    """ITU-R 601 luma in integers, as Pillow's convert('L') computes it."""
    r, g, b = (rgb[..., i].astype(np.int32) for i in range(3))
    return ((r * 19595 + g * 38470 + b * 7471 + 0x8000) >> 16).astype(np.uint8)


def own_tile_size(held: list[np.ndarray]) -> int:
    """The tile side for a user's validation images: 64 px, or their smallest side."""
    return min(64, *(min(a.shape[:2]) for a in held))


@dataclass(frozen=True)
class Tiles:
    """Validation tiles (N, 3, S, S), gray ones repeated to three channels, and the mask
    (N, 3) of the channels coded (0 on the two a gray tile lacks)."""

    x: torch.Tensor
    mask: torch.Tensor

    def __len__(self) -> int:
        return len(self.x)


def as_tiles(tiles: Sequence[np.ndarray]) -> Tiles:
    """`Tiles` of (S, S) gray or (S, S, 3+) colour arrays."""
    rgb = [np.repeat(t[..., None], 3, axis=2) if t.ndim == 2 else t[..., :3] for t in tiles]
    masks = [[1.0, 0.0, 0.0] if t.ndim == 2 else [1.0, 1.0, 1.0] for t in tiles]
    return Tiles(torch.from_numpy(np.stack([t.transpose(2, 0, 1) for t in rgb])).float(),
                 torch.tensor(masks))


def own_validation_set(held: list[np.ndarray]) -> Tiles:
    """Every tile of `own_tile_size` on a grid of a user's validation images, as they are
    (thumbnails are coded at their own size, so they are not reduced)."""
    size = own_tile_size(held)
    return as_tiles([a[y : y + size, x : x + size] for a in held
                     for y in range(0, a.shape[0] - size + 1, size)
                     for x in range(0, a.shape[1] - size + 1, size)])


def validation_tiles(cfg: Config, held: list[np.ndarray]) -> Tiles | None:
    """The run's validation tiles: a user's folder's or the corpus's; None without any."""
    if not held:
        return None
    return own_validation_set(held) if cfg.held_out is not None else validation_set(held)


def validation_set(held: list[np.ndarray], size: int = 64) -> Tiles:
    """Fixed 64-px tiles of the held-out images: for each, at reductions 1, 2, 4, 8 and 16,
    the most opaque tiles on a grid (a photograph is opaque everywhere)."""
    tiles = []
    for arr in held:
        img = Image.fromarray(arr)
        for s in (1, 2, 4, 8, 16):
            small = np.asarray(img.reduce(s)) if s > 1 else arr
            h, w = small.shape[:2]
            grid = [small[y : y + size, x : x + size] for y in range(0, h - size + 1, size)
                    for x in range(0, w - size + 1, size)]
            grid = [t for t in grid if t.ndim == 2 or t[..., 3].min() == 255]
            step = max(1, len(grid) // 4)
            tiles += grid[::step][:4]
    return as_tiles(tiles)


def bits_per_subpixel(model: Predictor, x: torch.Tensor, mask: torch.Tensor | None = None):
    """Mean cross-entropy in bits per coded subpixel (a tensor, differentiable)."""
    return mean_bits(parameters_from_output(model(x), x, model.quant, model.base), x, mask)


def mean_bits(params: dict, x: torch.Tensor, mask: torch.Tensor | None = None) -> torch.Tensor:
    """`bits_per_subpixel` from the logistic parameters of `parameters_from_output`."""
    bits = -log2_likelihood(params, x)
    if mask is None:
        return bits.mean()
    m = mask.view(*mask.shape, 1, 1).expand_as(bits)
    return (bits * m).sum() / m.sum()


@torch.no_grad()
def evaluate(model: Predictor, tiles: Tiles, quant: bool) -> float:
    """Validation bits per coded subpixel in float or quantised mode."""
    saved, model.quant = model.quant, quant
    device = model.out.weight.device
    total = 0.0
    for i in range(0, len(tiles), 16):
        mask = tiles.mask[i : i + 16]
        total += bits_per_subpixel(model, tiles.x[i : i + 16].to(device),
                                   mask.to(device)).item() * mask.sum().item()
    model.quant = saved
    return total / tiles.mask.sum().item()


@torch.no_grad()
def calibrate(model: Predictor, x: torch.Tensor) -> None:
    """Set each activation step so that the 99.95th percentile maps to 255."""
    seen: dict[QConv, torch.Tensor] = {}
    hooks = [layer.register_forward_hook(lambda m, i, o: seen.__setitem__(m, o))
             for layer in model.layers() if layer.relu]
    model.quant = False
    model(x)
    for h in hooks:
        h.remove()
    for layer, out in seen.items():
        hi = torch.quantile(out.flatten()[:200_000], 0.9995).clamp_min(1e-3)
        layer.log_step.add_(torch.log(hi / 255.0))


@torch.no_grad()
def grow(model: Predictor, hidden: int, left: int, activity: bool,
         components: int = 1, depth: int | None = None, width: int | None = None) -> Predictor:
    """A copy of `model` with a wider head, a longer left window, the activity input, a
    second component, a deeper or a wider row stack, so that training can continue from a
    finished run. It computes the same function, float or quantised (the old units'
    weights on new inputs start at zero, new units start at random; a new row layer starts
    as the identity, with the step of the layer before it), except that a new second
    component starts as a copy of the first at e times its scale with 3/64 of the weight:
    a heavier tail, which already helps."""
    depth = model.depth if depth is None else depth
    width = model.width if width is None else width
    if (hidden, left, activity, components, depth, width) == (
            model.hidden, model.left, model.activity, model.components, model.depth,
            model.width):
        return model
    if model.activity and model.left != left:
        raise UsageError("cannot lengthen the left window of a model with the activity input")
    if depth < model.depth or width < model.width:
        raise UsageError("cannot make the row stack shallower or narrower")
    big = Predictor(width, hidden, depth, left, activity, components, model.base)
    big.quant = model.quant
    for old, new in zip(model.rows, big.rows[: model.depth], strict=True):
        _copy_units(old, new, np.arange(old.weight.shape[1]))
    for new in big.rows[model.depth :]:  # out = in: the current row's middle tap, weight 1
        new.weight.zero_()
        new.bias.zero_()
        new.weight[:, :, new.kh - 1, new.kw // 2] = torch.eye(width)
        new.log_step.copy_(model.rows[-1].log_step)
    # head 1's inputs: row-stack features, then the left window, then the activity
    features, window = np.arange(model.width), width + np.arange(4 * model.left)
    extra = width + 4 * left + np.arange(3 * model.activity)
    _copy_units(model.head1, big.head1, np.concatenate([features, window, extra]))
    for old, new in ((model.head2, big.head2), (model.out, big.out)):
        _copy_units(old, new, np.arange(old.weight.shape[1]))
    if components > model.components:
        first = big.out.weight.shape[0] - fam.MIX_OUTPUTS
        for c in range(fam.CHANNELS):
            mu, ls, w = (first + 3 * c + k for k in range(3))
            big.out.weight[mu], big.out.bias[mu] = big.out.weight[2 * c], big.out.bias[2 * c]
            big.out.weight[ls] = big.out.weight[2 * c + 1]
            big.out.bias[ls] = big.out.bias[2 * c + 1] + 1.0
            big.out.weight[w], big.out.bias[w] = 0.0, 61.0 / fam.WEIGHT_ONE
    return big


def narrow(model: Predictor, hidden: int) -> Predictor:
    """A copy of `model` whose head keeps `hidden` of its units in each of its two layers:
    those whose outgoing weights are largest (by L2 norm), with their weights, biases and
    steps. Training then recovers what the dropped units did; the row stack is unchanged."""
    if hidden >= model.hidden:
        return model
    small = Predictor(model.width, hidden, model.depth, model.left, model.activity,
                      model.components, model.base)
    small.quant = model.quant
    small.load_state_dict({k: v for k, v in model.state_dict().items()
                           if not k.startswith(("head1.", "head2.", "out."))}, strict=False)
    keep1 = torch.argsort(model.head2.weight.flatten(1).norm(dim=0), descending=True)[:hidden]
    keep2 = torch.argsort(model.out.weight.flatten(1).norm(dim=0), descending=True)[:hidden]
    keep1, keep2 = keep1.sort().values, keep2.sort().values
    with torch.no_grad():
        small.head1.weight.copy_(model.head1.weight[keep1])
        small.head1.bias.copy_(model.head1.bias[keep1])
        small.head2.weight.copy_(model.head2.weight[keep2][:, keep1])
        small.head2.bias.copy_(model.head2.bias[keep2])
        small.out.weight.copy_(model.out.weight[:, keep2])
        small.out.bias.copy_(model.out.bias)
        small.head1.log_step.copy_(model.head1.log_step)
        small.head2.log_step.copy_(model.head2.log_step)
    return small


def _copy_units(old: QConv, new: QConv, columns: np.ndarray) -> None:
    """Put old's units into the first units of new, reading old input i at new input
    columns[i]; the old units ignore new's other inputs."""
    cout = old.weight.shape[0]
    new.weight[:cout] = 0.0
    new.weight[:cout, torch.from_numpy(columns)] = old.weight
    new.bias[:cout] = old.bias
    if old.log_step is not None:
        new.log_step.copy_(old.log_step)


def save_checkpoint(model: Predictor, cfg: Config, state: dict, out: Path) -> None:
    """Float weights in safetensors plus a JSON of config and progress (atomic)."""
    out.mkdir(parents=True, exist_ok=True)
    tmp = out / "checkpoint.safetensors.tmp"
    save_file({k: v.detach().cpu().contiguous() for k, v in model.state_dict().items()},
              str(tmp))
    tmp.replace(out / "checkpoint.safetensors")
    meta = {"config": asdict(cfg), "state": state, "quant": model.quant}
    (out / "checkpoint.json.tmp").write_text(json.dumps(meta, indent=2))
    (out / "checkpoint.json.tmp").replace(out / "checkpoint.json")


def saved_config(meta: dict) -> Config:
    """The Config a checkpoint was written with (JSON keeps tuples as lists)."""
    return Config(**{**meta["config"], "validation": tuple(meta["config"]["validation"])})


def load_checkpoint(out: Path) -> tuple[Predictor, dict]:
    """The model and metadata written by `save_checkpoint`."""
    meta = json.loads((out / "checkpoint.json").read_text())
    c = meta["config"]
    model = Predictor(c["width"], c["hidden"], c["depth"], c.get("left", 3),
                      c.get("activity", False), c.get("components", 1), c.get("base", "median"))
    model.load_state_dict(load_file(str(out / "checkpoint.safetensors")))
    model.quant = meta["quant"]
    return model, meta


def starting_point(resume: str) -> tuple[Predictor, list[dict], list[str]]:
    """(network, history, commands) to continue from: a run directory's checkpoint, or else
    an integer model file or bundled model name (`quantize.to_network`), so that a user can
    adapt the bundled model to their own images."""
    if (Path(resume) / "checkpoint.json").is_file():
        model, meta = load_checkpoint(Path(resume))
        history = meta["state"]["history"]
        return model, history, meta["state"].get("commands", [command(saved_config(meta))])
    from rowcast.quantize import ModelError, load_model, to_network

    try:
        ints = load_model(Path(resume))
    except ModelError as exc:
        raise UsageError(f"--resume: {exc} (neither a training run nor a model file)") from None
    done = ints.card.get("training", {})
    history = [{"steps": done.get("steps", 0), "minutes": done.get("minutes", 0.0),
                "from_model": ints.sha256.hex()[:16]}]
    return to_network(ints), history, list(done.get("commands", []))


def resumed_sizes(resume: str) -> dict:
    """The architecture of what `starting_point` continues: sizes the command line omits."""
    if (Path(resume) / "checkpoint.json").is_file():
        return asdict(saved_config(json.loads((Path(resume) / "checkpoint.json").read_text())))
    net, _, _ = starting_point(resume)
    return {"hidden": net.hidden, "left": net.left, "depth": net.depth, "width": net.width,
            "base": net.base}


def training_device(name: str) -> torch.device:
    """The torch device to train on; UsageError naming the reason if there is none such.
    Only training runs there: coding is integer arithmetic on the CPU."""
    try:
        device = torch.device(name)
    except RuntimeError:
        raise UsageError(f"--device {name}: not a torch device name") from None
    if device.type == "cuda" and not torch.cuda.is_available():
        raise UsageError(f"--device {name}: this machine has no CUDA device")
    return device


def train(cfg: Config, log=print) -> Predictor:
    """Run the schedule of the module docstring; returns the trained model."""
    device = training_device(cfg.device)
    torch.manual_seed(cfg.seed)
    torch.set_num_threads(cfg.threads)
    rng = np.random.default_rng(cfg.seed)
    photos, cutouts, held = load_pools(cfg)
    tiles = validation_tiles(cfg, held)
    log(f"pools: {len(photos)} photo reductions, {len(cutouts)} cut-out reductions, "
        f"{0 if tiles is None else len(tiles)} validation tiles")
    model = Predictor(cfg.width, cfg.hidden, cfg.depth, cfg.left, cfg.activity, cfg.components,
                      cfg.base)
    history, commands, step, before = [], [], 0, 0.0
    if cfg.resume:
        model, history, commands = starting_point(cfg.resume)
        if cfg.narrow:  # a smaller head, to decode faster
            model = narrow(model, cfg.hidden)
        model = grow(model, max(cfg.hidden, model.hidden), max(cfg.left, model.left),
                     cfg.activity or model.activity, max(cfg.components, model.components),
                     max(cfg.depth, model.depth), max(cfg.width, model.width))
        model.base = cfg.base  # a resumed network may learn to correct another base
        cfg = replace(cfg, width=model.width, hidden=model.hidden, depth=model.depth,
                      left=model.left, activity=model.activity, components=model.components)
        step, before = history[-1]["steps"], history[-1]["minutes"]
        log(f"resuming {cfg.resume} after {step} steps, {before:.1f} min")
        if tiles is not None:  # what the run must beat, on this run's validation tiles
            start_bpsp = evaluate(model, tiles, model.quant)
            log(f"validation at the start: {start_bpsp:.4f} bits per subpixel")
    commands.append(command(cfg))  # after a resume: the sizes of the model it continues
    model.to(device)
    if cfg.biases_only:
        model.requires_grad_(False)
        for layer in model.layers():
            layer.bias.requires_grad_(True)
    opt = torch.optim.Adam([p for p in model.parameters() if p.requires_grad], lr=cfg.lr)
    out = Path(cfg.out)
    budget = cfg.minutes * 60.0
    start = time.monotonic()
    last_save, ema = start, None
    early = cfg.patience > 0 and tiles is not None
    every = min(300.0, budget / CHECKS)
    last_check, best, best_state, misses = start, math.inf, None, 0
    while (elapsed := time.monotonic() - start) < budget:
        progress = elapsed / budget
        for group in opt.param_groups:
            group["lr"] = cfg.lr * (0.02 + 0.98 * 0.5 * (1 + math.cos(math.pi * progress)))
        x, mask = (t.to(device) for t in sample_batch(rng, cfg, photos, cutouts))
        if not model.quant and progress >= cfg.qat_at:
            calibrate(model, x)
            model.quant = True
            log(f"step {step}: quantisation-aware from here")
        params = parameters_from_output(model(x), x, model.quant, model.base)
        loss = mean_bits(params, x, mask)
        opt.zero_grad()
        (loss + RANGE_WEIGHT * params["excess"]).backward()
        torch.nn.utils.clip_grad_norm_(model.parameters(), 1.0)
        opt.step()
        step += 1
        ema = loss.item() if ema is None else 0.98 * ema + 0.02 * loss.item()
        if step % 100 == 0:
            log(f"step {step} {before + elapsed / 60:.1f} min train {ema:.3f} bpsp")
        if early and model.quant and time.monotonic() - last_check > every:
            last_check = time.monotonic()
            figure = evaluate(model, tiles, True)
            if figure < best:
                best, misses = figure, 0
                best_state = {k: v.detach().clone() for k, v in model.state_dict().items()}
            else:
                misses += 1
            log(f"step {step}: held out {figure:.4f} bits per subpixel (best {best:.4f})")
            if misses >= cfg.patience:
                log(f"step {step}: held-out bits stopped improving; keeping the best")
                break
        if time.monotonic() - last_save > 300:
            entry = {"steps": step, "minutes": before + elapsed / 60, "train_bpsp": ema}
            if tiles is not None:
                entry["val_bpsp"] = evaluate(model, tiles, model.quant)
            history.append(entry)
            log(json.dumps(entry))
            save_checkpoint(model, cfg, {"history": history, "commands": commands}, out)
            last_save = time.monotonic()
    if best_state is not None and evaluate(model, tiles, True) > best:
        model.load_state_dict(best_state)
    summary = {"steps": step, "minutes": before + (time.monotonic() - start) / 60,
               "train_bpsp": ema}
    if cfg.resume and tiles is not None:
        summary["val_start_bpsp"] = start_bpsp
    if tiles is not None:
        summary["val_float_bpsp"] = evaluate(model, tiles, False)
        summary["val_quant_bpsp"] = evaluate(model, tiles, True)
    history.append(summary)
    log(json.dumps(summary))
    save_checkpoint(model, cfg, {"history": history, "summary": summary, "commands": commands},
                    out)
    return model


def main(
    data: str,
    out: str,
    minutes: float = 60.0,
    batch: int = 24,
    seed: int = 0,
    lr: float = 2e-3,
    resume: str | None = None,
    threads: int = 2,
    hidden: int | None = None,
    left: int | None = None,
    activity: bool = False,
    components: int = 1,
    depth: int | None = None,
    width: int | None = None,
    sensor: float = 0.0,
    held_out: str | None = None,
    export: str | None = None,
    device: str = "cpu",
    patience: int = 0,
    biases_only: bool = False,
    base: str | None = None,
) -> None:
    """Command line: python -m rowcast.train DATA OUT --minutes M [--resume RUN|MODEL --lr LR]
    [--hidden N --left N --activity --components 2 --depth N --width N --sensor F]
    [--held-out DIR] [--export FILE] [--device cuda] [--patience N] [--biases-only]
    [--base median|difference]; sizes and base
    not given are the defaults for a new run and the run's own when resuming; larger ones
    grow it (see `grow`), a smaller --hidden cuts the head down (`narrow`); --sensor is the
    fraction of
    crops made faint noisy sensor frames; --held-out names a folder of images to validate
    on, never trained on; --export writes the finished run's integer model file, named for
    its stem; --device trains on a torch device such as a GPU (the model file it writes
    codes the same on any machine); --patience stops a run validated on --held-out after N
    checks without a better quantised figure, keeping the best; --biases-only trains the
    layers' biases alone; --base is what the network's means correct
    (`family.MODEL_BASES`). A refusal (`RowcastError`) exits with its one-line message."""
    try:
        if components not in (1, 2):
            raise UsageError("--components must be 1 or 2")
        if base is not None and base not in fam.MODEL_BASES:
            raise UsageError(f"--base must be one of {', '.join(fam.MODEL_BASES)}")
        sizes = asdict(Config(data, out)) if resume is None else resumed_sizes(resume)
        narrower = resume is not None and hidden is not None and hidden < sizes["hidden"]
        train(Config(data=data, out=out, minutes=minutes, batch=batch, seed=seed, lr=lr,
                     resume=resume, threads=threads,
                     hidden=sizes["hidden"] if hidden is None else hidden,
                     left=sizes["left"] if left is None else left, activity=activity,
                     components=components, depth=sizes["depth"] if depth is None else depth,
                     base=sizes.get("base", "median") if base is None else base,
                     width=sizes["width"] if width is None else width,
                     sensor_fraction=sensor, held_out=held_out, device=device,
                     patience=patience, narrow=narrower, biases_only=biases_only),
              log=lambda s: print(s, flush=True))
        if export:
            summary = export_checkpoint(Path(out), Path(export), Path(export).stem)
            from rowcast.quantize import load_model

            figure, start = summary.get("val_integer_bpsp"), summary.get("val_start_bpsp")
            identity = load_model(Path(export)).sha256.hex()[:16]
            print(f"{export}: model {Path(export).stem} ({identity}), {summary['steps']} "
                  f"steps in {summary['minutes']} min, validation "
                  + ("none" if figure is None else f"{figure} bits per subpixel")
                  + ("" if start is None or figure is None else f" ({start} at the start)"),
                  flush=True)
    except RowcastError as exc:
        raise SystemExit(str(exc)) from None


def integer_bits_per_subpixel(model_bytes: bytes, tiles: Tiles) -> float:
    """Cross-entropy of the exported integer model on tiles: what the coder will pay."""
    from rowcast.codec import image_tables
    from rowcast.entropy import cross_entropy_bits
    from rowcast.predictor import Engine
    from rowcast.quantize import model_from_bytes

    engine = Engine(model_from_bytes(model_bytes, "exported model"))
    base = engine.model.base
    x = tiles.x.numpy().astype(np.uint8)
    planes = tiles.mask.sum(dim=1).int().tolist()
    bits = 0.0
    for start in range(0, len(x), 8):
        group = x[start : start + 8]
        for out, rgb, p in zip(engine.parallel(group), group, planes[start : start + 8],
                               strict=True):
            bits += cross_entropy_bits(*image_tables(out, rgb, fam.model_base(rgb, base), p))
    return bits / (sum(planes) * x[0, 0].size)


def export_checkpoint(run: Path, dest: Path, name: str) -> dict:
    """Write the integer model of a finished run, with validation figures in its card (when
    the run's data held validation images)."""
    from rowcast.quantize import export, save_model, to_bytes

    net, meta = load_checkpoint(run)
    if not net.quant:
        raise DataError(f"{run}: the run has not reached quantisation-aware training")
    cfg = saved_config(meta)
    _, _, held = load_pools(cfg)
    history = meta["state"]["history"]
    summary = {
        "data": f"{cfg.data}: photographs box-reduced {PHOTO_SCALES}x (thumbnail-sized ones "
                f"also at 1x); cutouts/ at "
                f"{CUTOUT_SCALES}x for {cfg.cutout_fraction:.0%} of the crops (mostly object, "
                f"over photo crops); flips/rotations, {cfg.dark_fraction:.0%} under-exposed, "
                f"{cfg.sensor_fraction:.0%} of the rest faint noisy sensor frames, "
                f"{cfg.gray_fraction:.0%} gray",
        "validation": "none (no validation images in the data)" if not held else (
            f"{own_tile_size(held)}-px tiles of the images in {cfg.held_out}"
            if cfg.held_out is not None else f"64-px tiles of {', '.join(cfg.validation)}")
            + " (held out of training)",
        "steps": history[-1].get("steps", history[-1].get("step")),
        "minutes": round(history[-1]["minutes"], 1),
        "commands": meta["state"].get("commands", [command(cfg)]),
    }
    start = meta["state"].get("summary", {}).get("val_start_bpsp")
    if start is not None:
        summary["val_start_bpsp"] = round(start, 4)
    if held:
        tiles = validation_tiles(cfg, held)
        summary["val_float_bpsp"] = round(evaluate(net, tiles, False), 4)
        summary["val_quant_bpsp"] = round(evaluate(net, tiles, True), 4)
        card, tensors = export(net, name)
        summary["val_integer_bpsp"] = round(integer_bits_per_subpixel(to_bytes(card, tensors),
                                                                      tiles), 4)
    card, tensors = export(net, name, {"training": summary})
    save_model(dest, card, tensors)
    return summary


if __name__ == "__main__":
    import typer

    typer.run(main)
