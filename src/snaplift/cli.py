"""Command line: parse, call one library function, print. Heavy imports inside commands."""

from __future__ import annotations

import functools
import sys
from pathlib import Path
from typing import Annotated, Any, Callable, Optional

import typer

app = typer.Typer(
    name="snaplift",
    help="Reduce simulation archives to modes, frequencies, growth rates and linear surrogates.",
    no_args_is_help=True,
    add_completion=False,
    pretty_exceptions_enable=False,
)


def _user_errors(function: Callable[..., Any]) -> Callable[..., Any]:
    """Print user errors as one line on stderr and exit 2; never a traceback."""

    @functools.wraps(function)
    def wrapper(*args: Any, **kwargs: Any) -> Any:
        from snaplift.errors import SnapliftError

        try:
            return function(*args, **kwargs)
        except SnapliftError as error:
            typer.echo(f"snaplift: error: {error}", err=True)
            raise typer.Exit(2) from None
        except NotImplementedError as error:  # a valid request this version does not support
            typer.echo(f"snaplift: not supported yet: {error}", err=True)
            raise typer.Exit(2) from None
        except KeyboardInterrupt:
            typer.echo("snaplift: interrupted; nothing was committed to the result store", err=True)
            raise typer.Exit(130) from None

    return wrapper


def _console(quiet: bool = False):
    import shutil

    from rich.console import Console

    # the spectrum table needs ~110 columns; cropping its digits would be worse than wrapping
    width = max(112, shutil.get_terminal_size((112, 24)).columns)
    return Console(stderr=False, quiet=quiet, width=width)


@app.command()
@_user_errors
def demo(
    size: Annotated[str, typer.Option(help="'small', 'default', or a size such as 500MB, 4GiB")] = "default",
    output: Annotated[Optional[Path], typer.Option(help="folder for the archive and results (default: cache)")] = None,
    quiet: Annotated[bool, typer.Option("--quiet", "-q", help="print only the result path")] = False,
) -> None:
    """Generate the fin-in-a-duct demo archive (once, cached) and reduce it.

    Example: snaplift demo --size small
    """
    from snaplift.demo.run import run_demo

    console = _console(quiet)
    summary, table = run_demo(size=size, folder=output, progress=console.print)
    console.print(table)
    console.print(f"results: {summary.path}  ({summary.passes} passes over the archive)")
    if quiet:
        typer.echo(str(summary.path))


@app.command()
@_user_errors
def run(
    workflow: Annotated[Path, typer.Argument(help="workflow YAML file")],
    overwrite: Annotated[bool, typer.Option(help="replace a result store written by a different workflow")] = False,
    dry_run: Annotated[bool, typer.Option("--dry-run", help="validate and say what would be written")] = False,
    quiet: Annotated[bool, typer.Option("--quiet", "-q", help="no progress display; print only the result path")] = False,
    log: Annotated[Optional[Path], typer.Option("--log", help="append time-stamped progress lines to this file (batch jobs)")] = None,
) -> None:
    """Run a workflow file: scan, compress, fit, modes, report -> result store.

    Finished stages are reused: a second run after changing only `fit` reads nothing
    from the archive. A run stopped by Ctrl-C, SIGTERM or a kill resumes when started
    again. One run at a time per result store.

    Example: snaplift run workflows/fin-duct.yaml --log run.log
    """
    from snaplift.workflow.progress import ProgressReporter
    from snaplift.workflow.runner import RunInterrupted, run_workflow
    from snaplift.workflow.schema import load_workflow, resolve_path

    if dry_run:
        wf, _, folder = load_workflow(workflow)
        output = resolve_path(folder, wf.output.path)
        typer.echo(f"workflow {workflow} is valid; it would write {output} (staging in {output}.staging, "
                   f"lease {output}.lease) on a {wf.cluster.kind!r} cluster")
        return
    reporter = ProgressReporter(console=_console(quiet), quiet=quiet, log_file=log)
    try:
        summary = run_workflow(workflow, overwrite=overwrite, reporter=reporter)
        for warning in summary.warnings:
            reporter.message(f"warning: {warning}")
    except RunInterrupted as stop:
        reporter.close()
        typer.echo(f"snaplift: {stop}", err=True)
        raise typer.Exit(130) from None
    finally:
        reporter.close()
    statuses = ", ".join(f"{name} {record.get('status')}" for name, record in summary.stages.items())
    if quiet:
        typer.echo(str(summary.path))
    else:
        _console().print(f"results: {summary.path}  ({statuses}; {summary.passes} passes for the result, "
                         f"{summary.bytes_read / 1e6:.1f} MB read in this run)")


@app.command()
@_user_errors
def scan(
    archive: Annotated[list[str], typer.Argument(help="archive path or glob of per-snapshot files; several paths: one run each")],
    fields: Annotated[Optional[str], typer.Option(help="comma-separated fields (default: all)")] = None,
    time: Annotated[Optional[str], typer.Option(help="dataset of snapshot times")] = None,
    step: Annotated[Optional[float], typer.Option(help="fixed time step if there is no time dataset")] = None,
    memory: Annotated[str, typer.Option(help="memory budget used to plan tiles")] = "2GiB",
    method: Annotated[str, typer.Option(help="compress method the plan is for: sketch | randomized | tsqr")] = "randomized",
    rank: Annotated[int, typer.Option(help="compress rank the plan is for")] = 40,
    full: Annotated[bool, typer.Option("--full", help="also count NaN/Inf in every value")] = False,
    json_output: Annotated[bool, typer.Option("--json", help="print JSON instead of a table")] = False,
) -> None:
    """Describe an archive: fields, chunks, times, size, tile plan.

    Example: snaplift scan fin-duct.h5 --fields u,v,T --time t   (or: snaplift scan run1.h5 run2.h5)
    """
    from snaplift.archive import open_archive, scan_archive
    from snaplift.report.scan import render_scan, scan_json
    from snaplift.workflow.schema import parse_bytes

    target = archive[0] if len(archive) == 1 else archive
    chosen = [f.strip() for f in fields.split(",")] if fields else None
    reader = open_archive(target, fields=chosen, time=time)
    if chosen is None and not reader.describe().fields:  # an archive of probes: 1-D datasets
        from snaplift.archive.probes import probe_names

        chosen = probe_names(reader.describe(), time) or None
        reader = open_archive(target, fields=chosen, time=time) if chosen else reader
    from snaplift.errors import ConfigError

    if method not in ("sketch", "randomized", "tsqr"):
        raise ConfigError(f"--method {method!r} is not a compress method; use sketch, randomized or tsqr")
    if rank < 1:
        raise ConfigError(f"--rank must be >= 1; got {rank}")
    from snaplift.cluster import resident_memory

    # the plan compress makes under the default 'threads' cluster: this process's baseline
    # (interpreter, libraries) is part of the budget (compress.memory bounds the process tree)
    report = scan_archive(reader, fields=chosen, time=time, step=step, full=full,
                          memory_bytes=parse_bytes(memory), method=method, rank=rank,
                          baseline_bytes=resident_memory().reserve())
    if json_output:
        typer.echo(scan_json(report))
    else:
        _console().print(render_scan(report))


@app.command()
@_user_errors
def spectrum(
    result: Annotated[Path, typer.Argument(help="result store (.zarr)")],
    sort: Annotated[str, typer.Option(help="amplitude | frequency | growth | residual | ranking")] = "amplitude",
    all_modes: Annotated[bool, typer.Option("--all", help="show every mode")] = False,
    json_output: Annotated[bool, typer.Option("--json", help="print JSON instead of a table")] = False,
) -> None:
    """Print the spectrum of a result store (sorted by amplitude).

    Example: snaplift spectrum results/fin-duct.zarr --json
    """
    from snaplift.errors import ConfigError
    from snaplift.report.table import render_spectrum, spectrum_json

    if sort not in ("amplitude", "frequency", "growth", "residual", "ranking"):
        raise ConfigError(f"--sort {sort!r} is not allowed; use amplitude, frequency, growth, residual or ranking "
                          "(trusted modes first, then by amplitude)")
    if json_output:
        typer.echo(spectrum_json(result, sort=sort))
    else:
        _console().print(render_spectrum(result, sort=sort, limit=None if all_modes else 20))


@app.command()
@_user_errors
def bench(
    size: Annotated[str, typer.Option(help="synthetic archive size, e.g. 1GiB, 4GiB")] = "4GiB",
    rank: Annotated[int, typer.Option(help="compress.rank")] = 40,
    memory: Annotated[str, typer.Option(help="compress.memory budget of the tile plan")] = "2GiB",
    workers: Annotated[int, typer.Option(help="worker threads / processes")] = 2,
    folder: Annotated[Optional[Path], typer.Option(help="where to write the archive (default: a temporary folder)")] = None,
    methods: Annotated[str, typer.Option(help="comma-separated: sketch, randomized, tsqr")] = "sketch,randomized",
    quick: Annotated[bool, typer.Option("--quick", help="skip zarr, worker processes and dask's svd_compressed")] = False,
    repeats: Annotated[int, typer.Option(help="runs of each compress case; the fastest is reported")] = 2,
    cold: Annotated[bool, typer.Option("--cold", help="drop the page cache before every timed read (Linux, root): "
                                                      "time the disk, as for an archive larger than memory")] = False,
    keep: Annotated[bool, typer.Option("--keep", help="keep the archive afterwards")] = False,
    dry_run: Annotated[bool, typer.Option("--dry-run", help="say what would be written and stop")] = False,
    json_output: Annotated[bool, typer.Option("--json", help="print JSON instead of a table")] = False,
) -> None:
    """Time compress against the floor on a synthetic time-major archive (your file system, your cores).

    Writes an invented HDF5 archive of --size (and a zarr copy) to --folder, removed afterwards
    unless --keep. Example: snaplift bench --size 1GiB --quick
    """
    import json

    from snaplift.errors import ConfigError
    from snaplift.linalg.bench import BenchSettings, render_benchmark, run_benchmark
    from snaplift.workflow.schema import parse_bytes

    try:
        size_bytes, memory_bytes = parse_bytes(size), parse_bytes(memory)
    except ValueError as error:
        raise ConfigError(f"--size/--memory: {error}") from None
    chosen = tuple(m.strip() for m in methods.split(",") if m.strip())
    unknown = sorted(set(chosen) - {"sketch", "randomized", "tsqr"})
    if unknown or not chosen:
        raise ConfigError(f"--methods {methods!r}: allowed are sketch, randomized, tsqr")
    if repeats < 1:
        raise ConfigError(f"--repeats must be >= 1; got {repeats}")
    where = str(folder) if folder else "a temporary folder"
    extra = "" if quick else " and a zarr copy of the same size"
    typer.echo(f"bench writes a {size_bytes / 2**30:.2f} GiB HDF5 archive{extra} to {where}", err=True)
    if dry_run:
        return
    settings = BenchSettings(size_bytes=size_bytes, rank=rank, memory_bytes=memory_bytes, workers=workers,
                             folder=str(folder) if folder else None, methods=chosen, zarr=not quick,
                             clusters=not quick, dask=not quick, keep=keep, repeats=repeats, cold=cold)
    figures = run_benchmark(settings, progress=None if json_output else lambda m: typer.echo(m, err=True))
    if json_output:
        typer.echo(json.dumps(figures, default=lambda v: v.tolist() if hasattr(v, "tolist") else str(v), indent=2))
    else:
        typer.echo(render_benchmark(figures))


def main() -> None:  # pragma: no cover - console entry point
    app()


if __name__ == "__main__":  # pragma: no cover
    sys.exit(app())
