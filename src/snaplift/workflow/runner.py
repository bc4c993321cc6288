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
import inspect
import os
import platform
import signal
import socket
import sys
import threading
import warnings
from collections.abc import Callable, Iterator
from contextlib import contextmanager
from dataclasses import dataclass, field, replace
from pathlib import Path
from typing import Any

import numpy as np

from snaplift import __version__
from snaplift._process_memory import trim_heap
from snaplift.cluster import ClusterOptions, Scheduler, TaskProgress, open_scheduler
from snaplift.errors import SnapliftError
from snaplift.results import stages as stored
from snaplift.results import store as result_store
from snaplift.results.staging import StagedStore, check_free_space
from snaplift.workflow import stages as stage_functions
from snaplift.workflow.checksums import record_checksums
from snaplift.workflow.fingerprint import (
    archive_fingerprint,
    classify_archive,
    stage_fingerprints,
    verification_note,
    workflow_identity,
)
from snaplift.workflow.guards import WRITE_ERRNOS, capped_workflow_text, check_output_path, write_error
from snaplift.workflow.lease import Lease, LeaseLostError
from snaplift.workflow.progress import ProgressReporter
from snaplift.workflow.store_metadata import store_metadata
from snaplift.workflow.schema import Workflow, load_workflow, resolve_path, section_fingerprint

__all__ = ["FAULT_VARIABLE", "STAGES", "RunInterrupted", "RunSummary", "run", "run_workflow"]

Progress = Callable[[str], None]
STAGES = ("scan", "compress", "fit", "modes", "report")
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
    from importlib.metadata import PackageNotFoundError, version

    try:
        return version(name)
    except PackageNotFoundError:
        return ""


def _now() -> _dt.datetime:
    return _dt.datetime.now(_dt.UTC)


class _Faults:
    """The SNAPLIFT_FAULT hook (see :data:`FAULT_VARIABLE`); inert when the variable is unset."""

    def __init__(self, reporter: ProgressReporter) -> None:
        spec = os.environ.get(FAULT_VARIABLE, "")
        self.stage, _, rest = spec.partition(":")
        when, _, name = rest.partition(":")
        self.units = int(when) if when.isdigit() else None
        self.at_end = when == "end"
        self.signal = getattr(signal, f"SIG{name.upper()}", signal.SIGKILL) if name else signal.SIGKILL
        self.reporter = reporter
        self.current: str | None = None
        self.done = 0

    def add_work(self, units: int) -> None:
        self.reporter.add_work(units)

    def advance(self, units: int = 1) -> None:
        self.reporter.advance(units)
        self.done += units
        if self.units is not None and self.current == self.stage and self.done >= self.units:
            self.units = None  # once
            os.kill(os.getpid(), self.signal)

    def enter(self, stage: str) -> None:
        self.current, self.done = stage, 0

    def finished(self, stage: str) -> None:
        if self.at_end and stage == self.stage:
            self.at_end = False
            os.kill(os.getpid(), self.signal)


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
                 reporter: ProgressReporter | None = None) -> RunSummary:
    """Run a workflow file end to end (resuming or reusing what it can); return where the results are.

    Example
    -------
    >>> summary = run_workflow("workflows/fin-duct.yaml")  # doctest: +SKIP
    >>> summary.path  # doctest: +SKIP
    PosixPath('.../results/fin-duct.zarr')
    """
    workflow, text, folder = load_workflow(path)
    return run(workflow, text, folder, overwrite=overwrite, progress=progress, reporter=reporter,
               workflow_path=Path(path))


def run(workflow: Workflow, text: str, folder: Path, *, overwrite: bool = False,
        progress: Progress | None = None, reporter: ProgressReporter | None = None,
        workflow_path: Path | None = None) -> RunSummary:
    """Run a validated workflow; see the module docstring for reuse, resume and provenance."""
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
    checked = stage_functions.scan_stage(workflow, folder, None, with_plan=False)
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
            summary = _run_stages(workflow, text, folder, store, lease, reporter, say, started, checked)
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
        from snaplift.archive import _handles

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
                reporter: ProgressReporter, say: Progress, started: _dt.datetime,
                checked: stage_functions.Scanned) -> RunSummary:
    faults = _Faults(reporter)
    warnings: list[str] = []
    if lease.taken_over:
        warnings.append(f"took over the lease from a run that was gone: {Lease.describe(lease.taken_over)} "
                        f"({lease.taken_over.get('reason')})")
    records: dict[str, dict[str, Any]] = {}
    progress: TaskProgress = faults
    with open_scheduler(ClusterOptions(**workflow.cluster.model_dump()), progress=progress) as scheduler:
        # scan: metadata, times and the archive's fingerprint; always run (it decides the rest)
        faults.enter("scan")
        reporter.begin("scan", f"{workflow.archive.path} ({scheduler.kind} scheduler, {scheduler.workers} workers)")
        stage_started = _now()
        # a killed run of this job left its scan record: plan around the baseline it reserved
        # (when the processes measure no more), so that the tiles, and the checkpoint, match
        killed_scan = store.record("scan") or {}
        scanned = stage_functions.scan_stage(workflow, folder, scheduler, checked=checked,
                                             recorded_baseline=killed_scan.get("memory_baseline"))
        fingerprint_now = archive_fingerprint(scanned.reader)
        previous_scan = store.previous_record("scan")
        layout = store.previous.attrs.get(result_store.FORMAT_KEY) if store.previous is not None else None
        if layout is not None and layout != result_store.STORE_VERSION:
            warnings.append(f"{store.path} holds result store layout {layout}; this snaplift writes layout "
                            f"{result_store.STORE_VERSION} (units, coordinates, peak amplitudes, block "
                            "checksums): every stage is recomputed")
        info = scanned.reader.describe()
        chunk = max(1, max(info.fields[f].snapshot_chunk for f in workflow.archive.fields))
        chunk = min(chunk, info.fields[workflow.archive.fields[0]].n_snapshots)
        resuming = previous_scan is None and store.record("scan") is not None
        # a killed first run left its scan record (with the content sample) in the staging
        # area: compare with it, so a resumed first run reads nothing again
        classification = classify_archive(scanned.reader, list(workflow.archive.fields), chunk, fingerprint_now,
                                          store.record("scan") if resuming else previous_scan)
        if resuming and classification.state == "unchanged":
            classification = replace(classification, state="new",
                                     reason=f"no previous result (resumed; archive {classification.reason})")
        fingerprints = stage_fingerprints(workflow, classification.identity)
        # every array written from here on carries units, names and coordinates from the archive
        store.writer.metadata = store_metadata(workflow, scanned.reader, info, scanned.time, scanned.time_unit)
        store.begin("scan")
        stored.write_scan(store.writer, scanned.time, scanned.snapshot_index)
        records["scan"] = store.finish("scan", {
            "fingerprint": fingerprints["scan"], "status": "computed", "passes": 0,
            "bytes_read": classification.bytes_read, "bytes_sampled": fingerprint_now["bytes_sampled"],
            "archive": fingerprint_now, "samples": classification.samples, "identity": classification.identity,
            "classification": classification.state, "classification_reason": classification.reason,
            "verified_blocks": [list(block) for block in classification.verified],
            "memory_baseline": int(scanned.plan.baseline_bytes) if scanned.plan is not None else 0,
            "started": stage_started.isoformat(), "finished": _now().isoformat()})
        reporter.end("scan", f"archive {classification.state} ({classification.reason})")
        if classification.state == "grown":
            warnings.append(verification_note(classification))
        warnings.extend(scanned.warnings)
        faults.finished("scan")

        # a run taken over while it was suspended stops at the next stage boundary
        lease.check()
        compressed, records["compress"] = _compress(workflow, scanned, scheduler, store, fingerprints, classification,
                                                    reporter, faults, warnings)
        trim_heap()  # what compress freed goes back to the system before fit and modes allocate
        n_modes, fit_records = _fit_and_modes(workflow, scanned, scheduler, store, fingerprints, compressed,
                                              reporter, faults, warnings)
        records.update(fit_records)
        lease.check()

        faults.enter("report")
        reporter.begin("report", "summary")
        report = _report_record(store, fingerprints["report"], warnings)
        records["report"] = report
        reporter.end("report", f"{n_modes} modes; {len(warnings)} warning(s)")
        description = dict(scheduler.description)
    lease.check()
    finished = _now()
    clean = dict(records)
    passes = sum(int(r.get("passes", 0)) for r in records.values() if r.get("status") == "computed")
    bytes_read = sum(int(r.get("bytes_read", 0)) for r in records.values())
    result_passes = int(records["compress"].get("passes", 0))
    path = store.commit({
        "workflow": capped_workflow_text(text),
        "workflow_fingerprint": section_fingerprint(workflow),
        "archive": str(scanned.reader.path),
        "archive_format": scanned.reader.format_name,
        "archive_fingerprint": records["scan"]["archive"],
        "archive_state": classification.state,
        "versions": _versions(),
        "host": socket.gethostname(),
        "pid": os.getpid(),
        "started": started.isoformat(),
        "finished": finished.isoformat(),
        "cluster": description,
        "stages": clean,
        "passes": result_passes,
        "passes_this_run": passes,
        "bytes_read": bytes_read,
        "compress_method": workflow.compress.method,
        "fit_method": workflow.fit.method,
        "warnings": list(warnings),
        "caution": CAUTION,
        "report": report.get("summary", {}),
    })
    page = _write_report(path, say) if workflow.output.report else None
    return RunSummary(path, result_passes, bytes_read, n_modes, tuple(warnings),
                      {name: _strip(record) for name, record in clean.items()}, classification.state, page)


def _write_report(path: Path, say: Progress) -> Path | None:
    """The report stage's page (``RESULT.report/``), drawn from the committed store.

    A report that cannot be drawn does not undo a complete store: the run says why and
    ``snaplift report RESULT`` can be run again.
    """
    # matplotlib and xarray are loaded only when a report is drawn (not for every run's start-up)
    from snaplift.report.page import render_report

    try:
        summary = render_report(path)
    except (SnapliftError, NotImplementedError, OSError) as error:
        say(f"warning: the report was not written ({error}); run 'snaplift report {path}'")
        return None
    except Exception as error:  # a drawing failure must not turn a complete run into a traceback
        say(f"warning: the report was not written ({type(error).__name__}: {error}); "
            f"run 'snaplift report {path}'")
        return None
    say(f"report: {summary.index} ({summary.seconds:.1f} s)")
    return summary.index


def _kept_or_reused(store: StagedStore, stage: str, fingerprint: str) -> dict[str, Any] | None:
    """The record of a stage that need not run: kept from a killed run, or reused from the last store."""
    record = store.record(stage)
    if record and record.get("fingerprint") == fingerprint:
        return {**record, "status": "kept", "bytes_read": 0, "bytes_read_before": record.get("bytes_read", 0)}
    previous = store.previous_record(stage)
    if previous and previous.get("fingerprint") == fingerprint:
        reused = store.reuse(stage)
        before = (previous.get("bytes_read", 0) if previous.get("status") == "computed"
                  else previous.get("bytes_read_before", 0))
        return store.finish(stage, {**reused, "status": "reused", "bytes_read": 0, "bytes_read_before": before})
    return None


def _compress(workflow: Workflow, scanned: Any, scheduler: Scheduler, store: StagedStore,
              fingerprints: dict[str, str], classification: Any, reporter: ProgressReporter,
              faults: _Faults, warnings: list[str]) -> tuple[Any, dict[str, Any]]:
    fingerprint = fingerprints["compress"]
    faults.enter("compress")
    lifted = ""
    if scanned.lifted_rows:
        from snaplift.units import format_bytes

        size = format_bytes(8 * scanned.lifted_rows * int(scanned.snapshot_index.size))
        lifted = f", lifted to {scanned.lifted_rows} values per snapshot ({size} per read, never stored)"
    reporter.begin("compress", f"{workflow.compress.method}, rank {workflow.compress.rank}, "
                   f"{scanned.snapshot_index.size} snapshots{lifted}")
    record = _kept_or_reused(store, "compress", fingerprint)
    verified = ""
    if record is None:
        started = _now()
        appended = _try_append(workflow, scanned, scheduler, store, fingerprints, classification, warnings)
        if appended is not None:
            store.begin("compress")
            stored.write_compressed(store.writer, appended, scheduler.compute, scale_setting=workflow.prepare.scale)
            checks, verified = record_checksums(store, workflow, appended.info, warnings, keep_previous=True)
            record = store.finish("compress", {**checks,
                "fingerprint": fingerprint, "settings": fingerprints["compress_settings"], "status": "appended",
                "passes": 1, "bytes_read": int(appended.bytes_read), "method": workflow.compress.method,
                "appended_snapshots": appended.info["appended_snapshots"],
                "started": started.isoformat(), "finished": _now().isoformat()})
            reporter.end("compress", f"appended {appended.info['appended_snapshots']} snapshots; "
                         f"{int(appended.bytes_read) / 1e6:.1f} MB read" + (f"; {verified}" if verified else ""))
            faults.finished("compress")
            return _load(workflow, scanned, store, record), record
        store.begin("compress")
        directory = store.checkpoint_directory("compress", fingerprint)
        keywords: dict[str, Any] = {}
        if "checkpoint_dir" in inspect.signature(stage_functions.compress_stage).parameters:
            keywords["checkpoint_dir"] = directory
        # accumulators of a streaming compress are ~2 x n x (rank + oversample) values;
        # the basis written afterwards is n x rank
        info = scanned.reader.describe()
        n_points = scanned.lifted_rows or sum(info.fields[f].n_points for f in workflow.archive.fields)
        width = workflow.compress.rank + workflow.compress.oversample
        check_free_space(store.area, 16 * n_points * (2 * width + workflow.compress.rank), "compress checkpoints and basis")
        if scanned.plan is not None:
            # every pass's tiles, so the bar reaches 100 % when compress does, not after the first pass
            reporter.expect(int(scanned.plan.passes) * int(scanned.plan.n_tiles))
        result = _compress_with_retries(workflow, scanned, scheduler, keywords, warnings)
        stored.write_compressed(store.writer, result, scheduler.compute, scale_setting=workflow.prepare.scale)
        checks, verified = record_checksums(store, workflow, getattr(result, "info", {}), warnings)
        full = store.finish("compress", {**checks,
            "fingerprint": fingerprint, "settings": fingerprints["compress_settings"], "status": "computed",
            "passes": int(result.passes), "projection_kind": getattr(result, "projection_kind", "exact"),
            "bytes_read": int(result.bytes_read), "method": workflow.compress.method,
            "checkpointed": bool(keywords), "started": started.isoformat(), "finished": _now().isoformat()})
        store.clear_checkpoints("compress")
        record = full
    reporter.end("compress", f"{record['status']}; {record.get('passes', 0)} passes, "
                 f"{int(record.get('bytes_read', 0)) / 1e6:.1f} MB read in this run"
                 + (f"; {verified}" if record["status"] == "computed" and verified else ""))
    faults.finished("compress")
    return _load(workflow, scanned, store, record), record


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


def _compress_with_retries(workflow: Workflow, scanned: Any, scheduler: Scheduler, keywords: dict[str, Any],
                           warnings: list[str]) -> Any:
    for attempt in range(WORKER_LOSS_RETRIES + 1):
        try:
            return stage_functions.compress_stage(workflow, scanned, scheduler, **keywords)
        except Exception as error:
            if not _worker_lost(error) or attempt == WORKER_LOSS_RETRIES:
                raise
            warnings.append(f"compress attempt {attempt + 1} lost a worker ({error}); resumed from the last "
                            "checkpoint")
            if scheduler.client is not None:
                # the nanny restarts dead workers; batch clusters submit new jobs
                with contextlib.suppress(TimeoutError, OSError):
                    scheduler.client.wait_for_workers(n_workers=scheduler.workers, timeout=120)
    raise AssertionError("unreachable")  # pragma: no cover


def _load(workflow: Workflow, scanned: Any, store: StagedStore, record: dict[str, Any]) -> Any:
    # fit and modes always read the compress result back from the staging store, so a
    # computed, kept or reused result gives them the very same numbers
    lift = workflow.field_lift
    fields = [f.name for f in lift.lifted(list(workflow.archive.fields))] if lift else list(workflow.archive.fields)
    return stored.load_compressed(store.writer.root, scanned.reader, fields,
                                  passes=int(record.get("passes", 0)), snapshot_block=scanned.snapshot_block,
                                  where=str(store.store_path))


def _try_append(workflow: Workflow, scanned: Any, scheduler: Scheduler, store: StagedStore,
                fingerprints: dict[str, str], classification: Any, warnings: list[str]) -> Any:
    """The compress result of a grown archive by extending the stored sketch, or None."""
    if classification.state != "grown":
        return None
    from snaplift.workflow.append import append_compress, can_append

    previous = store.previous_record("compress")
    root: Any = store.previous
    reason: str | None = None
    if previous is None or root is None or previous.get("settings") != fingerprints["compress_settings"]:
        reason = "the previous result was computed with other settings"
        sketch: dict[str, np.ndarray] = {}
        old_index = None
    else:
        sketch = {name: np.asarray(a[...]) for name, a in root["sketch"].arrays()} if "sketch" in root else {}
        old_index = np.asarray(root["diagnostics/snapshot_index"][...])
        reason = can_append(workflow, old_index, np.asarray(scanned.snapshot_index), sketch)
    if reason is not None:
        warnings.append(f"archive grew ({classification.reason}); compress was recomputed: {reason}")
        return None
    assert old_index is not None
    return append_compress(workflow, scanned, scheduler, sketch, int(old_index.size))


def _fit_and_modes(workflow: Workflow, scanned: Any, scheduler: Scheduler, store: StagedStore,
                   fingerprints: dict[str, str], compressed: Any, reporter: ProgressReporter,
                   faults: _Faults, warnings: list[str]) -> tuple[int, dict[str, dict[str, Any]]]:
    records: dict[str, dict[str, Any]] = {}
    faults.enter("fit")
    reporter.begin("fit", f"{workflow.fit.method} on {compressed.lowrank.rank} coefficients")
    fit_record = _kept_or_reused(store, "fit", fingerprints["fit"])
    modes_record = _kept_or_reused(store, "modes", fingerprints["modes"]) if fit_record else None
    if fit_record and modes_record:
        records["fit"], records["modes"] = fit_record, modes_record
        warnings.extend(fit_record.get("warnings", []))
        reporter.end("fit", fit_record["status"])
        reporter.begin("modes", "modes")
        reporter.end("modes", modes_record["status"])
        n_modes = int(fit_record.get("n_modes", 0))
        return n_modes, records
    # fit is cheap (no archive read): recompute it whenever modes must be written again
    started = _now()
    store.begin("fit")
    fit = stage_functions.fit_stage(workflow, compressed, scanned,
                                    memory_budget=stage_functions.compress_memory(workflow, scheduler),
                                    say=reporter.message)
    order, fit_warnings = stored.write_fit(store.writer, fit, scanned.dt, residuals=fit.residuals)
    stored.write_fit_details(store.writer, fit, order, scanned.time)
    fit_warnings = list(fit.warnings) + fit_warnings
    warnings.extend(fit_warnings)
    n_modes = int(order.size)
    details = {fit.details_key: dict(fit.details)} if fit.details else {}
    records["fit"] = (store.finish("fit", {
        "fingerprint": fingerprints["fit"], "status": "computed", "passes": 0,
        "bytes_read": int(fit.details.get("bytes_read", 0)), "method": fit.method, **details,
        "n_modes": n_modes, "warnings": fit_warnings, "started": started.isoformat(), "finished": _now().isoformat()}))
    reporter.end("fit", f"computed; {n_modes} modes")
    faults.finished("fit")

    faults.enter("modes")
    reporter.begin("modes", f"{n_modes} modes on the grid")
    started = _now()
    check_free_space(store.area, stored.modes_bytes(compressed.matrix, n_modes), "the modes")
    trim_heap()
    store.begin("modes")
    stored.write_modes(store.writer, fit, compressed, order, scheduler.compute)
    records["modes"] = (store.finish("modes", {
        "fingerprint": fingerprints["modes"], "status": "computed", "passes": 0, "bytes_read": 0,
        "started": started.isoformat(), "finished": _now().isoformat()}))
    reporter.end("modes", "computed")
    faults.finished("modes")
    return n_modes, records


def _strip(record: dict[str, Any]) -> dict[str, Any]:
    return {k: v for k, v in record.items() if k not in ("arrays", "group_attrs")}


def _report_record(store: StagedStore, fingerprint: str, warnings: list[str]) -> dict[str, Any]:
    """The report stage: a short summary of the spectrum and the errors, kept in the attrs."""
    root: Any = store.writer.root
    spectrum = root["spectrum"]
    diagnostics = root["diagnostics"]
    count = min(10, spectrum["eigenvalue"].shape[0])
    leading = [{"frequency": float(spectrum["frequency"][k]), "growth": float(spectrum["growth"][k]),
                "amplitude": float(spectrum["amplitude"][k])} for k in range(count)]
    summary = {"n_modes": int(spectrum["eigenvalue"].shape[0]), "leading_modes": leading,
               "max_projection_error": float(np.max(diagnostics["projection_error"][...])),
               "max_reconstruction_error": float(np.max(diagnostics["reconstruction_error"][...])),
               "warnings": len(warnings)}
    store.begin("report")
    return (store.finish("report", {"fingerprint": fingerprint, "status": "computed", "passes": 0,
                                          "bytes_read": 0, "summary": summary}))

