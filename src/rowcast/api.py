"""What a user does, as Python functions: compress, decompress, verify, read_index.

Every file under the inputs is accounted for: an image rowcast codes (`rowcast.imagefile`
reads it at full depth, with its palette, transparency and metadata), a file kept byte for
byte (JPEG, lossy WebP, anything that is not an image rowcast codes), or a file left out by
the user's choice (`exclude`, or `leave_out_refused` for files that cannot be kept), recorded in the
archive with the reason. Each function validates before writing and raises a
`RowcastError` whose message is one line naming the file and the reason.
"""

from __future__ import annotations

import fnmatch
import hashlib
import importlib.util
import os
import shutil
import tempfile
from collections.abc import Callable, Iterator, Sequence
from dataclasses import dataclass, field, replace
from pathlib import Path

import numpy as np

from rowcast import archive, entrycodec, imagefile, modelpack
from rowcast.archive import ArchiveError, Entry, IndexEntry, ModelIdentity
from rowcast.entrycodec import CodingError, Wanted
from rowcast.errors import DataError, UsageError
from rowcast.imagefile import ImageError
from rowcast.picture import (
    ExtrasError,
    Picture,
    checksum,
    pack_picture_extras,
    unpack_picture_extras,
)
from rowcast.pixelformats import BY_NAME
from rowcast.predictor import Engine
from rowcast.quantize import IntModel, ModelError, bundled_model, load_model, model_from_bytes
from rowcast.workers import map_split

DEFAULT_BATCH = entrycodec.BATCH
GROUP_IMAGES = 256  # images read and coded together while compressing
GROUP_PIXELS = 1 << 22  # ... or at most this many pixels (one larger image alone)
STRIPPED = "metadata stripped (--strip-metadata)"
UNWRITABLE = "an image that no container rowcast writes holds exactly; kept byte for byte"

Progress = Callable[[int], None] | None  # called with the number of images or rows just done


@dataclass(frozen=True)
class Found:
    """A file under the inputs and what will become of it: `action` is "image", "bytes",
    "excluded", "refused" or "empty folder", with the reason for the last four; `link` is
    where a symbolic link to a file points (it is archived as that file's content);
    `pixels`, an image's pixel count from its header."""

    path: Path
    name: str
    action: str
    reason: str = ""
    link: str | None = None
    pixels: int = 0


@dataclass(frozen=True)
class Summary:
    """What `compress` wrote: one row per entry, and the archive's size."""

    archive: Path
    model: ModelIdentity
    entries: list[dict] = field(default_factory=list)
    archive_bytes: int = 0
    adaptation: dict | None = None  # with --adapt: what it did and saved (`compress`)

    def count(self, kind: str) -> int:
        return sum(1 for e in self.entries if e["kind"] == kind)

    @property
    def subpixels(self) -> int:
        return sum(e["subpixels"] for e in self.entries if e["kind"] == "image")

    @property
    def image_bytes(self) -> int:
        """Bytes the coded images take: payloads and extras (metadata, palettes)."""
        return sum(e["bytes"] for e in self.entries if e["kind"] == "image")

    @property
    def bits_per_subpixel(self) -> float:
        return 8.0 * self.image_bytes / max(1, self.subpixels)


@dataclass(frozen=True)
class Check:
    """The outcome of `verify`: entries decoded, and one line per problem found."""

    checked: int
    problems: list[str]

    @property
    def ok(self) -> bool:
        return not self.problems


@dataclass(frozen=True)
class Restored:
    """What `decompress` wrote, which entries failed (one line each), and which entries
    were left out when the archive was made."""

    written: list[Path]
    failed: list[str]
    left_out: list[IndexEntry]


class RefusedError(DataError):
    """Files that cannot be kept; `problems` has one line per file."""

    def __init__(self, problems: list[str]) -> None:
        more = f" (and {len(problems) - 1} more)" if len(problems) > 1 else ""
        super().__init__(f"{problems[0]}{more}; pass --leave-out-refused to archive the rest "
                         "and record these as left out")
        self.problems = problems


def _model(path: Path | str | None) -> IntModel:
    try:
        return load_model(Path(path) if path is not None else None)
    except ModelError as exc:
        raise UsageError(str(exc)) from None


def identity(model: IntModel, embed: bool = False) -> ModelIdentity:
    """The archive's record of a model, with the model itself, packed (`modelpack`), when
    `embed`."""
    if not embed:
        return ModelIdentity(model.name, model.sha256)
    return ModelIdentity(model.name, model.sha256, modelpack.smallest(model), packed=True)


def _archive_model(src: Path, ident: ModelIdentity, model: Path | str | None) -> IntModel:
    """The model that decodes an archive: the one named by `model`, else the one the
    archive embeds, else the bundled model of that identity; UsageError when it is not the
    model that coded the archive, naming both."""
    if model is not None:
        net = _model(model)
    elif ident.embedded:
        try:
            origin = f"{src}: embedded model"
            net = (modelpack.unpack(ident.embedded, origin) if ident.packed
                   else model_from_bytes(ident.embedded, origin))
        except ModelError as exc:
            raise DataError(str(exc)) from None
        if net.sha256 != ident.sha256:
            raise DataError(f"{src}: the embedded model is not the model the archive records "
                            f"({ident.name}, {ident.sha256.hex()[:12]})")
    else:
        net = bundled_model(ident.sha256) or _model(None)
    if net.sha256 != ident.sha256:
        raise UsageError(f"{src}: was made with model {ident.name} "
                         f"({ident.sha256.hex()[:12]}), not {net.name} "
                         f"({net.sha256.hex()[:12]}); pass that model with --model")
    return net


def _walk(root: Path, folders: bool = False) -> Iterator[tuple[Path, str]]:
    """(path, kind) for every file under root, sorted, links not followed: kind "file", or
    "folder link" for a link to a directory; with `folders`, also "empty folder" for each
    directory below root that holds nothing."""
    for top, dirs, files in os.walk(root):
        dirs.sort()
        here = Path(top)
        if folders and not dirs and not files and here != root:
            yield here, "empty folder"
        for name in sorted(files + [d for d in dirs if (here / d).is_symlink()]):
            path = here / name
            yield path, "folder link" if path.is_symlink() and path.is_dir() else "file"
        dirs[:] = [d for d in dirs if not (here / d).is_symlink()]


def check_destination(path: Path, force: bool) -> None:
    """UsageError unless a new file may be written at `path`: not a directory, not an
    existing file without `force`, in a folder that exists."""
    if path.is_dir():
        raise UsageError(f"{path}: is a directory")
    if (path.exists() or path.is_symlink()) and not force:
        raise UsageError(f"{path}: already exists (use --force to replace it)")
    if not path.parent.is_dir():
        raise UsageError(f"{path}: no such directory {path.parent}")


def collect_inputs(inputs: Sequence[Path | str], exclude: Sequence[str] = ()) -> list[Found]:
    """Every file under the inputs, with what will become of it (`Found`), by content.

    A file named directly keeps its own name; files under a directory keep their path
    relative to it. `exclude` holds glob patterns matched against that path and its last
    component; a matching file is recorded as left out.
    """
    listed: list[tuple[Path, str, str]] = []
    for raw in inputs:
        src = Path(raw)
        if src.is_dir():
            listed += [(p, p.relative_to(src).as_posix(), kind)
                       for p, kind in _walk(src, folders=True)]
        elif src.exists():
            listed.append((src, src.name, "file"))
        else:
            raise UsageError(f"{src}: no such file or directory")
    if not listed:
        raise UsageError(f"{', '.join(map(str, inputs))}: no files found")
    found, seen = [], {}
    for path, name, kind in listed:
        if name in seen:
            raise UsageError(f"{path}: has the same archive name as {seen[name]}")
        seen[name] = path
        pattern = next((g for g in exclude if fnmatch.fnmatchcase(name, g)
                        or fnmatch.fnmatchcase(path.name, g)), None)
        if pattern is not None:
            found.append(Found(path, name, "excluded", f"excluded by --exclude {pattern}"))
        elif kind == "folder link":
            found.append(Found(path, name, "refused", "a link to a directory"))
        elif kind == "empty folder":
            found.append(Found(path, name, "empty folder", EMPTY_FOLDER))
        else:
            try:
                sniffed = imagefile.sniff(path)
            except ImageError as exc:
                found.append(Found(path, name, "refused", _reason(exc, path)))
                continue
            link = os.readlink(path) if path.is_symlink() else None
            found.append(Found(path, name, sniffed.action, sniffed.reason, link,
                               sniffed.width * sniffed.height))
    return found


EMPTY_FOLDER = "an empty folder: archives hold files, so it is recorded, not restored"


def _reason(exc: Exception, path: Path) -> str:
    """An ImageError's reason without the file name it starts with."""
    text = str(exc)
    prefix = f"{path}: "
    return text[len(prefix):] if text.startswith(prefix) else text


def compress(inputs: Sequence[Path | str], dest: Path | str, *, model: Path | str | None = None,
             force: bool = False, progress: Progress = None, exclude: Sequence[str] = (),
             strip_metadata: bool = False, leave_out_refused: bool = False,
             embed_model: bool = False, adapt_minutes: float | None = None,
             quick: bool = False, log: Callable[[str], None] = lambda line: None
             ) -> Summary:
    """Compress every file under the inputs into one archive at `dest` (atomic).

    Images are coded (`entrycodec`), other files kept as bytes; files matching `exclude`
    are left out and recorded. Files that cannot be kept (CMYK, float, several frames,
    unreadable) stop the run, all named in one `RefusedError`, unless `leave_out_refused`,
    which records them as left out with the reason. `strip_metadata` drops every image's
    metadata (what gives the values their meaning stays: `picture.MEANING`). Images are
    read and coded in groups, so memory stays bounded however many there are.

    `adapt_minutes`: fine-tune the model on the images first (`trainjob.adapt`; needs
    torch; `log` gets its lines), code every image with both models, and keep the adapted
    one, packed into the archive, only when payloads plus model come out smaller; else
    the archive is written again with the starting model. `Summary.adaptation` says which
    and by how many bytes. `quick` searches each image's tuning once, not twice (about
    25% faster, 0.25% larger: `codec.tuning_of`).
    """
    dest = Path(dest)
    check_destination(dest, force)
    if adapt_minutes is not None and not adapt_minutes > 0:
        raise UsageError(f"--minutes {adapt_minutes:g}: must be more than 0")
    found = collect_inputs(inputs, exclude)
    for f in found:
        try:
            archive.normalise_path(f.name)
        except ArchiveError as exc:
            raise UsageError(f"{f.path}: cannot be stored under this name ({exc})") from None
    refused = [f"{f.path}: {f.reason}" for f in found if f.action == "refused"]
    if refused and not leave_out_refused:
        raise RefusedError(refused)
    net = start = _model(model)
    engine = base = Engine(net)
    asked_embed = embed_model
    if adapt_minutes is not None:
        adapted = _adapted(found, model, adapt_minutes, log)
        if adapted is not None:
            net, engine, embed_model = adapted, Engine(adapted), True
    payloads = {"used": 0, "start": 0}  # image payload bytes with each model
    rows: list[dict] = []

    def entries() -> Iterator[Entry]:
        """Kept and left-out files at once; images a group at a time, coded together."""
        group: list[Found] = []
        pixels = 0

        def flush() -> Iterator[Entry]:
            """The group's entries: each picture is read and whether it can be restored
            checked (`imagefile.restored`, a write and read back in memory) on every core;
            those that cannot be restored are kept as bytes."""
            able = []
            readied = map_split(lambda f: _readied(f, strip_metadata), group, pixels)
            for f, got in zip(group, readied, strict=True):
                if isinstance(got, ImageError):
                    if not leave_out_refused:
                        raise RefusedError([str(got)])
                    yield _left_out(f.name, _reason(got, f.path), rows)
                elif got is None:
                    yield _kept(replace(f, action="bytes", reason=UNWRITABLE), rows)
                else:
                    able.append((f, *got))
                    continue
                if progress:
                    progress(1)
            yield from _coded(engine, able, strip_metadata, rows, progress, quick,
                              None if engine is base else base, payloads)

        for f in found:
            if f.action == "bytes":
                yield _kept(f, rows)
            elif f.action != "image":
                yield _left_out(f.name, f.reason, rows)
            else:
                if group and (len(group) >= GROUP_IMAGES or pixels + f.pixels > GROUP_PIXELS):
                    yield from flush()
                    group, pixels = [], 0
                group.append(f)
                pixels += f.pixels
                continue
            if progress:
                progress(1)
        yield from flush()

    ident = identity(net, embed_model)
    try:
        size = archive.write_archive(dest, ident, entries(), force=force)
    except ArchiveError as exc:
        raise UsageError(str(exc)) from None
    except OSError as exc:
        raise DataError(f"{exc.filename or dest}: {exc.strerror or exc}") from None
    if adapt_minutes is None:
        return Summary(dest, ident, rows, size)
    if engine is base:
        return Summary(dest, ident, rows, size, {
            "from": start.name, "minutes": adapt_minutes, "kept": False,
            "reason": "no gray or colour image of 16 px or more to adapt on, or too "
                      "short a run to reach its quantised part"})
    adaptation = {"from": start.name, "minutes": adapt_minutes, "model": net.name,
                  "model_bytes": len(ident.embedded),
                  "payload_bytes": payloads["used"], "start_payload_bytes": payloads["start"]}
    adaptation["saved_bytes"] = (payloads["start"] - payloads["used"]
                                 - adaptation["model_bytes"])
    adaptation["kept"] = adaptation["saved_bytes"] > 0
    if not adaptation["kept"]:  # it did not pay: the plain archive
        log("the adapted model does not pay for itself; coding with the starting model")
        summary = compress(inputs, dest, model=model, force=True, exclude=exclude,
                           strip_metadata=strip_metadata, leave_out_refused=leave_out_refused,
                           embed_model=asked_embed)
        return replace(summary, adaptation=adaptation)
    return Summary(dest, ident, rows, size, adaptation)


def _readied(f: Found, strip_metadata: bool) -> tuple[str, Picture] | ImageError | None:
    """A found image's picture (without its metadata if so asked) and the name it is
    restored under (`imagefile.restored`), None when it cannot be restored, or the
    ImageError that stops it being read."""
    try:
        picture = imagefile.read_picture(f.path)
    except ImageError as exc:
        return exc
    return imagefile.restored(f.name, picture.without_metadata() if strip_metadata else picture)


ADAPT_PIXELS = 1 << 26  # pixels read to adapt on at most (the first images in path order)


def _adapted(found: list[Found], model: Path | str | None, minutes: float,
             log: Callable[[str], None]) -> IntModel | None:
    """The model fine-tuned on the images found (up to ADAPT_PIXELS of them), or None."""
    if importlib.util.find_spec("torch") is None:
        raise UsageError("--adapt needs torch (pip install 'rowcast[train]'; its CPU build "
                         "is enough)")
    from rowcast import trainjob

    pictures, pixels = [], 0
    for f in found:
        if f.action != "image" or pixels >= ADAPT_PIXELS:
            continue
        try:
            picture = imagefile.read_picture(f.path)
        except ImageError:
            continue  # the coding pass reports it
        pictures.append(picture)
        pixels += picture.width * picture.height
    start = "default" if model is None else str(model)
    name = f"{Path(start).stem}-adapted"
    return trainjob.adapt(pictures, start, minutes, name, log)


def _coded(engine: Engine, group: list[tuple[Found, str, Picture]], stripped: bool,
           rows: list[dict], progress: Progress, quick: bool, start: Engine | None = None,
           payloads: dict | None = None) -> Iterator[Entry]:
    """Archive entries of a group of pictures, coded together, in order; each is restored
    under its name and picture from `imagefile.restored`. With `start`, the pictures are
    also coded with that engine and both payloads' bytes summed into `payloads`."""
    if not group:
        return
    coded = entrycodec.encode_pictures(engine, [p for _, _, p in group], quick=quick)
    if start is not None:
        other = entrycodec.encode_pictures(start, [p for _, _, p in group], quick=quick)
        payloads["used"] += sum(len(c.payload) for c in coded)
        payloads["start"] += sum(len(c.payload) for c in other)
    for (f, restore, picture), enc in zip(group, coded, strict=True):
        extras = pack_picture_extras(picture)
        kinds = tuple(k for k, _ in picture.extras)
        size = len(enc.payload) + len(extras)
        rows.append({"path": f.name, "kind": "image", "format": picture.format,
                     "width": picture.width, "height": picture.height,
                     "subpixels": picture.values.size, "method": enc.method,
                     "parts": list(enc.parts), "bytes": size, "extras_bytes": len(extras),
                     "cross_entropy_bits": enc.cross_entropy, "carries": list(kinds),
                     "restore_as": restore if restore != f.name else None, "link": f.link,
                     "bits_per_subpixel": 8.0 * size / max(1, picture.values.size)})
        if progress:
            progress(1)
        yield Entry(f.name, "image", picture.format, picture.width, picture.height, enc.method,
                    checksum(picture.values, extras), enc.payload, extras,
                    restore_as=restore if restore != f.name else None,
                    reason=STRIPPED if stripped else "", carries=kinds, parts=enc.parts)


def _kept(f: Found, rows: list[dict]) -> Entry:
    """A file kept byte for byte."""
    try:
        data = f.path.read_bytes()
    except OSError as exc:
        raise DataError(f"{f.path}: cannot be read ({exc.strerror or exc})") from None
    rows.append({"path": f.name, "kind": "file", "method": "bytes", "bytes": len(data),
                 "reason": f.reason, "link": f.link})
    return Entry(f.name, "file", "", 0, 0, "bytes", hashlib.sha256(data).digest(), data,
                 reason=f.reason)


def _left_out(name: str, reason: str, rows: list[dict]) -> Entry:
    rows.append({"path": name, "kind": "left out", "method": "none", "bytes": 0,
                 "reason": reason})
    return Entry(name, "left out", "", 0, 0, "none", bytes(32), b"", reason=reason)


def read_index(src: Path | str, *, max_subpixels: int = archive.DEFAULT_PIXEL_LIMIT,
               max_entries: int = archive.DEFAULT_ENTRY_LIMIT
               ) -> tuple[ModelIdentity, list[IndexEntry]]:
    """The model identity and entries of an archive, without decoding anything; an image
    entry declaring more than `max_subpixels` (width x height x planes) is refused before
    anything is allocated for it, and an index of more than `max_entries` entries once it
    passes that many."""
    src = Path(src)
    if not src.exists():
        raise UsageError(f"{src}: no such file")
    try:
        return archive.read_index(src, pixel_limit=max_subpixels, entry_limit=max_entries)
    except ArchiveError as exc:
        raise DataError(str(exc)) from None
    except OSError as exc:
        raise DataError(f"{src}: cannot be read ({exc.strerror or exc})") from None


Content = Picture | bytes | None  # an image, a file's bytes, nothing for a left-out file


def _contents(src: Path, ident: ModelIdentity, entries: list[IndexEntry],
              model: Path | str | None, batch: int, progress: Progress
              ) -> Iterator[tuple[IndexEntry, Content | DataError]]:
    """Each entry's content, or the DataError that stops it (a damaged entry never stops
    the others), in a chunk of entries at a time so memory stays bounded."""
    engine = None
    coded = [e for e in entries if e.kind == "image"]
    if entrycodec.needs_engine([e.method for e in coded], [e.parts for e in coded]):
        engine = Engine(_archive_model(src, ident, model))
    chunk = max(batch, 256)
    for start in range(0, len(entries), chunk):
        part = entries[start : start + chunk]
        images = [e for e in part if e.kind == "image"]
        wanted, extras, early = [], {}, {}
        for e in images:
            try:
                payload = archive.read_payload(src, e)
                extras[id(e)] = archive.read_extras(src, e) if e.extras_length else b""
                wanted.append(Wanted(BY_NAME[e.format], e.width, e.height, e.method, payload,
                                     e.layout))
            except ArchiveError as exc:
                early[id(e)] = DataError(str(exc))
                wanted.append(None)
        todo = [w for w in wanted if w is not None]
        values = iter(entrycodec.decode_values(engine, todo, batch=batch, progress=progress))
        decoded = {id(e): (early[id(e)] if w is None else next(values))
                   for e, w in zip(images, wanted, strict=True)}
        for e in part:
            if e.kind == "image":
                yield e, _picture(src, e, decoded[id(e)], extras.get(id(e), b""))
            elif e.kind == "file":
                yield e, _file_bytes(src, e)
            else:
                yield e, None


def _picture(src: Path, e: IndexEntry, values, extras: bytes) -> Picture | DataError:
    if isinstance(values, DataError):
        return values
    if isinstance(values, CodingError):
        return DataError(f"{src}: cannot decode {e.path} ({values})")
    if checksum(values, extras) != e.checksum:
        return DataError(f"{src}: {e.path} decodes to values whose checksum differs")
    if e.version < archive.VERSION:  # formats 1 to 6 kept pixels only, restored as PNG
        return Picture(values, e.format)
    try:
        container, kept = unpack_picture_extras(extras)
    except ExtrasError as exc:
        return DataError(f"{src}: {e.path}: {exc}")
    return Picture(values, e.format, kept, container)


def _file_bytes(src: Path, e: IndexEntry) -> bytes | DataError:
    try:
        data = archive.read_payload(src, e)
    except ArchiveError as exc:
        return DataError(str(exc))
    if hashlib.sha256(data).digest() != e.checksum:
        return DataError(f"{src}: {e.path}: bytes whose checksum differs")
    return data


def _selected(src: Path, entries: list[IndexEntry], paths: Sequence[str]) -> list[IndexEntry]:
    """The entries with these paths, in archive order; UsageError naming one that is not
    there."""
    names = {e.path for e in entries}
    missing = [p for p in paths if p not in names]
    if missing:
        raise UsageError(f"{src}: has no entry {missing[0]!r}")
    wanted = set(paths)
    return [e for e in entries if e.path in wanted]


def decode_entries(src: Path | str, *, model: Path | str | None = None,
                   batch: int = DEFAULT_BATCH, progress: Progress = None,
                   only: Sequence[str] | None = None,
                   max_subpixels: int = archive.DEFAULT_PIXEL_LIMIT,
                   max_entries: int = archive.DEFAULT_ENTRY_LIMIT
                   ) -> Iterator[tuple[IndexEntry, Content]]:
    """Decode an archive's entries (or those named in `only`), checking each checksum:
    (entry, Picture) for images, (entry, bytes) for kept files, (entry, None) for files
    left out. Raises DataError at the first entry that does not decode."""
    src = Path(src)
    ident, entries = read_index(src, max_subpixels=max_subpixels, max_entries=max_entries)
    if only is not None:
        entries = _selected(src, entries, only)
    for e, content in _contents(src, ident, entries, model, batch, progress):
        if isinstance(content, DataError):
            raise content
        yield e, content


def decompress(src: Path | str, outdir: Path | str, *, model: Path | str | None = None,
               force: bool = False, batch: int = DEFAULT_BATCH, progress: Progress = None,
               only: Sequence[str] | None = None,
               max_subpixels: int = archive.DEFAULT_PIXEL_LIMIT,
               max_entries: int = archive.DEFAULT_ENTRY_LIMIT) -> Restored:
    """Restore every entry that decodes (or those whose paths `only` names) under
    `outdir`, each under its path (images in their own container where it can hold them
    exactly, else as PNG under the recorded name), and name each one that does not.
    Entries are decoded into a staging folder inside `outdir` and moved into place at the
    end."""
    src, outdir = Path(src), Path(outdir)
    if outdir.exists() and not outdir.is_dir():
        raise UsageError(f"{outdir}: not a directory")
    ident, entries = read_index(src, max_subpixels=max_subpixels, max_entries=max_entries)
    if only is not None:
        entries = _selected(src, entries, only)
    kept = [e for e in entries if e.kind != "left out"]
    targets = {e.path: outdir / e.restored_path for e in kept}
    for target in targets.values():
        _inside(outdir, target)
    clashes = [t for t in targets.values() if t.exists() or t.is_symlink()]
    if clashes and not force:
        raise UsageError(f"{clashes[0]}: already exists (use --force to replace it)")
    made = not outdir.exists()
    outdir.mkdir(parents=True, exist_ok=True)
    _remove_stale_stages(outdir)
    stage = Path(tempfile.mkdtemp(prefix=f"{STAGE_PREFIX}{os.getpid()}-", dir=outdir))
    failed, ready = [], []
    pending: list[tuple[IndexEntry, Path, Picture]] = []

    def record(e: IndexEntry, tmp: Path, error: ImageError | None) -> None:
        if error is None:
            ready.append(e)
        else:
            failed.append(f"{src}: {e.path}: {_reason(error, tmp)}")

    def flush() -> None:
        """Write the pending images into the stage, each file made and written on one of
        the cores."""
        pixels = sum(picture.width * picture.height for _, _, picture in pending)
        for (e, tmp, _), error in zip(pending, map_split(_write_image, pending, pixels),
                                      strict=True):
            record(e, tmp, error)
        pending.clear()

    try:
        for e, content in _contents(src, ident, kept, model, batch, progress):
            if isinstance(content, DataError):
                failed.append(str(content))
            elif isinstance(content, Picture):
                pending.append((e, stage / e.restored_path, content))
                if len(pending) >= WRITE_CHUNK:
                    flush()
            else:  # a kept file's bytes, written at once
                record(e, stage / e.restored_path, _write(stage / e.restored_path, content))
        flush()
        written = _put_in_place([(stage / e.restored_path, targets[e.path]) for e in ready],
                                outdir, stage)
    finally:
        shutil.rmtree(stage, ignore_errors=True)
        if made and not any(outdir.iterdir()):
            outdir.rmdir()
    return Restored(written, failed, [e for e in entries if e.kind == "left out"])


STAGE_PREFIX = ".rowcast-stage-"  # then the pid of the decompress that made it
WRITE_CHUNK = 256  # restored images whose files are made together


def _write(path: Path, data: bytes) -> ImageError | None:
    """Write a new file in the stage, its folders made as needed; why it failed, if it
    did."""
    try:
        path.parent.mkdir(parents=True, exist_ok=True)
        imagefile.write_new(path, data)
    except ImageError as exc:
        return exc
    return None


def _write_image(item: tuple[IndexEntry, Path, Picture]) -> ImageError | None:
    """Write a restored image's file in its container; why it cannot be written, if so."""
    _, path, picture = item
    try:
        data = imagefile.file_bytes(picture, path)
    except ImageError as exc:
        return exc
    return _write(path, data)


def _remove_stale_stages(outdir: Path) -> None:
    """Remove staging folders that a decompress killed outright (SIGKILL, power loss) left
    in `outdir`: those whose process is gone. A live one's is never touched."""
    for stage in outdir.glob(f"{STAGE_PREFIX}*-*"):
        pid = stage.name.removeprefix(STAGE_PREFIX).split("-", 1)[0]
        if not pid.isdigit() or stage.is_symlink() or not stage.is_dir():
            continue
        try:
            os.kill(int(pid), 0)
        except ProcessLookupError:
            shutil.rmtree(stage, ignore_errors=True)
        except (PermissionError, OverflowError):
            continue


def _inside(outdir: Path, target: Path) -> None:
    """UsageError unless every folder between `outdir` and `target` is a real folder or
    not there yet: a symbolic link there would send the file elsewhere."""
    if target.is_dir() and not target.is_symlink():
        raise UsageError(f"{target}: is a directory; an entry restores to this name")
    folder = outdir
    for part in target.relative_to(outdir).parts[:-1]:
        folder = folder / part
        if folder.is_symlink() or (folder.exists() and not folder.is_dir()):
            what = "a symbolic link" if folder.is_symlink() else "not a directory"
            raise UsageError(f"{folder}: is {what}; {target.name} would not be written "
                             "inside the output folder")


def _put_in_place(moves: list[tuple[Path, Path]], outdir: Path, stage: Path) -> list[Path]:
    """Move each staged file onto its target, all or nothing: a file it replaces is set
    aside in the staging folder until every move has succeeded, and put back otherwise."""
    aside = stage / ".replaced"
    aside.mkdir()
    done: list[tuple[Path, Path | None]] = []
    try:
        for i, (staged, target) in enumerate(moves):
            _inside(outdir, target)
            target.parent.mkdir(parents=True, exist_ok=True)
            old = None
            if target.exists() or target.is_symlink():
                old = aside / str(i)
                os.replace(target, old)
            done.append((target, old))
            os.replace(staged, target)
    except BaseException:
        for target, old in reversed(done):
            if old is None:
                target.unlink(missing_ok=True)
            else:
                os.replace(old, target)
        raise
    return [target for _, target in moves]


def verify(src: Path | str, *, against: Path | str | None = None,
           model: Path | str | None = None, batch: int = DEFAULT_BATCH,
           progress: Progress = None,
           max_subpixels: int = archive.DEFAULT_PIXEL_LIMIT,
           max_entries: int = archive.DEFAULT_ENTRY_LIMIT) -> Check:
    """Decode every entry and check its checksum; with `against`, also compare every
    image's values at full depth, its palette, transparency and metadata, and every kept
    file's bytes with the files there, and require every file there to be accounted for
    (coded, kept, or recorded as left out)."""
    src = Path(src)
    ident, entries = read_index(src, max_subpixels=max_subpixels, max_entries=max_entries)
    problems: list[str] = []
    originals: dict[str, Path] = {}
    if against is not None:
        originals = {p.relative_to(against).as_posix(): p for p, _ in _walk(Path(against))}
        names = {e.path for e in entries}
        problems += [f"{path}: not in the archive" for name, path in originals.items()
                     if name not in names]
    checked = 0
    for e, content in _contents(src, ident, entries, model, batch, progress):
        if isinstance(content, DataError):
            problems.append(str(content))
            continue
        checked += 1
        if against is None:
            continue
        if e.path not in originals:
            if e.kind != "left out":
                problems.append(f"{e.path}: not found under {against}")
            continue
        problem = _compare(originals[e.path], e, content)
        if problem:
            problems.append(problem)
    return Check(checked, problems)


def _compare(path: Path, e: IndexEntry, content: Content) -> str:
    """A problem line if the original at `path` differs from the entry's content."""
    if content is None:
        return ""
    if isinstance(content, bytes):
        try:
            same = path.read_bytes() == content
        except OSError as exc:
            return f"{path}: cannot be read ({exc.strerror or exc})"
        return "" if same else f"{path}: bytes differ from the archive's {e.path}"
    try:
        original = imagefile.read_picture(path)
    except ImageError as exc:
        return str(exc)
    if e.reason == STRIPPED:
        original = original.without_metadata()
    if original.format != content.format:
        return (f"{path}: is {original.format}, the archive's {e.path} is {content.format}")
    if not np.array_equal(original.values, content.values):
        return f"{path}: pixels differ from the archive's {e.path}"
    if original.extras != content.extras:
        return f"{path}: palette, transparency or metadata differ from the archive's {e.path}"
    return ""
