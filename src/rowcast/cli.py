"""The `rowcast` command: compress, list, decompress, verify.

Exit status: 0 success, 1 a data or verification failure, 2 a usage error. Every error is
one line on stderr that names the file and the reason.
"""

from __future__ import annotations

import contextlib
import json
import sys
from collections.abc import Iterator
from pathlib import Path
from typing import Annotated

import typer
from rich.console import Console
from rich.progress import BarColumn, MofNCompleteColumn, Progress, TextColumn, TimeElapsedColumn

from rowcast import api, archive
from rowcast.errors import RowcastError, UsageError
from rowcast.planes import PLANES

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
ThreadsOpt = Annotated[int | None, typer.Option("--threads", min=1, help="CPU threads.")]


def _fail(exc: RowcastError) -> None:
    err.print(f"rowcast: error: {exc}", markup=False)
    raise typer.Exit(exc.exit_code)


@contextlib.contextmanager
def _guard(threads: int | None) -> Iterator[None]:
    """Apply the thread count; turn our errors into one line and an exit status."""
    if threads:
        import torch

        torch.set_num_threads(threads)
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
    columns = (TextColumn(label), BarColumn(), MofNCompleteColumn(), TimeElapsedColumn())
    with Progress(*columns, console=err, transient=True) as bar:
        task = bar.add_task(label, total=total)
        yield lambda n: bar.update(task, advance=n)


def _rows_total(entries) -> int:
    return sum(e.height for e in entries if e.method != "stored")


@app.command()
def compress(
    inputs: Annotated[list[Path], typer.Argument(help="Image files and/or directories.")],
    output: Annotated[Path, typer.Option("--output", "-o", help="Archive to write.")],
    model: ModelOpt = None,
    force: Annotated[bool, typer.Option("--force", help="Replace an existing archive.")] = False,
    quiet: QuietOpt = False,
    as_json: JsonOpt = False,
    threads: ThreadsOpt = None,
    format_version: Annotated[int, typer.Option(
        "--format-version", help="Archive format to write: 6, or 5, 4, 3, 2, 1 so "
        "that rowcast 0.7, 0.4, 0.3, 0.2, 0.1 can read it (larger archives).")] = archive.VERSION,
) -> None:
    """Compress images into one archive."""
    with _guard(threads):
        total = len(api.collect_inputs(inputs))
        with _bar("compressing", total, quiet or as_json) as tick:
            summary = api.compress(inputs, output, model=model, force=force, progress=tick,
                                   version=format_version)
        if as_json:
            out.print(json.dumps({"archive": str(summary.archive), "bytes": summary.archive_bytes,
                                  "bits_per_subpixel": summary.bits_per_subpixel,
                                  "model": summary.model.name, "entries": summary.entries}),
                      markup=False)
        elif not quiet:
            raw = summary.subpixels
            out.print(f"{output}: {len(summary.entries)} images, {raw} bytes of pixels -> "
                      f"{summary.archive_bytes} bytes ({summary.bits_per_subpixel:.3f} bits per "
                      f"subpixel, model {summary.model.name})", markup=False)


@app.command("list")
def list_(
    archive: Annotated[Path, typer.Argument(help="Archive to read.")],
    as_json: JsonOpt = False,
) -> None:
    """List an archive's entries without decoding them."""
    with _guard(None):
        ident, entries = api.read_index(archive)
        rows = [{"path": e.path, "width": e.width, "height": e.height, "mode": e.mode,
                 "bytes": e.length, "method": e.method,
                 "bits_per_subpixel": 8.0 * e.length / (e.width * e.height * PLANES[e.mode])}
                for e in entries]
        if as_json:
            out.print(json.dumps({"model": ident.name, "model_sha256": ident.sha256.hex(),
                                  "entries": rows}), markup=False)
            return
        out.print(f"model {ident.name} sha256 {ident.sha256.hex()[:16]}", markup=False)
        width = max([len(r["path"]) for r in rows] + [4])
        out.print(f"{'path':<{width}}  {'width':>5} {'height':>6} {'mode':<4} {'bytes':>8} "
                  f"{'bpsp':>6}  method", markup=False)
        for r in rows:
            out.print(f"{r['path']:<{width}}  {r['width']:>5} {r['height']:>6} {r['mode']:<4} "
                      f"{r['bytes']:>8} {r['bits_per_subpixel']:>6.3f}  {r['method']}",
                      markup=False)


@app.command()
def decompress(
    archive: Annotated[Path, typer.Argument(help="Archive to read.")],
    output: Annotated[Path, typer.Option("--output", "-o", help="Directory to restore into.")],
    model: ModelOpt = None,
    force: Annotated[bool, typer.Option("--force", help="Replace existing files.")] = False,
    quiet: QuietOpt = False,
    batch: BatchOpt = api.DEFAULT_BATCH,
    threads: ThreadsOpt = None,
) -> None:
    """Restore every image as a PNG, with the same relative paths and the same pixels."""
    with _guard(threads):
        _, entries = api.read_index(archive)
        with _bar("decoding rows", _rows_total(entries), quiet) as tick:
            written = api.decompress(archive, output, model=model, force=force, batch=batch,
                                     progress=tick)
        if not quiet:
            out.print(f"{output}: restored {len(written)} images", markup=False)


@app.command()
def verify(
    archive: Annotated[Path, typer.Argument(help="Archive to check.")],
    against: Annotated[Path | None, typer.Option("--against", help="Compare every pixel with "
                                                 "the images in this directory.")] = None,
    model: ModelOpt = None,
    quiet: QuietOpt = False,
    as_json: JsonOpt = False,
    batch: BatchOpt = api.DEFAULT_BATCH,
    threads: ThreadsOpt = None,
) -> None:
    """Decode everything; exit 0 only if every checksum (and every pixel) matches."""
    with _guard(threads):
        if against is not None and not against.is_dir():
            raise UsageError(f"{against}: not a directory (--against)")
        _, entries = api.read_index(archive)
        with _bar("verifying rows", _rows_total(entries), quiet or as_json) as tick:
            check = api.verify(archive, against=against, model=model, batch=batch, progress=tick)
        if as_json:
            out.print(json.dumps({"ok": check.ok, "checked": check.checked,
                                  "problems": check.problems}), markup=False)
        else:
            for line in check.problems:
                err.print(f"rowcast: {line}", markup=False)
            if not quiet and check.ok:
                what = f"and identical to {against}" if against else "checksums match"
                out.print(f"{archive}: {check.checked} images decoded, {what}", markup=False)
        if not check.ok:
            raise typer.Exit(1)


def main() -> None:
    """Console entry point: usage errors and bugs also end as one line on stderr."""
    try:
        code = app(standalone_mode=False)
    except typer.Abort:
        print("rowcast: interrupted; nothing was written", file=sys.stderr)
        code = 130
    except OSError as exc:
        print(f"rowcast: error: {exc.filename or ''}: {exc.strerror or exc}", file=sys.stderr)
        code = 1
    except Exception as exc:
        if hasattr(exc, "format_message") and hasattr(exc, "exit_code"):  # a usage error
            print(f"rowcast: error: {exc.format_message()} (see rowcast --help)", file=sys.stderr)
            code = exc.exit_code
        else:  # a bug, not a user error: still one line, never a traceback
            print(f"rowcast: internal error: {exc.__class__.__name__}: {exc}", file=sys.stderr)
            code = 1
    sys.exit(code or 0)
