"""`rowcast train`: adapt a model to a folder of one's own images and say what it gained.

The images are found as `compress` finds them; gray and colour pictures (the colour planes
of those with alpha; of 16-bit ones, the 8-bit plane the predictor codes for them, read at
full depth) are written as PNG into a temporary folder laid out the way
`rowcast.train.load_pools` reads one (`train/`, and `held/` as its `--held-out` folder),
and `rowcast.train.train` runs there unchanged. A part of the files is held out of
training: every `HOLD_EVERY`th in path order, or the whole of a `--held-out` folder. The
figure reported at the end is what an archive would hold: the held-out files coded by the
integer models, the new one and the one training started from, beside PNG and JPEG XL.
"""

from __future__ import annotations

import json
import os
import re
import shlex
import tempfile
import time
from collections.abc import Callable, Sequence
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np
from PIL import Image
from rich import box
from rich.table import Table

from rowcast import api, deep, imagefile, measure
from rowcast.errors import DataError, UsageError
from rowcast.picture import Picture
from rowcast.predictor import Engine
from rowcast.quantize import IntModel, ModelError, export, load_model, model_from_bytes, to_bytes

HOLD_EVERY = 5  # every 5th usable file, in path order, is held out (at least one)
CROP = 32  # the training crop's side, smaller only when the images are
CROP_MIN = 16  # images smaller than this on a side are not trained on
FINE_TUNE_LR = 3e-4  # the learning rate when continuing from a model
ADAPT_LR = 2e-3  # compress --adapt's, training the biases alone
STOP_PATIENCE = 3  # --stop-early: held-out checks without a better figure before stopping
BASELINES = ("png", "jxl")
TRAINABLE = {"L": "L", "RGB": "RGB", "LA": "L", "RGBA": "RGB",  # format -> planes used
             "L16": "L", "RGB16": "RGB", "LA16": "L", "RGBA16": "RGB"}
Log = Callable[[str], None]


@dataclass(frozen=True)
class Job:
    """What `rowcast train` was asked: `start` is a model file or bundled name to continue
    from, None to start from scratch; `name` defaults to the output file's stem."""

    inputs: tuple[Path, ...]
    output: Path
    minutes: float = 10.0
    held_out: Path | None = None
    start: str | None = "default"
    name: str | None = None
    device: str = "cpu"
    force: bool = False
    stop_early: bool = False  # stop once the held-out files' bits stop improving
    preset: str = "standard"  # the network trained from scratch (`train.PRESETS`)

    @property
    def model_name(self) -> str:
        return self.name or self.output.stem


@dataclass(frozen=True)
class Candidate:
    """A gray or colour image file that training may use."""

    path: Path
    format: str
    width: int
    height: int


@dataclass
class Selection:
    """The files to train on, those held out, and every other file with why it is unused."""

    train: list[Candidate]
    held: list[Candidate]
    unused: list[tuple[Path, str]] = field(default_factory=list)


@dataclass
class Report:
    """The outcome: the model written, its training, the files, and the held-out figures."""

    output: Path
    name: str
    sha256: str
    start: str  # the model training started from, or the model compared with
    from_scratch: bool
    steps: int
    minutes: float
    trained: list[str]
    held: list[str]
    unused: list[tuple[str, str]]
    held_out: dict

    def reasons(self) -> list[tuple[str, int]]:
        """(reason, count) for the files not trained on, in order of first appearance."""
        counts: dict[str, int] = {}
        for _, reason in self.unused:
            counts[reason] = counts.get(reason, 0) + 1
        return list(counts.items())

    def summary(self) -> list[str | Table]:
        """The report for people: what was written, the files, and a table of the held-out
        figures."""
        lines: list[str | Table] = [
            f"{self.output}: model {self.name} ({self.sha256[:16]}), {self.steps} steps in "
            f"{self.minutes:.1f} min " + ("from scratch" if self.from_scratch
                                          else f"from {self.start}"),
            f"  trained on {_count(len(self.trained))}, held out {_count(len(self.held))}"]
        lines += [f"  not trained on {_count(n)}: {why}" for why, n in self.reasons()]
        held = self.held_out
        versus = "compared" if self.from_scratch else "start"
        table = Table(title=f"{_count(held['files'])} held out, {held['subpixels']} subpixels",
                      box=box.SIMPLE_HEAD, pad_edge=False)
        table.add_column("coded with", no_wrap=True)
        table.add_column("bytes", justify="right", no_wrap=True)
        table.add_column("bits/subpx", justify="right", no_wrap=True)
        labels = {"start": f"{self.start} ({versus})", "new": f"{self.name} (new)",
                  "png": "PNG", "jxl": "JPEG XL effort 9"}
        for key, label in labels.items():
            size, bpsp = held[key]["bytes"], held[key]["bits_per_subpixel"]
            table.add_row(label, "-" if size is None else str(size),
                          "-" if bpsp is None else f"{bpsp:.3f}")
        lines += [table, f"  new / {versus}: {held['new_to_start']:.4f}"]
        lines += [f"  {labels[k]}: {held[k]['reason']}" for k in BASELINES
                  if "reason" in held[k]]
        return lines

    def as_json(self) -> dict:
        return {"model": str(self.output), "name": self.name, "sha256": self.sha256,
                "from": None if self.from_scratch else self.start,
                "compared_with": self.start, "steps": self.steps,
                "minutes": round(self.minutes, 3), "trained": self.trained,
                "held_out_files": self.held,
                "not_trained_on": [{"reason": r, "count": c,
                                    "files": [p for p, why in self.unused if why == r]}
                                   for r, c in self.reasons()],
                "held_out": self.held_out}


def _count(n: int) -> str:
    return f"{n} file" + "s" * (n != 1)


def command_line(job: Job) -> str:
    """The `rowcast train` command that runs `job` (recorded in the model's card)."""
    words = ["rowcast", "train", *map(str, job.inputs), "-o", str(job.output),
             "--minutes", f"{job.minutes:g}"]
    if job.held_out is not None:
        words += ["--held-out", str(job.held_out)]
    words += ["--from-scratch"] if job.start is None else ["--from", job.start]
    if job.start is None and job.preset != "standard":
        words += ["--preset", job.preset]
    if job.stop_early:
        words.append("--stop-early")
    if job.name:
        words += ["--name", job.name]
    if job.device != "cpu":
        words += ["--device", job.device]
    return shlex.join(words)


def unusable(sniffed: imagefile.Sniffed) -> str | None:
    """Why an image file is not trained on (by its header), or None when it can be."""
    if sniffed.format in TRAINABLE:
        return None
    if sniffed.format == "P":
        return "palette image (its values are indices, not intensities)"
    return "1-bit image (training takes gray and colour)"


def _scan(inputs: Sequence[Path]) -> tuple[list[Candidate], list[tuple[Path, str]]]:
    """The candidates under the inputs and the other files with their reasons, each input
    listed as `compress` lists it (one at a time, so that equal names in two folders are
    two files)."""
    found, unused = [], []
    for src in inputs:
        for f in api.collect_inputs([src]):
            if f.action != "image":
                unused.append((f.path, f.reason or f.action))
                continue
            sniffed = imagefile.sniff(f.path)
            why = unusable(sniffed)
            if why is None:
                found.append(Candidate(f.path, sniffed.format, sniffed.width, sniffed.height))
            else:
                unused.append((f.path, why))
    return found, unused


def split(paths: Sequence[Path]) -> tuple[list[Path], list[Path]]:
    """(train, held out) of files: sorted by path, every `HOLD_EVERY`th file is held out,
    the last one when there are fewer; the same files give the same split."""
    ordered = sorted(set(paths), key=lambda p: p.as_posix())
    if len(ordered) < 2:
        raise UsageError("at least 2 images are needed to hold one out (or give --held-out "
                         "DIR)")
    held_at = set(range(HOLD_EVERY - 1, len(ordered), HOLD_EVERY)) or {len(ordered) - 1}
    return ([p for i, p in enumerate(ordered) if i not in held_at],
            [p for i, p in enumerate(ordered) if i in held_at])


def select(inputs: Sequence[Path], held_out: Path | None = None) -> Selection:
    """Which files are trained on and which held out; every other file with its reason."""
    found, unused = _scan(inputs)
    where = ", ".join(map(str, inputs))
    if not found:
        raise UsageError(f"{where}: no gray or colour images to train on")
    if held_out is None and len(found) == 1:
        raise UsageError(f"{where}: only one gray or colour image ({found[0].path}); "
                         "at least 2 are needed to hold one out, or give --held-out DIR")
    if held_out is None:
        train_paths, held_paths = split([c.path for c in found])
        by_path = {c.path: c for c in found}
        train = [by_path[p] for p in train_paths]
        held = [by_path[p] for p in held_paths]
    else:
        if not held_out.is_dir():
            raise UsageError(f"{held_out}: not a directory (--held-out)")
        held, held_unused = _scan([held_out])
        unused += [(p, f"{why} (in --held-out)") for p, why in held_unused]
        own = {c.path.resolve() for c in held}
        train = [c for c in found if c.path.resolve() not in own]
        unused += [(c.path, "in the --held-out folder: validated on, never trained on")
                   for c in found if c.path.resolve() in own]
    small = [c for c in train if min(c.width, c.height) < CROP_MIN]
    unused += [(c.path, f"smaller than {CROP_MIN} px on a side (too small to train on)")
               for c in small]
    train = [c for c in train if c not in small]
    if not train:
        raise UsageError(f"{where}: no gray or colour images of at least {CROP_MIN} px "
                         "to train on")
    if not held:
        raise UsageError(f"{held_out}: no gray or colour images to validate on")
    return Selection(train, held, unused)


def colour_planes(picture: Picture) -> np.ndarray:
    """A gray or colour picture's colour planes as the predictor sees them, (H, W) or
    (H, W, 3) uint8: a 16-bit picture's are the coarse planes of `deep.coarse`."""
    planes = 1 if TRAINABLE[picture.format] == "L" else 3
    values = picture.values[:planes]
    if picture.pixel_format.bits == 16:
        values = deep.coarse(values)
    hwc = values.transpose(1, 2, 0)
    return np.ascontiguousarray(hwc[..., 0] if planes == 1 else hwc)


def crop_size(train: Sequence[Candidate]) -> int:
    """The training crop: `CROP`, or the smallest side of the smallest image."""
    return max(CROP_MIN, min(CROP, *(min(c.width, c.height) for c in train)))


def write_pool(files: Sequence[Candidate], folder: Path,
               unused: list[tuple[Path, str]]) -> list[tuple[Candidate, Picture]]:
    """Each file's colour planes as a PNG in `folder` (what `rowcast.train` reads); a file
    that does not read goes to `unused` with the reason. Returns the pictures read."""
    folder.mkdir(parents=True)
    read = []
    for i, c in enumerate(files):
        try:
            picture = imagefile.read_picture(c.path)
        except imagefile.ImageError as exc:
            unused.append((c.path, str(exc).removeprefix(f"{c.path}: ")))
            continue
        Image.fromarray(colour_planes(picture)).save(folder / f"{i:06d}.png")
        read.append((c, picture))
    return read


def load_start(start: str | None) -> IntModel:
    """The model training continues from (the bundled default when from scratch, as the
    one to compare with); UsageError naming the file when it does not load."""
    try:
        return load_model(None if start is None else Path(start))
    except ModelError as exc:
        raise UsageError(f"--from: {exc}") from None


def _figure(size: int | None, subpixels: int, images: int, reason: str = "") -> dict:
    return {"bytes": size, "bits_per_subpixel": None if size is None else 8.0 * size / subpixels,
            "images": images, **({"reason": reason} if reason else {})}


def held_out_figures(start: Engine, new: Engine,
                     pictures: Sequence[tuple[str, Picture]]) -> dict:
    """The held-out files coded as an archive would code them with each model, and by PNG
    and JPEG XL effort 9: bytes and bits per subpixel of each over all the files, and the
    ratio of the new model's bytes to the starting one's. A baseline that fails or cannot
    hold a file has no total (bytes None) and says why."""
    pictures = [(name, measure.as_compressed(name, p)) for name, p in pictures]
    subpixels = sum(p.values.size for _, p in pictures)
    out: dict = {"files": len(pictures), "subpixels": subpixels}
    for label, engine in (("start", start), ("new", new)):
        total = 0
        for name, picture in pictures:
            fig = measure.measure_rowcast(engine, picture)
            if fig.status != "ok":
                raise DataError(f"{name}: the {label} model's round trip failed: {fig.reason}")
            total += fig.bytes
        out[label] = _figure(total, subpixels, len(pictures))
    for codec in BASELINES:
        figs = [(name, measure.measure_baseline(measure.BY_NAME[codec], p))
                for name, p in pictures]
        bad = [(name, f) for name, f in figs if f.status != "ok"]
        if bad:
            name, f = bad[0]
            out[codec] = _figure(None, subpixels, len(figs) - len(bad),
                                 f"{f.status} on {len(bad)} of {len(figs)} (first {name}: "
                                 f"{f.reason})")
        else:
            out[codec] = _figure(sum(f.bytes for _, f in figs), subpixels, len(figs))
    out["new_to_start"] = out["new"]["bytes"] / out["start"]["bytes"]
    return out


def _run_training(job: Job, folder: Path, crop: int, log: Log, adapting: bool = False):
    """`rowcast.train.train` on the pool in `folder`; (network, checkpoint metadata). With
    `adapting`, the biases alone at ADAPT_LR (`compress --adapt`)."""
    from rowcast import train as trainer

    sizes = (trainer.PRESETS[job.preset] if job.start is None
             else {k: v for k, v in trainer.resumed_sizes(job.start).items()
                   if k in ("hidden", "left", "depth", "width", "base")})
    cfg = trainer.Config(
        data=str(folder / "train"), out=str(folder / "run"), minutes=job.minutes,
        crop=crop, lr=(ADAPT_LR if adapting else trainer.Config.lr if job.start is None
                       else FINE_TUNE_LR),
        held_out=str(folder / "held"), threads=os.cpu_count() or 1, device=job.device,
        resume=job.start, patience=STOP_PATIENCE if job.stop_early else 0,
        biases_only=adapting, **sizes)
    trainer.train(cfg, log=log)
    return trainer.load_checkpoint(folder / "run")


def run(job: Job, log: Log = lambda line: None) -> Report:
    """Select the files, train, write the model file to `job.output` (atomically) and
    measure the held-out files; `log` receives `rowcast.train`'s lines and our own."""
    if not job.minutes > 0:
        raise UsageError(f"--minutes {job.minutes:g}: must be more than 0")
    api.check_destination(job.output, job.force)
    from rowcast.train import training_device

    training_device(job.device)
    start_model = load_start(job.start)
    chosen = select(job.inputs, job.held_out)
    with tempfile.TemporaryDirectory(prefix="rowcast-train-") as tmp:
        folder = Path(tmp)
        trained = write_pool(chosen.train, folder / "train", chosen.unused)
        held = write_pool(chosen.held, folder / "held", chosen.unused)
        if not trained or not held:
            raise DataError(f"{', '.join(map(str, job.inputs))}: no readable images to "
                            f"{'train on' if not trained else 'validate on'}")
        net, meta = _run_training(job, folder, crop_size([c for c, _ in trained]), log)
    if not net.quant:
        raise DataError(f"{job.output}: training ended before its quantisation-aware part; "
                        "give it more --minutes")
    log("measuring the held-out files with both models")
    card, tensors = export(net, job.model_name)
    new_engine = Engine(model_from_bytes(to_bytes(card, tensors), str(job.output)))
    names = [(c.path.as_posix(), p) for c, p in held]
    figures = held_out_figures(Engine(start_model), new_engine, names)
    history = meta["state"]["history"]
    summary = meta["state"]["summary"]
    before = history[0] if job.start is not None else {"steps": 0, "minutes": 0.0}
    start_label = start_model.name if job.start is None else job.start
    training = {
        "data": f"rowcast train: {len(trained)} files of {', '.join(map(str, job.inputs))} "
                "(gray and colour planes, 16-bit ones as their coarse planes), as "
                "rowcast.train reads a folder",
        "validation": f"{len(held)} held-out files "
                      + (f"in {job.held_out}" if job.held_out is not None
                         else f"(every {HOLD_EVERY}th in path order)")
                      + f": {figures['new']['bytes']} bytes coded, "
                      f"{figures['start']['bytes']} with {start_label}",
        "steps": summary["steps"], "minutes": round(summary["minutes"], 1),
        "commands": [*meta["state"]["commands"][:-1], command_line(job)],
    }
    card, tensors = export(net, job.model_name, {"training": training})
    data = to_bytes(card, tensors)
    api.check_destination(job.output, job.force)  # it may have appeared while training ran
    measure.write_atomic(job.output, data)
    return Report(job.output, job.model_name, model_from_bytes(data, "").sha256.hex(),
                  start_label, job.start is None, summary["steps"] - before["steps"],
                  summary["minutes"] - before["minutes"],
                  [c.path.as_posix() for c, _ in trained], [n for n, _ in names],
                  [(p.as_posix(), why) for p, why in chosen.unused], figures)


ADAPT_VALIDATION = 4  # pictures the adaptation run also validates on (it trains on all)


def adapt(pictures: Sequence[Picture], start: str, minutes: float, name: str,
          log: Log = lambda line: None) -> IntModel | None:
    """`start` (a model file or bundled name) fine-tuned for `minutes` on the pictures
    being compressed, as `rowcast train` trains (gray and colour planes) but its biases
    alone, or None when none can be trained on or the run ends before its
    quantisation-aware part. Training the biases alone keeps the packed model near 2 KB
    where training everything costs 30-50 KB for a little more gain (on 484 64-px tiles
    of scikit-image's retina, 2 minutes: payloads -5.7% against -7.5%, saving 5.5% of the
    archive against 4.1%). It fits these very pictures: whether it pays is for the caller
    to measure (`api.compress`)."""
    usable = [p for p in pictures if p.format in TRAINABLE and min(p.width, p.height) >= CROP_MIN]
    if not usable:
        return None
    job = Job((), Path(name), minutes, start=start)
    with tempfile.TemporaryDirectory(prefix="rowcast-adapt-") as tmp:
        folder = Path(tmp)
        for sub, chosen in (("train", usable), ("held", usable[:: -(-len(usable)
                                                                     // ADAPT_VALIDATION)])):
            (folder / sub).mkdir()
            for i, picture in enumerate(chosen):
                Image.fromarray(colour_planes(picture)).save(folder / sub / f"{i:06d}.png")
        net, meta = _run_training(job, folder, crop_size(usable), log, adapting=True)
    if not net.quant:
        return None
    summary = meta["state"]["summary"]
    training = {"data": f"compress --adapt: {len(usable)} pictures of the archive, biases alone",
                "steps": summary["steps"], "minutes": round(summary["minutes"], 2),
                "from": start}
    card, tensors = export(net, name, {"training": training})
    return model_from_bytes(to_bytes(card, tensors), f"model adapted from {start}")


@dataclass
class Progress:
    """The state a live line shows, updated from `rowcast.train`'s log lines: steps of this
    run, train and validation bits per subpixel, and the time left of the budget."""

    budget_s: float
    phase: str = "reading images"
    base: int = 0
    step: int = 0
    train_bpsp: float | None = None
    val_bpsp: float | None = None
    began: float | None = None

    def update(self, line: str, now: float | None = None) -> None:
        """Take one log line (at monotonic time `now`, by default the present)."""
        now = time.monotonic() if now is None else now
        if line.startswith(("pools:", "resuming ", "validation at the start:")):
            self.phase, self.began = "training", now  # the last before the training loop
            if m := re.match(r"resuming .* after (\d+) steps", line):
                self.base = int(m.group(1))
            if m := re.match(r"validation at the start: ([\d.]+)", line):
                self.val_bpsp = float(m.group(1))
        elif m := re.match(r"step (\d+) [\d.]+ min train ([\d.]+) bpsp$", line):
            self.step, self.train_bpsp = int(m.group(1)), float(m.group(2))
        elif re.match(r"step \d+: quantisation-aware", line):
            self.phase = "training (quantised)"
        elif line.startswith("{"):
            entry = json.loads(line)
            self.step = entry.get("steps", self.step)
            self.train_bpsp = entry.get("train_bpsp", self.train_bpsp)
            self.val_bpsp = entry.get("val_quant_bpsp", entry.get("val_bpsp", self.val_bpsp))
        else:
            self.phase = line

    def line(self, now: float) -> str:
        """One line: phase, step, bits per subpixel, time left."""
        parts = [self.phase]
        if self.began is not None:
            parts.append(f"step {max(0, self.step - self.base)}")
            if self.train_bpsp is not None:
                parts.append(f"train {self.train_bpsp:.3f} bpsp")
            if self.val_bpsp is not None:
                parts.append(f"held out {self.val_bpsp:.3f} bpsp")
            left = max(0.0, self.budget_s - (now - self.began))
            parts.append(f"{int(left // 60)}:{int(left % 60):02d} left")
        return ", ".join(parts)

    def __rich__(self) -> str:
        """What a rich `Live` display shows: the line now."""
        return self.line(time.monotonic())
