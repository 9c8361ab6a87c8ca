"""What a user does, as Python functions: compress, decompress, verify, read_index.

Each function takes paths, validates everything before writing anything, and raises a
`RowcastError` whose message is one line naming the file and the reason.
"""

from __future__ import annotations

import os
import shutil
import tempfile
from collections import defaultdict
from collections.abc import Callable, Iterator, Sequence
from dataclasses import dataclass, field
from pathlib import Path, PurePosixPath

import numpy as np

from rowcast import archive, codec
from rowcast.archive import ArchiveError, Entry, IndexEntry, ModelIdentity
from rowcast.entropy import PayloadError
from rowcast.errors import DataError, UsageError
from rowcast.planes import PLANES, ImageError, checksum, probe, read_planes, to_image
from rowcast.predictor import Engine
from rowcast.quantize import IntModel, ModelError, bundled_model, load_model

IMAGE_SUFFIXES = {".png", ".jpg", ".jpeg", ".bmp", ".tif", ".tiff", ".webp", ".gif", ".ppm",
                  ".pgm", ".pnm", ".tga"}
DEFAULT_BATCH = 32
ENCODE_PIXELS = 1 << 22  # a group being coded holds at most about this many pixels

Progress = Callable[[int], None] | None  # called with the number of images or rows just done


@dataclass(frozen=True)
class Summary:
    """What `compress` wrote: per-entry sizes and the model's cross-entropy."""

    archive: Path
    model: ModelIdentity
    entries: list[dict] = field(default_factory=list)
    archive_bytes: int = 0

    @property
    def subpixels(self) -> int:
        return sum(e["width"] * e["height"] * PLANES[e["mode"]] for e in self.entries)

    @property
    def bits_per_subpixel(self) -> float:
        return 8.0 * self.archive_bytes / max(1, self.subpixels)


@dataclass(frozen=True)
class Check:
    """The outcome of `verify`: the entries checked and one line per problem found."""

    checked: int
    problems: list[str]

    @property
    def ok(self) -> bool:
        return not self.problems


def _model(path: Path | str | None) -> IntModel:
    try:
        return load_model(Path(path) if path is not None else None)
    except ModelError as exc:
        raise UsageError(str(exc)) from None


def identity(model: IntModel) -> ModelIdentity:
    """The archive's record of a model."""
    return ModelIdentity(model.name, model.sha256)


def collect_inputs(inputs: Sequence[Path | str]) -> list[tuple[Path, str]]:
    """(file, archive path) for every input: files as named, directories recursively.

    A file keeps its own name; files under a directory keep their path relative to it.
    Only image suffixes are taken from directories; a file named directly is always tried.
    """
    found: list[tuple[Path, str]] = []
    for raw in inputs:
        src = Path(raw)
        if src.is_dir():
            for path in sorted(src.rglob("*")):
                if path.is_file() and path.suffix.lower() in IMAGE_SUFFIXES:
                    found.append((path, path.relative_to(src).as_posix()))
        elif src.exists():
            found.append((src, src.name))
        else:
            raise UsageError(f"{src}: no such file or directory")
    seen: dict[str, Path] = {}
    for path, name in found:
        out = output_name(name)
        if out in seen:
            raise UsageError(f"{path}: would be restored as {out}, like {seen[out]}")
        seen[out] = path
    if not found:
        raise UsageError(f"{', '.join(map(str, inputs))}: no images found")
    return found


def output_name(path: str) -> str:
    """Where an entry is restored, relative to the output directory: always a PNG."""
    return str(PurePosixPath(path).with_suffix(".png"))


def compress(inputs: Sequence[Path | str], dest: Path | str, *, model: Path | str | None = None,
             force: bool = False, progress: Progress = None, tune: bool = True,
             version: int = archive.VERSION) -> Summary:
    """Compress image files and directories into one archive at `dest` (atomic).

    With `tune` (the default) each image may carry its own tuning (`tuning`) and feedback
    gains (`feedback`). `version` is the format version to write: the newest unless readers
    of an older rowcast need 5 (rowcast 0.5 to 0.7; tuning in headers of whole bytes), 4
    (rowcast 0.4; gray images' tuning headers in full), 3
    (rowcast 0.3; tuning without gains), 2 (rowcast 0.2) or 1 (rowcast 0.1; it has no
    tuning, so none is done).

    Every input is checked from its header first; then images are read and coded in
    groups of up to 32 (or 4 megapixels), same-sized ones together, and written in input
    order, so memory stays bounded however many there are.
    """
    dest = Path(dest)
    if version not in archive.VERSION_METHODS:
        known = ", ".join(map(str, archive.VERSION_METHODS))
        raise UsageError(f"{dest}: cannot write format version {version} (only {known})")
    allowed = archive.VERSION_METHODS[version] if tune else ()
    method = next((m for m in ("adaptive", "tuned") if m in allowed), "model")
    if dest.is_dir():
        raise UsageError(f"{dest}: is a directory")
    if dest.exists() and not force:
        raise UsageError(f"{dest}: already exists (use --force to replace it)")
    if not dest.parent.is_dir():
        raise UsageError(f"{dest}: no such directory {dest.parent}")
    files = collect_inputs(inputs)
    for path, name in files:
        try:
            archive.normalise_path(name)
        except ArchiveError as exc:
            raise UsageError(f"{path}: cannot be stored under this name ({exc})") from None
        _checked(probe, path)
    net = _model(model)
    engine = Engine(net)
    rows: list[dict] = []

    def coded_groups() -> Iterator[tuple[str, np.ndarray, str, codec.Coded]]:
        """(name, planes, mode, coded) in input order, coded a group at a time."""
        group: list[tuple[str, np.ndarray, str]] = []
        pixels = 0
        for i, (path, name) in enumerate(files):
            planes, mode = _checked(read_planes, path)
            group.append((name, planes, mode))
            pixels += planes[0].size
            if len(group) == DEFAULT_BATCH or pixels >= ENCODE_PIXELS or i == len(files) - 1:
                by_shape: dict[tuple, list[int]] = defaultdict(list)
                for j, (_, planes_j, _) in enumerate(group):
                    by_shape[planes_j.shape].append(j)
                coded: dict[int, codec.Coded] = {}
                for members in by_shape.values():
                    images = [group[j][1] for j in members]
                    coded.update(zip(members, codec.encode_batch(
                        engine, images, method, layout=archive.payload_layout(version)),
                        strict=True))
                for j, (name_j, planes_j, mode_j) in enumerate(group):
                    yield name_j, planes_j, mode_j, coded[j]
                group, pixels = [], 0

    def entries() -> Iterator[Entry]:
        for name, planes, mode, coded in coded_groups():
            raw = planes.tobytes()
            method, payload = ((coded.method, coded.payload) if len(coded.payload) < len(raw)
                               else ("stored", raw))
            rows.append({"path": name, "mode": mode, "width": planes.shape[2],
                         "height": planes.shape[1], "method": method, "bytes": len(payload),
                         "cross_entropy_bits": coded.cross_entropy})
            if progress:
                progress(1)
            yield Entry(name, mode, planes.shape[2], planes.shape[1], method, checksum(planes),
                        payload)

    try:
        size = archive.write_archive(dest, identity(net), entries(), force=force,
                                     version=version)
    except ArchiveError as exc:
        raise UsageError(str(exc)) from None
    return Summary(dest, identity(net), rows, size)


def _checked(read, path: Path):
    """Run a planes reader, turning its refusal into a DataError."""
    try:
        return read(path)
    except ImageError as exc:
        raise DataError(str(exc)) from None


def read_index(src: Path | str) -> tuple[ModelIdentity, list[IndexEntry]]:
    """The model identity and entries of an archive, without decoding anything."""
    src = Path(src)
    if not src.exists():
        raise UsageError(f"{src}: no such file")
    try:
        return archive.read_index(src)
    except ArchiveError as exc:
        raise DataError(str(exc)) from None


def decode_entries(src: Path | str, *, model: Path | str | None = None,
                   batch: int = DEFAULT_BATCH, progress: Progress = None,
                   only: Sequence[str] | None = None) -> Iterator[tuple[IndexEntry, np.ndarray]]:
    """Decode an archive's entries (or those named in `only`), checking each checksum.

    Same-sized entries are decoded together in batches of `batch`. Yields (entry, planes).
    """
    src = Path(src)
    ident, entries = read_index(src)
    if only is not None:
        wanted = set(only)
        entries = [e for e in entries if e.path in wanted]
    net = None
    if any(e.method != "stored" for e in entries):
        net = (model is None and bundled_model(ident.sha256)) or _model(model)
        if net.sha256 != ident.sha256:
            raise UsageError(f"{src}: was made with model {ident.name} "
                             f"({ident.sha256.hex()[:12]}), not {net.name} "
                             f"({net.sha256.hex()[:12]}); pass that model with --model")
    engine = Engine(net) if net is not None else None
    groups: dict[tuple, list[IndexEntry]] = defaultdict(list)
    for e in entries:  # coded entries of one size decode together, tuned or not
        groups[(e.method == "stored", e.mode, e.height, e.width)].append(e)
    for (stored, mode, height, width), members in groups.items():
        planes = PLANES[mode]
        for start in range(0, len(members), batch):
            part = members[start : start + batch]
            payloads = [_payload(src, e) for e in part]
            if stored:
                decoded = [_stored(src, e, p, planes) for e, p in zip(part, payloads, strict=True)]
            else:
                try:
                    decoded = codec.decode_batch(engine, payloads, planes, height, width,
                                                 progress=progress,
                                                 methods=[e.method for e in part],
                                                 layout=_layout(part[0]))
                except (PayloadError, ValueError, RuntimeError) as exc:
                    raise _undecodable(src, engine, part, payloads, planes, exc) from None
            for e, planes_out in zip(part, decoded, strict=True):
                if checksum(planes_out) != e.checksum:
                    raise DataError(f"{src}: {e.path} decodes to pixels whose checksum differs")
                yield e, planes_out


def _undecodable(src: Path, engine: Engine, part: list[IndexEntry], payloads: list[bytes],
                 planes: int, batch_error: Exception) -> DataError:
    """The error for a batch that failed to decode, naming the entry at fault: each entry
    is decoded alone until one fails (all are named if none fails alone)."""
    for e, payload in zip(part, payloads, strict=True):
        try:
            codec.decode_batch(engine, [payload], planes, e.height, e.width, workers=1,
                               methods=[e.method], layout=_layout(e))
        except (PayloadError, ValueError, RuntimeError) as exc:
            return DataError(f"{src}: cannot decode {e.path} ({exc})")
    names = ", ".join(e.path for e in part)
    return DataError(f"{src}: cannot decode {names} ({batch_error})")


def _layout(entry: IndexEntry) -> str:
    """How an entry's payload carries its tuning, by its archive's format version."""
    return archive.payload_layout(entry.version)


def _payload(src: Path, entry: IndexEntry) -> bytes:
    try:
        return archive.read_payload(src, entry)
    except ArchiveError as exc:
        raise DataError(str(exc)) from None


def _stored(src: Path, entry: IndexEntry, payload: bytes, planes: int) -> np.ndarray:
    if len(payload) != planes * entry.height * entry.width:
        raise DataError(f"{src}: {entry.path} has a stored payload of the wrong length")
    return np.frombuffer(payload, np.uint8).reshape(planes, entry.height, entry.width)


def decompress(src: Path | str, outdir: Path | str, *, model: Path | str | None = None,
               force: bool = False, batch: int = DEFAULT_BATCH,
               progress: Progress = None) -> list[Path]:
    """Restore every entry as a PNG under `outdir`; all or nothing.

    Files are decoded into a staging folder inside `outdir` and moved into place only
    when every entry has decoded and matched its checksum.
    """
    outdir = Path(outdir)
    if outdir.exists() and not outdir.is_dir():
        raise UsageError(f"{outdir}: not a directory")
    _, entries = read_index(src)
    targets = [outdir / output_name(e.path) for e in entries]
    clashes = [t for t in targets if t.exists()]
    if clashes and not force:
        raise UsageError(f"{clashes[0]}: already exists (use --force to replace it)")
    outdir.mkdir(parents=True, exist_ok=True)
    stage = Path(tempfile.mkdtemp(prefix=".rowcast-", dir=outdir))
    try:
        for e, planes in decode_entries(src, model=model, batch=batch, progress=progress):
            tmp = stage / output_name(e.path)
            tmp.parent.mkdir(parents=True, exist_ok=True)
            to_image(planes, e.mode).save(tmp, format="PNG")
        written = []
        for e, target in zip(entries, targets, strict=True):
            target.parent.mkdir(parents=True, exist_ok=True)
            os.replace(stage / output_name(e.path), target)
            written.append(target)
        return written
    finally:
        shutil.rmtree(stage, ignore_errors=True)


def verify(src: Path | str, *, against: Path | str | None = None,
           model: Path | str | None = None, batch: int = DEFAULT_BATCH,
           progress: Progress = None) -> Check:
    """Decode everything and check each checksum, and every pixel against `against` if given.

    With `against`, every image under that directory must be in the archive too, so that
    a verified archive can stand in for the directory.
    """
    problems: list[str] = []
    checked = 0
    originals = dict((name, path) for path, name in collect_inputs([against])) if against else {}
    in_archive = {e.path for e in read_index(src)[1]}
    problems += [f"{path}: not in the archive" for name, path in sorted(originals.items())
                 if name not in in_archive]
    try:
        for e, planes in decode_entries(src, model=model, batch=batch, progress=progress):
            checked += 1
            if against is None:
                continue
            if e.path not in originals:
                problems.append(f"{e.path}: not found under {against}")
                continue
            try:
                orig, mode = read_planes(originals[e.path])
            except ImageError as exc:
                problems.append(str(exc))
                continue
            if mode != e.mode or not np.array_equal(orig, planes):
                problems.append(f"{originals[e.path]}: pixels differ from the archive's {e.path}")
    except DataError as exc:
        problems.append(str(exc))
    return Check(checked, problems)
