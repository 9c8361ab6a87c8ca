"""The `rowcast` command: compress, list, decompress, verify; bench and costmap to measure;
train to teach the predictor a fleet's own images.

Exit status: 0 success, 1 a data or verification failure, 2 a usage error. Every error is
one line on stderr that names the file and the reason.
"""

from __future__ import annotations

import contextlib
import importlib.util
import json
import signal
import sys
from collections.abc import Iterator
from pathlib import Path
from typing import Annotated

import typer
from rich import box
from rich.console import Console
from rich.table import Table

from rowcast import api, costmap, imagefile, measure
from rowcast.archive import DEFAULT_ENTRY_LIMIT, DEFAULT_PIXEL_LIMIT
from rowcast.errors import DataError, RowcastError, UsageError
from rowcast.pixelformats import subpixels

app = typer.Typer(add_completion=False, no_args_is_help=True, pretty_exceptions_enable=False,
                  help="Lossless compression of small camera images with a learned predictor.")
# emoji=False: a file name such as "ab:joy:.png" must be printed as it is.
out = Console(highlight=False, soft_wrap=True, emoji=False)
err = Console(stderr=True, highlight=False, soft_wrap=True, emoji=False)

ModelOpt = Annotated[Path | None, typer.Option(
    "--model", help="Model file, or the name of a bundled model (default: default).")]
QuietOpt = Annotated[bool, typer.Option("--quiet", "-q", help="No progress, no summary.")]
JsonOpt = Annotated[bool, typer.Option("--json", help="Machine-readable output.")]
BatchOpt = Annotated[int, typer.Option("--batch", min=1, help="Images decoded together.")]
EntriesOpt = Annotated[int, typer.Option(
    "--max-entries", min=1, help="Refuse an archive of more entries than this (memory for "
    "its index grows with them).")]
LimitOpt = Annotated[int, typer.Option(
    "--max-subpixels", min=1, help="Refuse an archive declaring an image of more subpixels "
    "(width x height x planes) than this, before decoding anything.")]
ThreadsOpt = Annotated[int | None, typer.Option("--threads", min=1, help="CPU threads.")]


def _fail(exc: RowcastError) -> None:
    err.print(f"rowcast: error: {exc}", markup=False)
    raise typer.Exit(exc.exit_code)


@contextlib.contextmanager
def _guard(threads: int | None) -> Iterator[None]:
    """Apply the thread count; turn our errors into one line and an exit status."""
    if threads:
        from rowcast import workers

        workers.set_threads(threads)
    try:
        yield
    except RowcastError as exc:
        _fail(exc)
    except KeyboardInterrupt:
        err.print("rowcast: interrupted; nothing was written")
        raise typer.Exit(130) from None


@contextlib.contextmanager
def _bar(label: str, total: int, quiet: bool) -> Iterator:
    """A transient progress bar on stderr; yields the callback that advances it.

    Only on a terminal: elsewhere the bar would leave a blank line before any error line.
    """
    if quiet or not err.is_terminal:
        yield None
        return
    from rich.progress import (  # only for a terminal: 8 ms of start-up
        BarColumn,
        MofNCompleteColumn,
        Progress,
        TextColumn,
        TimeElapsedColumn,
        TimeRemainingColumn,
    )

    columns = (TextColumn(label), BarColumn(), MofNCompleteColumn(), TimeElapsedColumn(),
               TextColumn("left"), TimeRemainingColumn())
    with Progress(*columns, console=err, transient=True) as bar:
        task = bar.add_task(label, total=total)
        yield lambda n: bar.update(task, advance=n)


def _rows_total(entries) -> int:
    return sum(e.height for e in entries if e.kind == "image")


def _refused(exc: api.RefusedError) -> None:
    """Every file that cannot be kept, a line each, then the error line."""
    for line in exc.problems:
        err.print(f"rowcast: {line}", markup=False)
    count = len(exc.problems)
    err.print(f"rowcast: error: {count} file{'s' if count > 1 else ''} cannot be kept; pass "
              "--leave-out-refused to archive the rest and record these as left out",
              markup=False)
    raise typer.Exit(exc.exit_code)


@app.command()
def compress(
    inputs: Annotated[list[Path], typer.Argument(help="Files and/or directories.")],
    output: Annotated[Path, typer.Option("--output", "-o", help="Archive to write.")],
    model: ModelOpt = None,
    force: Annotated[bool, typer.Option("--force", help="Replace an existing archive.")] = False,
    exclude: Annotated[list[str] | None, typer.Option(
        "--exclude", metavar="GLOB", help="Leave out files whose path or name matches "
        "(recorded in the archive as left out); repeatable.")] = None,
    strip_metadata: Annotated[bool, typer.Option(
        "--strip-metadata", help="Drop ICC, EXIF, XMP, text and other metadata (palettes "
        "and transparency stay).")] = False,
    leave_out_refused: Annotated[bool, typer.Option(
        "--leave-out-refused", help="Archive everything else when some files cannot be "
        "kept, and record those as left out with the reason.")] = False,
    embed_model: Annotated[bool, typer.Option(
        "--embed-model", help="Store the model file in the archive, so that decoding needs "
        "no model file (packed: its bytes count in the archive's size).")] = False,
    adapt: Annotated[bool, typer.Option(
        "--adapt", help="First fine-tune the model's biases on these images and embed it, "
        "if payloads plus model come out smaller (needs rowcast[train]).")] = False,
    minutes: Annotated[float | None, typer.Option(
        "--minutes", help="With --adapt: fine-tuning time in minutes (default 2).")] = None,
    quick: Annotated[bool, typer.Option(
        "--quick", help="Search each image's tuning once, not twice: about 25% faster, "
        "0.25% larger.")] = False,
    quiet: QuietOpt = False,
    as_json: JsonOpt = False,
    threads: ThreadsOpt = None,
) -> None:
    """Compress every file under the inputs into one archive.

    Images are coded at full depth with their metadata; other files are kept as bytes."""
    with _guard(threads):
        if minutes is not None and not adapt:
            raise UsageError("--minutes: only with --adapt")
        options = {"model": model, "force": force, "exclude": exclude or (),
                   "strip_metadata": strip_metadata, "leave_out_refused": leave_out_refused,
                   "embed_model": embed_model, "quick": quick}
        try:
            if adapt:
                from rich.live import Live

                from rowcast.trainjob import Progress

                state = Progress(60 * (minutes or ADAPT_MINUTES))
                live = not (quiet or as_json) and err.is_terminal
                with Live(state, console=err, transient=True) if live else contextlib.nullcontext():
                    summary = api.compress(inputs, output, adapt_minutes=minutes or ADAPT_MINUTES,
                                           log=state.update, **options)
            else:
                found = api.collect_inputs(inputs, exclude or ())
                with _bar("compressing", len(found), quiet or as_json) as tick:
                    summary = api.compress(inputs, output, progress=tick, **options)
        except api.RefusedError as exc:
            _refused(exc)
        if as_json:
            out.print(json.dumps({"archive": str(summary.archive), "bytes": summary.archive_bytes,
                                  "images": summary.count("image"),
                                  "files_kept": summary.count("file"),
                                  "left_out": summary.count("left out"),
                                  "model_embedded_bytes": len(summary.model.embedded),
                                  "image_bytes": summary.image_bytes,
                                  "subpixels": summary.subpixels,
                                  "bits_per_subpixel": summary.bits_per_subpixel,
                                  "model": summary.model.name,
                                  "adaptation": summary.adaptation,
                                  "entries": summary.entries}),
                      markup=False)
        elif not quiet:
            _summary(output, summary)


ADAPT_MINUTES = 2.0  # compress --adapt's fine-tuning time when --minutes is not given


def _adaptation_line(a: dict) -> str:
    """What --adapt did, in one line."""
    if "reason" in a:
        return f"  not adapted: {a['reason']}"
    mine = a["payload_bytes"] + a["model_bytes"]
    if a["kept"]:
        return (f"  adapted {a['from']} for {a['minutes']:g} min: payloads {a['payload_bytes']} "
                f"+ model {a['model_bytes']} = {mine} bytes instead of "
                f"{a['start_payload_bytes']}, {a['saved_bytes']} bytes saved "
                f"({a['saved_bytes'] / a['start_payload_bytes']:.1%})")
    return (f"  adapting {a['from']} for {a['minutes']:g} min did not pay: payloads "
            f"{a['payload_bytes']} + model {a['model_bytes']} = {mine} bytes against "
            f"{a['start_payload_bytes']}; coded with {a['from']}")


def _plural(count: int, word: str) -> str:
    if count == 1:
        return f"{count} {word}"
    return f"{count} {word[:-1]}ies" if word.endswith("y") else f"{count} {word}s"


def _embedded(ident) -> str:
    return f" (embedded: {len(ident.embedded)} bytes)" if ident.embedded else ""


def _summary(output: Path, summary: api.Summary) -> None:
    images = summary.count("image")
    out.print(f"{output}: {summary.archive_bytes} bytes, model {summary.model.name}"
              f"{_embedded(summary.model)}", markup=False)
    if (a := summary.adaptation) is not None:
        out.print(_adaptation_line(a), markup=False)
    if images:
        out.print(f"  {_plural(images, 'image')} coded: {summary.subpixels} subpixels -> "
                  f"{summary.image_bytes} bytes ({summary.bits_per_subpixel:.3f} bits per "
                  "subpixel, metadata included)", markup=False)
    for kind, label in (("file", "kept as bytes"), ("left out", "left out")):
        rows = [e for e in summary.entries if e["kind"] == kind]
        if rows:
            out.print(f"  {_plural(len(rows), 'file')} {label}:", markup=False)
            for e in rows:
                out.print(f"    {e['path']} ({e['reason']})", markup=False)
    links = [e for e in summary.entries if e.get("link")]
    if links:
        what = ("the file it points to (restored as a regular file)" if len(links) == 1
                else "the files they point to (restored as regular files)")
        out.print(f"  {_plural(len(links), 'symbolic link')} archived as {what}:",
                  markup=False)
        for e in links:
            out.print(f"    {e['path']} -> {e['link']}", markup=False)


def _describe_kinds(kinds) -> str:
    names = []
    for kind in kinds:
        name = imagefile.describe(kind)
        if name not in names:
            names.append(name)
    return ", ".join(names) or "-"


@app.command("list")
def list_(
    archive: Annotated[Path, typer.Argument(help="Archive to read.")],
    as_json: JsonOpt = False,
    max_subpixels: LimitOpt = DEFAULT_PIXEL_LIMIT,
    max_entries: EntriesOpt = DEFAULT_ENTRY_LIMIT,
) -> None:
    """List an archive's entries without decoding them."""
    with _guard(None):
        ident, entries = api.read_index(archive, max_subpixels=max_subpixels,
                                        max_entries=max_entries)
        entries = sorted(entries, key=lambda e: e.path)
        rows = []
        for e in entries:
            size = e.length + e.extras_length
            values = subpixels(e.format, e.width, e.height) if e.kind == "image" else 0
            rows.append({"path": e.path, "kind": e.kind, "format": e.format or None,
                         "width": e.width, "height": e.height, "bytes": size,
                         "extras_bytes": e.extras_length, "method": e.method,
                         "parts": list(e.parts), "carries": list(e.carries),
                         "restore_as": e.restore_as, "reason": e.reason or None,
                         "bits_per_subpixel": 8.0 * size / values if values else None})
        if as_json:
            out.print(json.dumps({"model": ident.name, "model_sha256": ident.sha256.hex(),
                                  "model_embedded_bytes": len(ident.embedded),
                                  "entries": rows}), markup=False)
            return
        out.print(f"model {ident.name} sha256 {ident.sha256.hex()[:16]}{_embedded(ident)}",
                  markup=False)
        width = max([len(r["path"]) for r in rows] + [4])
        out.print(f"{'path':<{width}}  {'format':<7} {'width':>5} {'height':>6} {'bytes':>8} "
                  f"{'bpsp':>6}  {'method':<16} notes", markup=False)
        for r, e in zip(rows, entries, strict=True):
            if e.kind == "image":
                method = "+".join(r["parts"]) if e.method == "coded" else e.method
                note = _describe_kinds(e.carries)
                if e.restore_as:
                    note += f"; restored as {e.restore_as}"
                out.print(f"{r['path']:<{width}}  {e.format:<7} {e.width:>5} {e.height:>6} "
                          f"{r['bytes']:>8} {r['bits_per_subpixel']:>6.3f}  {method:<16} {note}",
                          markup=False)
            else:
                label = "file" if e.kind == "file" else "-"
                method = "kept" if e.kind == "file" else "left out"
                out.print(f"{r['path']:<{width}}  {label:<7} {'':>5} {'':>6} {r['bytes']:>8} "
                          f"{'':>6}  {method:<16} {e.reason}", markup=False)


@app.command()
def decompress(
    archive: Annotated[Path, typer.Argument(help="Archive to read.")],
    output: Annotated[Path, typer.Option("--output", "-o", help="Directory to restore into.")],
    model: ModelOpt = None,
    force: Annotated[bool, typer.Option("--force", help="Replace existing files.")] = False,
    quiet: QuietOpt = False,
    batch: BatchOpt = api.DEFAULT_BATCH,
    threads: ThreadsOpt = None,
    max_subpixels: LimitOpt = DEFAULT_PIXEL_LIMIT,
    max_entries: EntriesOpt = DEFAULT_ENTRY_LIMIT,
    paths: Annotated[list[str] | None, typer.Argument(
        help="Entries to restore, by their paths in the archive (default: all).")] = None,
) -> None:
    """Restore every file (or those named) under its path.

    Images come back with the same values, palette, transparency and metadata; kept
    files byte for byte."""
    with _guard(threads):
        _, entries = api.read_index(archive, max_subpixels=max_subpixels,
                                    max_entries=max_entries)
        if paths:
            entries = [e for e in entries if e.path in set(paths)]
        with _bar("decoding rows", _rows_total(entries), quiet) as tick:
            restored = api.decompress(archive, output, model=model, force=force, batch=batch,
                                      progress=tick, only=paths or None,
                                      max_subpixels=max_subpixels, max_entries=max_entries)
        for line in restored.failed:
            err.print(f"rowcast: {line}", markup=False)
        if not quiet:
            out.print(f"{output}: restored {_plural(len(restored.written), 'file')}", markup=False)
            for e in restored.left_out:
                out.print(f"  not restored, left out when archived: {e.path} ({e.reason})",
                          markup=False)
        if restored.failed:
            err.print(f"rowcast: error: {_plural(len(restored.failed), 'entry')} could not be "
                      "restored", markup=False)
            raise typer.Exit(1)


@app.command()
def verify(
    archive: Annotated[Path, typer.Argument(help="Archive to check.")],
    against: Annotated[Path | None, typer.Option("--against", help="Compare every file with "
                                                 "those in this directory.")] = None,
    model: ModelOpt = None,
    quiet: QuietOpt = False,
    as_json: JsonOpt = False,
    batch: BatchOpt = api.DEFAULT_BATCH,
    threads: ThreadsOpt = None,
    max_subpixels: LimitOpt = DEFAULT_PIXEL_LIMIT,
    max_entries: EntriesOpt = DEFAULT_ENTRY_LIMIT,
) -> None:
    """Decode everything; exit 0 only if every checksum (and every file) matches."""
    with _guard(threads):
        if against is not None and not against.is_dir():
            raise UsageError(f"{against}: not a directory (--against)")
        _, entries = api.read_index(archive, max_subpixels=max_subpixels,
                                    max_entries=max_entries)
        with _bar("verifying rows", _rows_total(entries), quiet or as_json) as tick:
            check = api.verify(archive, against=against, model=model, batch=batch, progress=tick,
                               max_subpixels=max_subpixels, max_entries=max_entries)
        if as_json:
            out.print(json.dumps({"ok": check.ok, "checked": check.checked,
                                  "problems": check.problems}), markup=False)
        else:
            for line in check.problems:
                err.print(f"rowcast: {line}", markup=False)
            if not quiet and check.ok:
                what = f"and identical to {against}" if against else "checksums match"
                out.print(f"{archive}: {_plural(check.checked, 'entry')} decoded, {what}",
                          markup=False)
        if not check.ok:
            raise typer.Exit(1)


@app.command()
def bench(
    inputs: Annotated[list[Path], typer.Argument(help="Image files and/or directories.")],
    model: ModelOpt = None,
    codecs: Annotated[str | None, typer.Option(
        "--codecs", metavar="LIST", help="Comma list of baselines to measure beside rowcast: "
        f"{', '.join(measure.BY_NAME)} (default: all).")] = None,
    json_file: Annotated[Path | None, typer.Option(
        "--json", metavar="FILE", help="Write every figure, per image and in total.")] = None,
    csv_file: Annotated[Path | None, typer.Option(
        "--csv", metavar="FILE", help="Write a row per image and codec.")] = None,
    plot_file: Annotated[Path | None, typer.Option(
        "--plot", metavar="FILE", help="Write a PNG chart (needs matplotlib).")] = None,
    force: Annotated[bool, typer.Option("--force", help="Replace existing output files.")] = False,
    threads: ThreadsOpt = None,
) -> None:
    """Measure rowcast and conventional lossless codecs on the same images.

    Bytes, bits per subpixel, encode and decode speed; every round trip is decoded and
    compared."""
    with _guard(threads):
        try:
            baselines = measure.choose(codecs)
        except ValueError as exc:
            raise UsageError(f"--codecs: {exc}") from None
        for target in (json_file, csv_file, plot_file):
            if target is not None:
                api.check_destination(target, force)
        if plot_file is not None and importlib.util.find_spec("matplotlib") is None:
            raise UsageError(f"{plot_file}: --plot needs matplotlib "
                             "(pip install 'rowcast[bench]')")
        found = [f for f in api.collect_inputs(inputs) if f.action == "image"]
        if not found:
            raise UsageError(f"{', '.join(map(str, inputs))}: no images found")
        engine = measure.load_engine(model)
        pictures = ((f.name, measure.read_image(f.path)) for f in found)
        with _bar("measuring", len(found), False) as tick:
            measured = measure.measure_all(engine, pictures, baselines, tick)
        data = measure.report(measured, baselines, engine.model.name)
        if json_file is not None:
            measure.write_atomic(json_file, json.dumps(data, indent=1).encode())
        if csv_file is not None:
            measure.write_atomic(csv_file, measure.csv_text(measured).encode())
        if plot_file is not None:
            measure.write_atomic(plot_file, measure.plot_png(data))
        table = Table(title=f"{_plural(len(measured), 'image')}, model {engine.model.name}",
                      box=box.SIMPLE_HEAD, pad_edge=False)
        for column in ("codec", "images", "bytes", "bits/subpx", "enc MP/s", "dec MP/s",
                       "skip", "fail"):
            table.add_column(column, justify="left" if column == "codec" else "right",
                             no_wrap=True)
        for row in data["total"].values():
            bpsp, enc, dec = (row[k] for k in ("bits_per_subpixel", "encode_mps", "decode_mps"))
            table.add_row(row["codec"], str(row["images"]), str(row["bytes"]),
                          "-" if bpsp is None else f"{bpsp:.3f}",
                          "-" if enc is None else f"{enc:.3f}",
                          "-" if dec is None else f"{dec:.3f}",
                          str(row["skipped"]), str(row["failed"]))
        out.print(table)
        ours = data["total"][measure.ROWCAST]
        if ours["payload_to_cross_entropy"] is not None:
            out.print(f"rowcast: model cross-entropy {ours['cross_entropy_bits']:.0f} bits; "
                      f"payloads {ours['payload_to_cross_entropy']:.4f} times it; extras "
                      f"{ours['extras_bytes']} bytes", markup=False)
        skipped: dict[tuple[str, str], int] = {}
        for m in measured:
            for f in m.figures.values():
                if f.status == "failed":
                    err.print(f"rowcast: {m.path}: {f.codec} failed: {f.reason}", markup=False)
                elif f.status == "skipped":
                    skipped[(f.codec, f.reason)] = skipped.get((f.codec, f.reason), 0) + 1
        for (name, reason), count in skipped.items():
            out.print(f"  {name} skipped {_plural(count, 'image')}: {reason}", markup=False)
        if ours["failed"]:
            raise DataError(f"{', '.join(map(str, inputs))}: rowcast's own round trip failed "
                            f"on {_plural(ours['failed'], 'image')}")


@app.command("costmap")
def cost_map_command(
    image: Annotated[Path, typer.Argument(help="Image file (8-bit or 1-bit formats).")],
    output: Annotated[Path, typer.Option("--output", "-o", help="PNG to write.")],
    model: ModelOpt = None,
    planes: Annotated[bool, typer.Option("--planes", help="A heat map per plane.")] = False,
    force: Annotated[bool, typer.Option("--force", help="Replace an existing file.")] = False,
    threads: ThreadsOpt = None,
) -> None:
    """Draw an image beside a map of the bits spent on each pixel.

    The map sums to the model's cross-entropy for the image (needs matplotlib)."""
    with _guard(threads):
        api.check_destination(output, force)
        if importlib.util.find_spec("matplotlib") is None:
            raise UsageError(f"{output}: costmap needs matplotlib "
                             "(pip install 'rowcast[bench]')")
        picture = measure.read_image(image)
        engine = measure.load_engine(model)
        try:
            costs = costmap.cost_map(engine, picture)
        except ValueError as exc:
            raise DataError(f"{image}: {exc}") from None
        subpixels = picture.values.size
        title = (f"{image.name}: {costs.cross_entropy:.0f} bits, "
                 f"{costs.cross_entropy / subpixels:.3f} per subpixel, model {engine.model.name}")
        measure.write_atomic(output, costmap.render_png(picture, costs, title, planes))
        out.print(f"{output}: cost map of {image}: {costs.cross_entropy:.1f} bits by the model "
                  f"({costs.cross_entropy / subpixels:.3f} per subpixel) and "
                  f"{costs.tuning_bits:.1f} bits of tuning", markup=False)


@app.command("train")
def train_command(
    inputs: Annotated[list[Path], typer.Argument(help="Directories (or files) of images to "
                                                 "learn from.")],
    output: Annotated[Path, typer.Option("--output", "-o", help="Model file to write.")],
    minutes: Annotated[float, typer.Option("--minutes", help="Training time in minutes.")] = 10.0,
    held_out: Annotated[Path | None, typer.Option(
        "--held-out", metavar="DIR", help="Measure on the images in DIR, never trained on "
        "(default: every 5th file of the inputs in path order).")] = None,
    start: Annotated[str | None, typer.Option(
        "--from", metavar="MODEL", help="Model file or bundled model name to continue from "
        "(default: default).")] = None,
    scratch: Annotated[bool, typer.Option("--from-scratch", help="Start from a new network "
                                          "(hours on a CPU).")] = False,
    preset: Annotated[str | None, typer.Option(
        "--preset", metavar="NAME", help="With --from-scratch, the network: standard (the "
        "bundled model's), fast (half its head: decodes faster), small (for quick trials); "
        "default standard.")] = None,
    stop_early: Annotated[bool, typer.Option(
        "--stop-early", help="Stop once the held-out files' bits stop improving (three "
        "checks in a row, ten a run) and keep the best; --minutes is then the most.")] = False,
    name: Annotated[str | None, typer.Option("--name", help="The model's name (default: the "
                                             "output file's stem).")] = None,
    device: Annotated[str, typer.Option("--device", help="Where training runs: cpu, or a "
                                        "torch device such as cuda.")] = "cpu",
    quiet: QuietOpt = False,
    as_json: JsonOpt = False,
    force: Annotated[bool, typer.Option("--force", help="Replace an existing file.")] = False,
) -> None:
    """Adapt a model to your own images and write it as a model file.

    Trains on gray and colour images (16-bit ones as the 8-bit planes the predictor codes
    for them), holds part of them out, and reports what the held-out files take coded with
    the new model, the starting one, PNG and JPEG XL."""
    with _guard(None):
        if start is not None and scratch:
            raise UsageError("--from and --from-scratch: give one of them")
        if preset is not None and not scratch:
            raise UsageError("--preset: only with --from-scratch (a model keeps its network)")
        if importlib.util.find_spec("torch") is None:
            raise UsageError(f"{output}: rowcast train needs torch (pip install "
                             "'rowcast[train]'; its CPU build is enough)")
        from rich.live import Live

        from rowcast import trainjob
        from rowcast.train import PRESETS

        if (preset or "standard") not in PRESETS:
            raise UsageError(f"--preset {preset}: not one of {', '.join(PRESETS)}")
        job = trainjob.Job(tuple(inputs), output, minutes, held_out,
                           None if scratch else start or "default", name, device, force,
                           stop_early, preset or "standard")
        state = trainjob.Progress(minutes * 60)
        live = not (quiet or as_json) and err.is_terminal
        with Live(state, console=err, transient=True) if live else contextlib.nullcontext():
            report = trainjob.run(job, state.update)
        if as_json:
            out.print(json.dumps(report.as_json()), markup=False)
        elif not quiet:
            for item in report.summary():
                out.print(item, markup=False)


def _stop(signum: int, frame) -> None:
    """SIGTERM and SIGHUP unwind like ^C, so every temporary file and folder is removed.

    Not inside one of llvmlite's ctypes callbacks (numba compiling or loading its cache):
    an exception raised there is printed and dropped, and the command would run on, so
    the stop is tried again by SIGALRM every 50 ms until it is outside them."""
    if _in_compiler_callback(frame):
        signal.signal(signal.SIGALRM, _stop)
        signal.setitimer(signal.ITIMER_REAL, 0.05)
        return
    raise KeyboardInterrupt


def _in_compiler_callback(frame) -> bool:
    """Whether a frame or one of its callers is llvmlite's execution engine code."""
    while frame is not None:
        path = frame.f_code.co_filename.replace("\\", "/")
        if "llvmlite/" in path and path.endswith("executionengine.py"):
            return True
        frame = frame.f_back
    return False


def main() -> None:
    """Console entry point: usage errors and bugs also end as one line on stderr."""
    for stop in (signal.SIGTERM, signal.SIGHUP):
        signal.signal(stop, _stop)
    try:
        code = app(standalone_mode=False)
    except (typer.Abort, KeyboardInterrupt):
        print("rowcast: interrupted; nothing was written", file=sys.stderr)
        code = 130
    except OSError as exc:
        print(f"rowcast: error: {exc.filename or ''}: {exc.strerror or exc}", file=sys.stderr)
        code = 1
    except MemoryError:
        print("rowcast: error: out of memory; nothing was written (--max-subpixels lowers "
              "the largest image an archive may declare)", file=sys.stderr)
        code = 1
    except Exception as exc:
        if hasattr(exc, "format_message") and hasattr(exc, "exit_code"):  # a usage error
            print(f"rowcast: error: {exc.format_message()} (see rowcast --help)", file=sys.stderr)
            code = exc.exit_code
        else:  # a bug, not a user error: still one line, never a traceback
            print(f"rowcast: internal error: {exc.__class__.__name__}: {exc}", file=sys.stderr)
            code = 1
    sys.exit(code or 0)
