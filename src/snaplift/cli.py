"""Command line: parse, call one library function, print. Heavy imports inside commands."""

from __future__ import annotations

import atexit
import functools
import os
import sys
from collections.abc import Callable
from pathlib import Path
from typing import Annotated, Any

import typer
from typer.core import TyperGroup

from snaplift.compress_methods import METHOD_NAMES, methods_help
from snaplift.fit_methods import fit_methods_help


class _OneLineUsageErrors(TyperGroup):
    """Usage errors (a missing or extra argument, an unknown option) as one line on stderr,
    like every other user error, with the command's help named; exit status 2."""

    def main(self, *args: Any, **kwargs: Any) -> Any:
        try:  # recent typer vendors click; its exceptions are typer's own
            from typer._click import exceptions as click
        except ImportError:  # pragma: no cover - typer that uses click itself
            from click import exceptions as click  # type: ignore[no-redef]

        kwargs["standalone_mode"] = False
        try:
            code = super().main(*args, **kwargs)
        except click.NoArgsIsHelpError as error:  # bare 'snaplift': the help
            error.show()
            sys.exit(error.exit_code)
        except click.UsageError as error:
            command = error.ctx.command_path if error.ctx is not None else "snaplift"
            message = " ".join(error.format_message().split())
            typer.echo(f"snaplift: error: {message} (see '{command} --help')", err=True)
            sys.exit(2)
        except click.ClickException as error:
            typer.echo(f"snaplift: error: {' '.join(error.format_message().split())}", err=True)
            sys.exit(error.exit_code)
        except typer.Abort:
            typer.echo("snaplift: interrupted", err=True)
            sys.exit(130)
        sys.exit(code if isinstance(code, int) else 0)


def _version(value: bool) -> None:
    if value:
        from snaplift import __version__

        typer.echo(f"snaplift {__version__}")
        raise typer.Exit()


app = typer.Typer(
    cls=_OneLineUsageErrors,
    name="snaplift",
    help="Reduce simulation archives to modes, frequencies, growth rates and linear surrogates.",
    no_args_is_help=True,
    add_completion=False,
    pretty_exceptions_enable=False,
)


@app.callback()
def _options(
    version: Annotated[bool, typer.Option("--version", callback=_version, is_eager=True,
                                          help="print the version of snaplift and exit")] = False,
) -> None:
    """Reduce simulation archives to modes, frequencies, growth rates and linear surrogates."""


def _user_errors(function: Callable[..., Any]) -> Callable[..., Any]:
    """Print user errors as one line on stderr and exit 2; never a traceback."""

    @functools.wraps(function)
    def wrapper(*args: Any, **kwargs: Any) -> Any:
        from snaplift.errors import SnapliftError, one_line

        try:
            return function(*args, **kwargs)
        except SnapliftError as error:
            typer.echo(f"snaplift: error: {one_line(error)}", err=True)
            raise typer.Exit(2) from None
        except NotImplementedError as error:  # a valid request this version does not support
            typer.echo(f"snaplift: not supported yet: {one_line(error)}", err=True)
            raise typer.Exit(2) from None
        except OSError as error:  # the file system refused (disk full, read-only, permissions ...)
            where = f" {error.filename}" if error.filename else ""
            typer.echo(f"snaplift: error: file system error{where}: {one_line(error.strerror or error)}; "
                       "nothing was committed to the result store; fix the cause and run again", err=True)
            raise typer.Exit(2) from None
        except KeyboardInterrupt:
            typer.echo("snaplift: interrupted; nothing was committed to the result store", err=True)
            raise typer.Exit(130) from None

    return wrapper


def _console(quiet: bool = False, columns: int = 112):
    import shutil

    from rich.console import Console

    # the spectrum table needs ~110 columns; cropping its digits would be worse than wrapping
    width = max(columns, shutil.get_terminal_size((columns, 24)).columns)
    return Console(stderr=False, quiet=quiet, width=width)


@app.command()
@_user_errors
def demo(
    size: Annotated[str, typer.Option(help="'small', 'default', or a size such as 500MB, 4GiB")] = "default",
    output: Annotated[Path | None, typer.Option(help="folder for the archive and results (default: cache)")] = None,
    quiet: Annotated[bool, typer.Option("--quiet", "-q", help="print only the result path")] = False,
    workflow_dir: Annotated[Path | None, typer.Option("--workflow-dir", help="also link the archive into this "
                                                         "folder as fin-duct.h5, where the example workflows "
                                                         "(workflows/) expect it")] = None,
) -> None:
    """Generate the fin-in-a-duct demo archive (once, cached) and reduce it.

    Example: snaplift demo --size small --workflow-dir workflows
    """
    from snaplift.demo.run import run_demo

    console = _console(quiet, columns=166)  # the spectrum with peak columns of u, v, T
    summary, table = run_demo(size=size, folder=output, progress=console.print, workflow_dir=workflow_dir)
    console.print(table)
    console.print(f"results: {summary.path}  ({summary.passes} passes over the archive)")
    if summary.report is not None:
        console.print(f"report: {summary.report}  (open it in a browser)")
    if quiet:
        typer.echo(str(summary.path))


def _run_command(workflow: Path, overwrite: bool, dry_run: bool, quiet: bool, log: Path | None,
                 helper: Any) -> Any:
    """``snaplift run``'s body: the summary of the run, or None after a dry run."""
    from snaplift.workflow.progress import ProgressReporter
    from snaplift.workflow.runner import RunInterrupted, run_workflow
    from snaplift.workflow.schema import load_workflow, resolve_path

    if dry_run:
        import os

        from snaplift.workflow.guards import check_output_path
        from snaplift.workflow.scanning import check_workflow

        wf, _, folder = load_workflow(workflow)
        output = os.path.abspath(resolve_path(folder, wf.output.path))
        check_output_path(Path(output), resolve_path(folder, wf.archive.path))
        _, lines = check_workflow(wf, Path(folder))
        for line in lines:
            typer.echo(line)
        typer.echo(f"workflow {workflow} is valid; it would write {output} (staging in {output}.staging, "
                   f"lease {output}.lease) on a {wf.cluster.kind!r} cluster")
        return None
    # --quiet shows nothing: no console (rich, ~0.03 s of the start) is made for it
    reporter = ProgressReporter(console=None if quiet else _console(quiet), quiet=quiet, log_file=log)
    try:
        summary = run_workflow(workflow, overwrite=overwrite, reporter=reporter, report_helper=helper)
        for warning in summary.warnings:
            reporter.message(f"warning: {warning}")
    except RunInterrupted as stop:
        reporter.close()
        typer.echo(f"snaplift: {stop}", err=True)
        raise typer.Exit(130) from None
    finally:
        reporter.close()
    return summary


@app.command(epilog=f"fit.method choices -- {fit_methods_help()}")
@_user_errors
def run(
    workflow: Annotated[Path, typer.Argument(help="workflow YAML file")],
    overwrite: Annotated[bool, typer.Option(help="recompute every stage from the archive (reuse nothing); also "
                                                 "replace a result store written by a different workflow")] = False,
    dry_run: Annotated[bool, typer.Option("--dry-run", help="validate and say what would be written")] = False,
    quiet: Annotated[bool, typer.Option("--quiet", "-q",
                                        help="no progress display; print only the result path")] = False,
    log: Annotated[Path | None, typer.Option(
        "--log", help="append time-stamped progress lines to this file (batch jobs)")] = None,
) -> None:
    """Run a workflow file: scan, compress, fit, modes, report -> result store.

    Finished stages are reused: a second run after changing only `fit` reads nothing
    from the archive. A run stopped by Ctrl-C, SIGTERM or a kill resumes when started
    again. One run at a time per result store.

    Example: snaplift run workflows/fin-duct.yaml --log run.log
    """
    from snaplift.report.helper import start_for

    # started before the run's own imports (half a second): the helper imports beside them
    helper = None if dry_run else start_for(workflow)
    try:
        summary = _run_command(workflow, overwrite, dry_run, quiet, log, helper)
    finally:
        if helper is not None:
            helper.close()
    if summary is None:
        return
    statuses = ", ".join(f"{name} {record.get('status')}" for name, record in summary.stages.items())
    if quiet:
        typer.echo(str(summary.path))
    else:
        _console().print(f"results: {summary.path}  ({statuses}; {summary.passes} passes for the result, "
                         f"{summary.bytes_read / 1e6:.1f} MB read in this run)")
        if summary.report is not None:
            _console().print(f"report: {summary.report}")


@app.command()
@_user_errors
def scan(
    archive: Annotated[list[str], typer.Argument(
        help="archive path or glob of per-snapshot files; several paths: one run each")],
    fields: Annotated[str | None, typer.Option(help="comma-separated fields (default: all)")] = None,
    time: Annotated[str | None, typer.Option(help="dataset of snapshot times")] = None,
    step: Annotated[float | None, typer.Option(help="fixed time step if there is no time dataset")] = None,
    memory: Annotated[str, typer.Option(help="memory budget used to plan tiles")] = "2GiB",
    method: Annotated[str, typer.Option(help=f"compress method the plan is for ({methods_help()})")] = "randomized",
    rank: Annotated[int, typer.Option(help="compress rank the plan is for")] = 40,
    full: Annotated[bool, typer.Option("--full", help="also count NaN/Inf in every value")] = False,
    json_output: Annotated[bool, typer.Option("--json", help="print JSON instead of a table")] = False,
) -> None:
    """Describe an archive: fields, chunks, times, size, tile plan.

    Example: snaplift scan fin-duct.h5 --fields u,v,T --time t   (or: snaplift scan run1.h5 run2.h5)
    """
    from snaplift.archive import open_archive, scan_archive
    from snaplift.report.scan import render_scan, scan_json
    from snaplift.units import parse_bytes

    target = archive[0] if len(archive) == 1 else archive
    chosen = [f.strip() for f in fields.split(",")] if fields else None
    reader = open_archive(target, fields=chosen, time=time)
    if chosen is None and not reader.describe().fields:  # an archive of probes: 1-D datasets
        from snaplift.archive.probes import probe_names

        chosen = probe_names(reader.describe(), time) or None
        reader = open_archive(target, fields=chosen, time=time) if chosen else reader
    from snaplift.errors import ConfigError

    if method not in METHOD_NAMES:
        raise ConfigError(f"--method {method!r} is not a compress method; use {', '.join(METHOD_NAMES)}")
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
    all_modes: Annotated[bool, typer.Option("--all", help="show every mode (default: the first 20)")] = False,
    field: Annotated[list[str] | None, typer.Option("--field", help="show this field's peak amplitude column "
                                                      "(field units); repeat or comma-separate (default: every "
                                                      "field's, up to 3)")] = None,
    json_output: Annotated[bool, typer.Option("--json", help="print JSON instead of a table")] = False,
) -> None:
    """Print the spectrum of a result store (sorted by amplitude).

    Frequencies in Hz and growth rates in 1/s when the archive's time unit converts to seconds.

    Example: snaplift spectrum results/fin-duct.zarr --field T --field u
    """
    from snaplift.errors import ConfigError
    from snaplift.report.table import render_spectrum, spectrum_json

    if sort not in ("amplitude", "frequency", "growth", "residual", "ranking"):
        raise ConfigError(f"--sort {sort!r} is not allowed; use amplitude, frequency, growth, residual or ranking "
                          "(trusted modes first, then by amplitude)")
    fields = [name.strip() for item in field or [] for name in item.split(",") if name.strip()]
    if json_output:
        typer.echo(spectrum_json(result, sort=sort, fields=fields or None))
    else:
        table = render_spectrum(result, sort=sort, limit=None if all_modes else 20, fields=fields or None)
        _console(columns=112 + 18 * max(len(fields), 3)).print(table)


@app.command()
@_user_errors
def bench(
    size: Annotated[str, typer.Option(help="synthetic archive size, e.g. 1GiB, 4GiB")] = "4GiB",
    rank: Annotated[int, typer.Option(help="compress.rank")] = 40,
    memory: Annotated[str, typer.Option(help="compress.memory budget of the tile plan")] = "2GiB",
    workers: Annotated[int, typer.Option(help="worker threads / processes")] = 2,
    folder: Annotated[Path | None, typer.Option(
        help="where to write the archive (default: a temporary folder)")] = None,
    methods: Annotated[str, typer.Option(help=f"comma-separated: {', '.join(METHOD_NAMES)}")] = "sketch,randomized",
    quick: Annotated[bool, typer.Option(
        "--quick", help="skip zarr, worker processes and dask's svd_compressed")] = False,
    repeats: Annotated[int, typer.Option(help="runs of each compress case; the fastest is reported")] = 2,
    cold: Annotated[bool, typer.Option("--cold", help="drop the page cache before every timed read (Linux, root): "
                                                      "time the disk, as for an archive larger than memory")] = False,
    keep: Annotated[bool, typer.Option("--keep", help="keep the archive afterwards")] = False,
    dry_run: Annotated[bool, typer.Option("--dry-run", help="say what would be written and stop")] = False,
    json_output: Annotated[bool, typer.Option("--json", help="print JSON instead of a table")] = False,
    read_limit: Annotated[str | None, typer.Option("--read-limit", help="time whole commands (dd, snaplift run, "
                          "dask svd_compressed) with reads capped at this rate, e.g. 200MB/s (slowfs-run: Linux, "
                          "root, cgroups)")] = None,
    cache_limit: Annotated[str, typer.Option("--cache-limit", help="page cache of each command under --read-limit")
                           ] = "2.5GiB",
    layouts: Annotated[str, typer.Option(help="chunk layouts of whole commands and --cold: snapshots per chunk, "
                                              "xPIECES to split space, e.g. 1,8,32,8x4")] = "1,32",
) -> None:
    """Time compress against the floor on a synthetic time-major archive (your file system, your cores).

    Writes an invented HDF5 archive of --size (and a zarr copy) to --folder, removed afterwards
    unless --keep. Example: snaplift bench --size 1GiB --quick. With --read-limit the bench
    times whole commands as multiples of one capped read instead (and --cold adds the cold,
    uncapped read rates): snaplift bench --size 2GiB --read-limit 200MB/s --cache-limit 2.5GiB
    """
    import json

    from snaplift.errors import ConfigError
    from snaplift.units import parse_bytes
    from snaplift.workflow.bench import BenchSettings, render_benchmark, run_benchmark

    try:
        size_bytes, memory_bytes = parse_bytes(size), parse_bytes(memory)
    except ValueError as error:
        raise ConfigError(f"--size/--memory: {error}") from None
    chosen = tuple(m.strip() for m in methods.split(",") if m.strip())
    unknown = sorted(set(chosen) - set(METHOD_NAMES))
    if unknown or not chosen:
        raise ConfigError(f"--methods {methods!r}: allowed are {', '.join(METHOD_NAMES)}")
    if repeats < 1:
        raise ConfigError(f"--repeats must be >= 1; got {repeats}")
    if read_limit is not None or cold:
        from snaplift.workflow.bench.archive import parse_layout
        from snaplift.workflow.bench.commands import require_slowfs
        from snaplift.workflow.bench.regime import RegimeSettings, run_regimes
        from snaplift.workflow.bench.render_regime import render_regimes

        try:
            chosen_layouts = tuple(parse_layout(item) for item in layouts.split(",") if item.strip())
            if read_limit is not None:
                parse_bytes(read_limit.removesuffix("/s")), parse_bytes(cache_limit)
        except ValueError as error:
            raise ConfigError(f"--layouts/--read-limit/--cache-limit: {error}") from None
        if not chosen_layouts:
            raise ConfigError(f"--layouts {layouts!r}: give at least one layout, e.g. 1,32")
        cap = require_slowfs(read_limit, cache_limit) if read_limit is not None else None
    where = str(folder) if folder else "a temporary folder"
    extra = ("" if quick else " and a zarr copy of the same size") if read_limit is None else (
        f" per chunk layout ({layouts}), one at a time")
    typer.echo(f"bench writes a {size_bytes / 2**30:.2f} GiB HDF5 archive{extra} to {where}", err=True)
    if dry_run:
        return
    if read_limit is not None:
        regime = RegimeSettings(size_bytes=size_bytes, rank=rank, workers=workers, layouts=chosen_layouts, cap=cap,
                                cold=cold, dask=not quick, clusters=not quick,
                                folder=str(folder) if folder else None, keep=keep, memory=memory, repeats=repeats)
        found = run_regimes(regime, progress=None if json_output else lambda m: typer.echo(m, err=True))
        typer.echo(json.dumps(found, default=str, indent=2) if json_output else render_regimes(found))
        return
    settings = BenchSettings(size_bytes=size_bytes, rank=rank, memory_bytes=memory_bytes, workers=workers,
                             folder=str(folder) if folder else None, methods=chosen, zarr=not quick,
                             clusters=not quick, dask=not quick, keep=keep, repeats=repeats, cold=cold)
    figures = run_benchmark(settings, progress=None if json_output else lambda m: typer.echo(m, err=True))
    if json_output:
        typer.echo(json.dumps(figures, default=lambda v: v.tolist() if hasattr(v, "tolist") else str(v), indent=2))
    else:
        typer.echo(render_benchmark(figures))
    if cold:  # the cold read rates of the compress pass against dd, per layout
        regime = RegimeSettings(size_bytes=size_bytes, rank=rank, workers=workers, layouts=chosen_layouts, cold=True,
                                dask=False, clusters=False, folder=str(folder) if folder else None, keep=keep,
                                memory=memory)
        found = run_regimes(regime, progress=None if json_output else lambda m: typer.echo(m, err=True))
        typer.echo(json.dumps(found, default=str, indent=2) if json_output else "\n" + render_regimes(found))


@app.command()
@_user_errors
def report(
    result: Annotated[Path, typer.Argument(help="result store (.zarr)")],
    out: Annotated[Path | None, typer.Option(help="folder for the page and PNGs (default: RESULT.report)")] = None,
    modes: Annotated[int, typer.Option(help="leading modes drawn per field")] = 4,
) -> None:
    """Write the report of a result store: one self-contained HTML page plus each figure as PNG.

    Writes RESULT.report/index.html (figures embedded, opens from file://, no network).
    Example: snaplift report results/fin-duct.zarr
    """
    from snaplift.errors import ConfigError
    from snaplift.report.page import render_report

    if modes < 1:
        raise ConfigError(f"--modes must be >= 1; got {modes}")
    summary = render_report(result, out, leading=modes)
    typer.echo(f"report: {summary.index}  ({len(summary.figures)} figures, {summary.seconds:.1f} s, "
               f"{summary.archive_values_read} values read from the archive at the probe points)")


@app.command()
@_user_errors
def forecast(
    result: Annotated[Path, typer.Argument(help="result store (.zarr)")],
    start: Annotated[int, typer.Option("--from", help="snapshot (column of the fit) to start from; -1: the last")] = -1,
    steps: Annotated[int, typer.Option(help="steps of the archive's time step to advance")] = 10,
    out: Annotated[Path | None, typer.Option(help="write the forecast to this zarr store (xarray-readable)")] = None,
    compare: Annotated[bool, typer.Option(
        "--compare", help="error against the archive where the forecast overlaps it")] = False,
) -> None:
    """Forecast the fields from a snapshot with the fitted linear model, in field units.

    Example: snaplift forecast results/fin-duct.zarr --from 0 --steps 200 --compare --out forecast.zarr
    """
    import numpy as np
    from rich.markup import escape
    from rich.table import Table

    from snaplift.results.forecast_output import FORECAST_CAUTION, forecast_dataset, write_forecast

    def spread(indices: np.ndarray) -> np.ndarray:  # at most 12 rows, evenly over the indices
        return indices if indices.size <= 12 else indices[np.unique(np.linspace(0, indices.size - 1, 12).astype(int))]

    dataset = forecast_dataset(result, start, steps, compare=compare)
    # the forecast fields: a field on a grid (step, ...) or a probe (step,); not the bookkeeping
    fields = [str(name) for name in dataset.data_vars if "step" in dataset[name].dims
              and str(name) not in ("archive_snapshot", "archive_time") and not str(name).startswith("error_")]
    time = dataset["time"].values
    typer.echo(f"forecast of {', '.join(fields)} from snapshot {dataset.attrs['start_column']} "
               f"(time {time[0]:.6g}) for {steps} steps to time {time[-1]:.6g}")
    # "milliseconds since 2001-01-01": the values are milliseconds (the epoch is in the store)
    time_unit = str(dataset["time"].attrs.get("units") or "").split(" since ")[0].strip()
    time_header = escape(f"time [{time_unit}]") if time_unit else "time"
    probes = [name for name in fields if dataset[name].ndim == 1]
    if probes:  # one value per step: show them (a grid field is written with --out)
        values = Table(title="forecast probe values", title_justify="left")
        values.add_column("step", justify="right")
        values.add_column(time_header, justify="right")
        for name in probes:
            unit = str(dataset[name].attrs.get("units") or "")
            values.add_column(escape(f"{name} [{unit}]") if unit else name, justify="right")
        for s in spread(np.arange(time.size)):
            values.add_row(str(int(s)), f"{time[s]:.6g}", *(f"{float(dataset[name].values[s]):.6g}" for name in probes))
        _console().print(values)
    if compare:
        errors = [str(name) for name in dataset.data_vars if str(name).startswith("error_")]
        overlap = np.flatnonzero(dataset["archive_snapshot"].values >= 0)
        if overlap.size == 0:
            typer.echo("the forecast does not overlap the archive: nothing to compare")
        else:
            table = _console()
            shown = Table(title="error against the archive, relative to its RMS norm over the compared steps "
                                "(weighted norm over the grid)", title_justify="left")
            uneven = "archive_time" in dataset  # the model is compared at the snapshots' own times
            for header in ("step", time_header, "archive snapshot",
                           *(["archive time"] if uneven else []), *(e[len("error_"):] for e in errors)):
                shown.add_column(header, justify="right")
            for s in spread(overlap):
                shown.add_row(str(int(s)), f"{time[s]:.6g}", str(int(dataset['archive_snapshot'].values[s])),
                              *([f"{float(dataset['archive_time'].values[s]):.6g}"] if uneven else []),
                              *(f"{float(dataset[e].values[s]):.3e}" for e in errors))
            table.print(shown)
            if overlap.size < steps + 1:
                typer.echo(f"steps {overlap[-1] + 1}..{steps} lie beyond the archive: no comparison there")
    if out is not None:
        write_forecast(dataset, out)
        typer.echo(f"forecast written to {out}" + (" (with error_<field> per step)" if compare else ""))
    typer.echo(f"caution: {FORECAST_CAUTION}")


@app.command()
@_user_errors
def export(
    result: Annotated[Path, typer.Argument(help="result store (.zarr)")],
    format: Annotated[str, typer.Option("--format", help="xdmf (XDMF + HDF5) | netcdf (CF netCDF-4)")] = "xdmf",
    out: Annotated[Path | None, typer.Option(
        help="output file (default: RESULT stem + .modes.xdmf / .modes.nc)")] = None,
    modes: Annotated[int, typer.Option(help="XDMF: leading modes in the one-period animation")] = 4,
) -> None:
    """Export the modes: XDMF + HDF5 for visualisation programs, or CF netCDF-4.

    Example: snaplift export results/fin-duct.zarr --format netcdf
    """
    from snaplift.errors import ConfigError
    from snaplift.results.export import export_netcdf, export_xdmf

    if format == "xdmf":
        if modes < 1:
            raise ConfigError(f"--modes must be >= 1; got {modes}")
        xdmf, heavy = export_xdmf(result, out, leading=modes)
        typer.echo(f"exported {xdmf} (with {heavy})")
    elif format == "netcdf":
        typer.echo(f"exported {export_netcdf(result, out)}")
    else:
        raise ConfigError(f"--format {format!r} is not allowed; use xdmf or netcdf")


@app.command()
@_user_errors
def compare(
    first: Annotated[Path, typer.Argument(help="result store A")],
    second: Annotated[Path, typer.Argument(help="result store B")],
    tolerance: Annotated[float, typer.Option(help="relative distance of continuous-time rates still matched")] = 0.05,
    json_output: Annotated[bool, typer.Option("--json", help="print JSON instead of tables")] = False,
) -> None:
    """Match the modes of two result stores: frequency and growth differences, MAC per field.

    Example: snaplift compare results/rank20.zarr results/rank40.zarr --json
    """
    from snaplift.results.compare import compare_json, compare_stores, render_comparison

    outcome = compare_stores(first, second, tolerance=tolerance)
    if json_output:
        typer.echo(compare_json(outcome))
    else:
        _console().print(render_comparison(outcome))


def main() -> None:  # pragma: no cover - console entry point
    """The ``snaplift`` console script: :data:`app`, then a quick exit.

    Once a command has returned, its output flushed and the exit handlers run (files
    closed, zarr's event loop stopped), the process leaves without the interpreter's
    teardown: freeing every module of numpy, scipy, dask, zarr and matplotlib one object
    at a time took a tenth to a fifth of a second, as long as a small run's fit. An
    exception other than SystemExit ends the process the ordinary way (its traceback).
    """
    code: Any = 0
    try:
        app()
    except SystemExit as stop:
        code = stop.code
    if code is not None and not isinstance(code, int):
        print(code, file=sys.stderr)  # SystemExit("message"): the message and status 1, as Python does
        code = 1
    for stream in (sys.stdout, sys.stderr):
        try:
            stream.flush()
        except (OSError, ValueError):
            pass
    atexit._run_exitfuncs()
    os._exit(code or 0)


if __name__ == "__main__":  # pragma: no cover
    main()
