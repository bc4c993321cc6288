"""The workflow runner: the one place that owns the scheduler and writes results.

``run_workflow(path)`` validates the file, takes the lease on the result store, opens the
scheduler named by ``cluster`` and runs the stages scan -> compress -> fit -> modes ->
report. Each stage has a fingerprint (:mod:`snaplift.workflow.fingerprint`); a stage is

- *kept* when a killed run of the same workflow finished it (its record is in the
  staging area, :mod:`snaplift.results.staging`),
- *reused* when the previous complete store holds it with the same fingerprint (its
  arrays are hard-linked over; nothing is read from the archive),
- otherwise *computed* (compress gets a checkpoint folder in the staging area that
  survives a kill and is picked up again by the next run).

``fit`` runs on the small coefficient matrix and is recomputed, without reading the
archive, whenever ``modes`` must be written again. Ctrl-C and SIGTERM (what batch
systems send before the walltime kill) stop the run cleanly: the staging area is kept
and the message says how to resume. The store's root attributes carry the provenance:
workflow text and fingerprint, archive fingerprint and classification, package versions,
host, start and end time, and per stage its fingerprint, status, passes and bytes read.
"""

from __future__ import annotations

import contextlib
import datetime as _dt
import os
import platform
import signal
import socket
import sys
import threading
import warnings
from collections.abc import Callable, Iterator
from contextlib import contextmanager
from dataclasses import dataclass, field
from importlib.metadata import PackageNotFoundError, version
from pathlib import Path
from typing import Any

from snaplift import __version__
from snaplift.archive import _handles
from snaplift.cluster import ClusterOptions, open_scheduler
from snaplift.errors import SnapliftError
from snaplift.report.helper import ReportHelper
from snaplift.results.stages import Compressed
from snaplift.results.staging import StagedStore, check_free_space
from snaplift.workflow.compute import compress_stage
from snaplift.workflow.fingerprint import workflow_identity
from snaplift.workflow.guards import (
    WRITE_ERRNOS,
    capped_workflow_text,
    check_output_path,
    write_error,
)
from snaplift.workflow.lease import Lease, LeaseLostError
from snaplift.workflow.progress import ProgressReporter
from snaplift.workflow.scanning import Scanned, scan_stage
from snaplift.workflow.schema import Workflow, load_workflow, resolve_path, section_fingerprint
from snaplift.workflow.stages import STAGES, StageContext, StageRecord

__all__ = ["FAULT_VARIABLE", "STAGES", "ReportInterrupted", "RunInterrupted", "RunSummary", "run_validated",
           "run_workflow"]

Progress = Callable[[str], None]
#: fault injection for crash-safety tests: ``<stage>:<units>`` kills this process with
#: SIGKILL after that many units of a stage's progress, ``<stage>:end`` right after the
#: stage's completion record is written; ``<stage>:<when>:INT`` (or TERM) sends that
#: signal instead, as Ctrl-C or a batch system would
FAULT_VARIABLE = "SNAPLIFT_FAULT"

CAUTION = (
    "A data-driven surrogate is valid only near the data it was fitted to. Engineering decisions "
    "rest on validated simulation, experiment, applicable codes and licensed engineering judgement."
)


class RunInterrupted(KeyboardInterrupt):
    """Ctrl-C or SIGTERM stopped the run; ``str()`` says how to resume."""


class ReportInterrupted(RunInterrupted):
    """Ctrl-C or SIGTERM while the report was drawn: the store is committed and complete."""


@dataclass(frozen=True)
class RunSummary:
    path: Path
    passes: int
    bytes_read: int
    n_modes: int
    warnings: tuple[str, ...]
    stages: dict[str, dict[str, Any]] = field(default_factory=dict)
    archive_state: str = "new"
    report: Path | None = None


def _versions() -> dict[str, str]:
    # versions from the modules already imported, else from the installed distributions:
    # importing distributed only to ask its version took ~0.4 s of every run's startup
    versions = {"snaplift": __version__}
    for name in ("numpy", "scipy", "dask", "distributed", "zarr", "h5py", "pydantic", "rich"):
        module = sys.modules.get(name)
        versions[name] = getattr(module, "__version__", "") or _distribution_version(name)
    versions["python"] = platform.python_version()
    jobqueue = _distribution_version("dask-jobqueue")
    if jobqueue:
        versions["dask_jobqueue"] = jobqueue
    return versions


def _distribution_version(name: str) -> str:
    try:
        return version(name)
    except PackageNotFoundError:
        return ""


def _now() -> _dt.datetime:
    return _dt.datetime.now(_dt.UTC)


class FaultInjection:
    """The SNAPLIFT_FAULT hook (see :data:`FAULT_VARIABLE`); inert when the variable is unset."""

    def __init__(self) -> None:
        spec = os.environ.get(FAULT_VARIABLE, "")
        self.stage, _, rest = spec.partition(":")
        when, _, name = rest.partition(":")
        self.units = int(when) if when.isdigit() else None
        self.at_end = when == "end"
        self.signal = getattr(signal, f"SIG{name.upper()}", signal.SIGKILL) if name else signal.SIGKILL
        self.current: str | None = None
        self.done = 0

    def enter(self, stage: str) -> None:
        self.current, self.done = stage, 0

    def count(self, units: int) -> None:
        """Units of the current stage's progress done; the signal once the given count is reached."""
        self.done += units
        if self.units is not None and self.current == self.stage and self.done >= self.units:
            self.units = None  # once
            os.kill(os.getpid(), self.signal)

    def finished(self, stage: str) -> None:
        if self.at_end and stage == self.stage:
            self.at_end = False
            os.kill(os.getpid(), self.signal)


class _StageProgress:
    """The scheduler's progress sink (:class:`snaplift.cluster.TaskProgress`): the reporter's
    bar, and the fault hook's count."""

    def __init__(self, reporter: ProgressReporter, faults: FaultInjection) -> None:
        self.reporter, self.faults = reporter, faults

    def add_work(self, units: int) -> None:
        self.reporter.add_work(units)

    def advance(self, units: int = 1) -> None:
        self.reporter.advance(units)
        self.faults.count(units)


@contextmanager
def _termination_as_interrupt() -> Iterator[None]:
    """SIGTERM (walltime, scancel) and SIGINT raise RunInterrupted in the main thread.

    SIGINT gets its own handler too because a library may have replaced Python's default
    one (dask-jobqueue sets it to ``sys.exit()`` when imported).
    """
    if threading.current_thread() is not threading.main_thread():
        yield
        return

    def handler(signum: int, frame: Any) -> None:
        raise RunInterrupted("terminated (SIGTERM)" if signum == signal.SIGTERM else "Ctrl-C")

    previous = {number: signal.signal(number, handler) for number in (signal.SIGTERM, signal.SIGINT)}
    try:
        yield
    finally:
        for number, old in previous.items():
            signal.signal(number, old)


def run_workflow(path: str | Path, *, overwrite: bool = False, progress: Progress | None = None,
                 reporter: ProgressReporter | None = None, report_helper: ReportHelper | None = None) -> RunSummary:
    """Run a workflow file end to end (resuming or reusing what it can); return where the results are.

    Example
    -------
    >>> summary = run_workflow("workflows/fin-duct.yaml")  # doctest: +SKIP
    >>> summary.path  # doctest: +SKIP
    PosixPath('.../results/fin-duct.zarr')
    """
    workflow, text, folder = load_workflow(path)
    return run_validated(workflow, text, folder, overwrite=overwrite, progress=progress, reporter=reporter,
                         workflow_path=Path(path), report_helper=report_helper)


def run_validated(workflow: Workflow, text: str, folder: Path, *, overwrite: bool = False,
                  progress: Progress | None = None, reporter: ProgressReporter | None = None,
                  workflow_path: Path | None = None, report_helper: ReportHelper | None = None) -> RunSummary:
    """Run a validated workflow; see the module docstring for reuse, resume and provenance.

    ``report_helper`` (started by ``snaplift run``, closed by it) draws the report page in a
    process of its own (:mod:`snaplift.report.helper`); without one the page is drawn here.
    """
    own_reporter = reporter is None
    if reporter is None:
        reporter = ProgressReporter(quiet=True)
    say = progress or reporter.message
    started = _now()
    # normalised: 'sub/..' is the folder itself (and no empty 'sub' is made for it)
    output = Path(os.path.abspath(resolve_path(folder, workflow.output.path)))
    archive_path = resolve_path(folder, workflow.archive.path)
    check_output_path(output, archive_path)
    # names, shapes and times are checked first: an existing store never hides a typo
    checked = scan_stage(workflow, folder, None, with_plan=False)
    lease = Lease(output)
    with warnings.catch_warnings():
        # said below as one line through the reporter, not as a Python warning with a source line
        warnings.simplefilter("ignore", RuntimeWarning)
        lease.acquire()
    if lease.taken_over:
        say(f"warning: took over the lease of {output} from a run that is gone "
            f"({Lease.describe(lease.taken_over)}: {lease.taken_over.get('reason')})")
    store: StagedStore | None = None
    try:
        with _termination_as_interrupt():
            store = StagedStore(output, identity=workflow_identity(workflow, archive_path), overwrite=overwrite)
            if store.discarded:
                say(store.discarded)
            if overwrite:
                say("--overwrite: every stage is recomputed from the archive")
            summary = _run_stages(workflow, text, folder, store, lease, reporter, say, started, checked,
                                  report_helper)
    except ReportInterrupted:
        raise  # the store is committed (its staging area is gone): nothing to keep or clean
    except KeyboardInterrupt as error:
        command = f"snaplift run {workflow_path}" if workflow_path else "the same run"
        kept = store is not None and store.has_progress
        if store is not None and not kept:
            store.abort()
        where = f"finished stages and checkpoints are kept in {store.area}; " if kept and store else ""
        raise RunInterrupted(f"interrupted ({error or 'Ctrl-C'}); {where}run {command} again to resume") from None
    except BaseException as error:
        if _lease_lost(lease):
            # another run holds the store now: its staging area is not ours to clean, and
            # whatever failed here failed because that run changed it
            raise LeaseLostError(
                f"the lease of {output} was taken over by another run while this run was suspended or cut off "
                f"({type(error).__name__} afterwards); this run stops without writing; the other run's result "
                "is the one that counts") from None
        if store is not None and not store.has_progress:
            store.abort()
        if isinstance(error, OSError) and error.errno in WRITE_ERRNOS:
            raise write_error(error, output) from None
        raise
    finally:
        lease.release()
        # the threaded scheduler opened archive files in this process: close them, so the
        # caller may write to the archive (append snapshots) once the run is over
        _handles.clear(close=True)
        if own_reporter:
            reporter.close()
    return summary


def _lease_lost(lease: Lease) -> bool:
    try:
        lease.check()
    except LeaseLostError:
        return True
    return False


def _run_stages(workflow: Workflow, text: str, folder: Path, store: StagedStore, lease: Lease,
                reporter: ProgressReporter, say: Progress, started: _dt.datetime, checked: Scanned,
                report_helper: ReportHelper | None = None) -> RunSummary:
    """Scan, compress, fit, modes, report: :data:`~snaplift.workflow.stages.STAGES` in order, each
    computed, or kept or reused by its fingerprint; then the commit and the report page."""
    faults = FaultInjection()
    warnings: list[str] = []
    if lease.taken_over:
        warnings.append(f"took over the lease from a run that was gone: {Lease.describe(lease.taken_over)} "
                        f"({lease.taken_over.get('reason')})")
    records: dict[str, StageRecord] = {}
    progress = _StageProgress(reporter, faults)
    with open_scheduler(ClusterOptions(**workflow.cluster.model_dump()), progress=progress) as scheduler:
        context = StageContext(workflow, folder, scheduler, store, reporter, checked, warnings,
                               compress=_compress_with_retries)
        for stage in STAGES:
            if records:
                # a run taken over while it was suspended stops at the next stage boundary
                lease.check()
            faults.enter(stage.name)
            reporter.begin(stage.name, stage.begin(context))
            record = _kept_or_reused(store, stage.name, stage.fingerprint(context)) if stage.reusable(context) else None
            if record is None:
                stage_started = _now()
                result = stage.run(context)
                store.begin(stage.name)
                written, result = stage.write(context, result)
                record = StageRecord.from_dict(stage.name, store.finish(stage.name, {
                    **written.as_dict(), "started": stage_started.isoformat(), "finished": _now().isoformat()}))
                if stage.read_back:
                    result = stage.load(context, record)
            else:
                result = stage.load(context, record)
            context.results[stage.name] = result
            records[stage.name] = record
            reporter.end(stage.name, stage.end(context, record))
            faults.finished(stage.name)
        description = dict(scheduler.description)
    lease.check()
    scan = context.scan
    passes = sum(r.passes for r in records.values() if r.status == "computed")
    bytes_read = sum(r.bytes_read for r in records.values())
    result_passes = records["compress"].passes
    path = store.commit({
        "workflow": capped_workflow_text(text),
        "workflow_fingerprint": section_fingerprint(workflow),
        "archive": str(scan.scanned.reader.path),
        "archive_format": scan.scanned.reader.format_name,
        "archive_fingerprint": scan.archive,
        "archive_state": scan.classification.state,
        "versions": _versions(),
        "host": socket.gethostname(),
        "pid": os.getpid(),
        "started": started.isoformat(),
        "finished": _now().isoformat(),
        "cluster": description,
        "stages": {name: record.as_dict() for name, record in records.items()},
        "passes": result_passes,
        "passes_this_run": passes,
        "bytes_read": bytes_read,
        "compress_method": workflow.compress.method,
        "fit_method": workflow.fit.method,
        "warnings": list(warnings),
        "caution": CAUTION,
        "report": context.results["report"],
    })
    page = _write_report(path, say, report_helper) if workflow.output.report else None
    return RunSummary(path, result_passes, bytes_read, context.fitted.n_modes, tuple(warnings),
                      {name: record.summary() for name, record in records.items()}, scan.classification.state, page)


def _write_report(path: Path, say: Progress, helper: ReportHelper | None = None) -> Path | None:
    """The report stage's page (``RESULT.report/``), drawn from the committed store, by the
    report helper when there is one and it answers, else here.

    A report that cannot be drawn does not undo a complete store: the run says why and
    ``snaplift report RESULT`` can be run again.
    """
    try:
        return _draw_report(path, say, helper)
    except KeyboardInterrupt:
        # the helper (if any) is stopped by its owner and removes its staging folder; a page
        # drawn here had not begun its folder or removes it (render_report)
        raise ReportInterrupted(f"interrupted while drawing the report; the result store {path} is complete; "
                                f"run 'snaplift report {path}' to draw the report") from None


def _draw_report(path: Path, say: Progress, helper: ReportHelper | None) -> Path | None:
    answer = helper.render(path) if helper is not None else None
    if answer is not None:
        if "warning" in answer:
            say(f"warning: the report was not written ({answer['warning']}); run 'snaplift report {path}'")
            return None
        say(f"report: {answer['index']} ({float(answer['seconds']):.1f} s)")
        return Path(answer["index"])
    # matplotlib and xarray are loaded only when a report is drawn (not for every run's start-up)
    from snaplift.report.page import render_report

    try:
        summary = render_report(path)
    except (SnapliftError, NotImplementedError, OSError) as error:
        say(f"warning: the report was not written ({error}); run 'snaplift report {path}'")
        return None
    except Exception as error:  # noqa: BLE001 -- a drawing failure must not turn a complete run into a traceback
        say(f"warning: the report was not written ({type(error).__name__}: {error}); "
            f"run 'snaplift report {path}'")
        return None
    say(f"report: {summary.index} ({summary.seconds:.1f} s)")
    return summary.index


def _kept_or_reused(store: StagedStore, stage: str, fingerprint: str) -> StageRecord | None:
    """The record of a stage that need not run: kept from a killed run, or reused from the last store."""
    record = store.record(stage)
    if record and record.get("fingerprint") == fingerprint:
        return StageRecord.from_dict(stage, {**record, "status": "kept", "bytes_read": 0,
                                             "bytes_read_before": record.get("bytes_read", 0)})
    previous = store.previous_record(stage)
    if previous and previous.get("fingerprint") == fingerprint:
        reused = store.reuse(stage)
        before = (previous.get("bytes_read", 0) if previous.get("status") == "computed"
                  else previous.get("bytes_read_before", 0))
        return StageRecord.from_dict(stage, store.finish(stage, {**reused, "status": "reused", "bytes_read": 0,
                                                                 "bytes_read_before": before}))
    return None


def _compress_with_retries(context: StageContext, checkpoint_dir: Path) -> Compressed:
    """compress_stage, resumed from its checkpoint after losing a worker (at most
    :data:`WORKER_LOSS_RETRIES` times); the free space and the progress bar's length first."""
    workflow, scanned, scheduler = context.workflow, context.scanned, context.scheduler
    # accumulators of a streaming compress are ~2 x n x (rank + oversample) values;
    # the basis written afterwards is n x rank
    info = scanned.reader.describe()
    n_points = scanned.lifted_rows or sum(info.fields[f].n_points for f in workflow.archive.fields)
    width = workflow.compress.rank + workflow.compress.oversample
    check_free_space(context.store.area, 16 * n_points * (2 * width + workflow.compress.rank),
                     "compress checkpoints and basis")
    if scanned.plan is not None:
        # every pass's tiles, so the bar reaches 100 % when compress does, not after the first pass
        context.reporter.expect(int(scanned.plan.passes) * int(scanned.plan.n_tiles))
    for attempt in range(WORKER_LOSS_RETRIES + 1):
        try:
            return compress_stage(workflow, scanned, scheduler, checkpoint_dir=checkpoint_dir)
        except Exception as error:
            if not _worker_lost(error) or attempt == WORKER_LOSS_RETRIES:
                raise
            context.warnings.append(f"compress attempt {attempt + 1} lost a worker ({error}); resumed from the last "
                                    "checkpoint")
            if scheduler.client is not None:
                # the nanny restarts dead workers; batch clusters submit new jobs
                with contextlib.suppress(TimeoutError, OSError):
                    scheduler.client.wait_for_workers(n_workers=scheduler.workers, timeout=120)
    raise AssertionError("unreachable")  # pragma: no cover


#: compress attempts after losing a worker that held accumulators (each resumes from the checkpoint)
WORKER_LOSS_RETRIES = 3


def _worker_lost(error: BaseException) -> bool:
    # the streaming loop keeps accumulators on workers; losing one is not a task failure the
    # scheduler can retry, but the checkpoint makes a fresh attempt cheap. A task pinned to
    # the dead worker may also come back cancelled ("already forgotten") rather than lost:
    # compress cancels futures only after an error, never one it then waits for, so that is
    # the same loss.
    names = {cls.__name__ for cls in type(error).__mro__}
    return bool(names & {"WorkerLostError", "FutureCancelledError"}) or (
        isinstance(error, RuntimeError) and "was lost" in str(error))
