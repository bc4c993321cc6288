"""The stages of a workflow: one protocol, one object per stage, one typed result each.

A stage (:class:`Stage`) has a ``name``, a ``fingerprint`` (the hash of its settings and
its inputs' fingerprints, :func:`snaplift.workflow.fingerprint.stage_fingerprints`),
``run`` (compute from the results of the stages before it), ``write`` (what it leaves in
the staging store; returns the details of its completion record) and ``load`` (its result
again from a kept or reused completion record). The runner (:mod:`snaplift.workflow.runner`)
loops over :data:`STAGES`:

======== ============================= ===================================================
stage    result                        reused when
======== ============================= ===================================================
scan     :class:`ScanResult`           never (it classifies the archive: decides the rest)
compress :class:`~snaplift.results.stages.Compressed`  same fingerprint (read back: the same type)
fit      :class:`Fitted`               fit and modes both have their fingerprints
modes    :class:`Fitted` (unchanged)   the fit was reused
report   summary ``dict``              never (a few numbers read from the store)
======== ============================= ===================================================

Every result that later stages use comes from the staging store, so a computed, kept or
reused compress gives fit and modes the very same numbers.
"""

from __future__ import annotations

import contextlib
import datetime as _dt
from collections.abc import Callable, Mapping
from dataclasses import dataclass, field, replace
from pathlib import Path
from typing import TYPE_CHECKING, Any, Generic, Protocol, TypeVar

import numpy as np

from snaplift._process_memory import trim_heap
from snaplift.cluster import Scheduler
from snaplift.linalg._blas import blas_threads
from snaplift.results import store as result_store
from snaplift.results.stages import Compressed, write_compressed, write_scan
from snaplift.results.staging import StagedStore, check_free_space
from snaplift.units import format_bytes
from snaplift.workflow.checksums import record_checksums
from snaplift.workflow.compute import compress_stage, fit_stage, load_compressed_result, try_append
from snaplift.workflow.fingerprint import (
    Classification,
    archive_fingerprint,
    classify_archive,
    stage_fingerprints,
    verification_note,
)
from snaplift.workflow.planning import compress_memory
from snaplift.workflow.progress import ProgressReporter
from snaplift.workflow.scanning import Scanned, check_workflow, scan_stage
from snaplift.workflow.schema import Workflow
from snaplift.workflow.store_metadata import store_metadata

if TYPE_CHECKING:
    from snaplift.fitting.methods import FitResult

__all__ = [
    "STAGES",
    "Compressed",
    "Fitted",
    "ScanResult",
    "Scanned",
    "Stage",
    "StageContext",
    "StageRecord",
    "check_workflow",
    "compress_stage",
    "fit_stage",
    "scan_stage",
]

Result = TypeVar("Result")


def now() -> _dt.datetime:
    return _dt.datetime.now(_dt.UTC)


@dataclass(frozen=True)
class StageRecord:
    """The completion record of a stage: the staging area's JSON and the store's provenance.

    ``status`` is ``computed``, ``appended`` (compress of a grown archive), ``kept`` (a
    killed run of the same job finished it) or ``reused`` (from the previous complete
    store); ``details`` holds the stage's own keys (times, method, warnings, the archive's
    fingerprint...) and the staging area's ``arrays`` / ``group_attrs``.
    """

    stage: str
    fingerprint: str
    status: str
    passes: int = 0
    bytes_read: int = 0
    details: Mapping[str, Any] = field(default_factory=dict)

    def as_dict(self) -> dict[str, Any]:
        return {"fingerprint": self.fingerprint, "status": self.status, "passes": self.passes,
                "bytes_read": self.bytes_read, **self.details}

    @classmethod
    def from_dict(cls, stage: str, data: Mapping[str, Any]) -> StageRecord:
        details = {k: v for k, v in data.items() if k not in ("fingerprint", "status", "passes", "bytes_read")}
        return cls(stage, str(data.get("fingerprint", "")), str(data.get("status", "")), int(data.get("passes", 0)),
                   int(data.get("bytes_read", 0)), details)

    def summary(self) -> dict[str, Any]:
        """The record without the staging area's array lists (what :class:`RunSummary` shows)."""
        return {k: v for k, v in self.as_dict().items() if k not in ("arrays", "group_attrs")}


@dataclass(frozen=True)
class ScanResult:
    """What scan hands on: the scan, the archive's classification and every stage's fingerprint."""

    scanned: Scanned
    classification: Classification
    archive: dict[str, Any]
    fingerprints: dict[str, str]


@dataclass(frozen=True)
class Fitted:
    """What fit hands on to modes and report. ``outcome`` and ``order`` (the spectrum's
    sort order) are None when fit and modes were kept or reused: the fit is cheap and is
    recomputed, never read back, whenever the modes must be written again."""

    n_modes: int
    warnings: tuple[str, ...] = ()
    outcome: FitResult | None = None
    order: np.ndarray | None = None


@dataclass
class StageContext:
    """What the stages of one run share: settings, scheduler, store, progress, and the
    results of the stages that ran before (set by the runner as each one finishes)."""

    workflow: Workflow
    folder: Path
    scheduler: Scheduler
    store: StagedStore
    reporter: ProgressReporter
    checked: Scanned
    warnings: list[str] = field(default_factory=list)
    results: dict[str, Any] = field(default_factory=dict)
    #: compress retries after losing a worker (the runner's policy, see runner._compress_with_retries)
    compress: Callable[[StageContext, Path], Compressed] | None = None

    @property
    def scan(self) -> ScanResult:
        return self.results["scan"]

    @property
    def scanned(self) -> Scanned:
        return self.scan.scanned

    @property
    def fingerprints(self) -> dict[str, str]:
        return self.scan.fingerprints

    @property
    def compressed(self) -> Compressed:
        return self.results["compress"]

    @property
    def fitted(self) -> Fitted:
        return self.results["fit"]


class Stage(Protocol[Result]):
    """One stage of the pipeline (module docstring)."""

    name: str
    #: the result later stages use is read back from the store after writing (compress:
    #: computed, kept and reused results are then the very same numbers)
    read_back: bool

    def fingerprint(self, context: StageContext) -> str: ...

    def begin(self, context: StageContext) -> str:
        """What the progress line says as the stage starts."""
        ...

    def reusable(self, context: StageContext) -> bool:
        """Whether a kept or reused record may stand for running the stage."""
        ...

    def run(self, context: StageContext) -> Result: ...

    def write(self, context: StageContext, result: Result) -> tuple[StageRecord, Result]:
        """Write the result into the staging store (between ``store.begin`` and ``finish``);
        its record and the result as written (fit: with the spectrum's sort order)."""
        ...

    def load(self, context: StageContext, record: StageRecord) -> Result: ...

    def end(self, context: StageContext, record: StageRecord) -> str:
        """What the progress line says as the stage ends."""
        ...


def _times(started: _dt.datetime) -> dict[str, str]:
    return {"started": started.isoformat(), "finished": now().isoformat()}


class _Base(Generic[Result]):
    name = ""
    #: the result later stages use is read back from the store after writing (compress)
    read_back = False

    def fingerprint(self, context: StageContext) -> str:
        return context.fingerprints[self.name]

    def reusable(self, context: StageContext) -> bool:
        return True

    def end(self, context: StageContext, record: StageRecord) -> str:
        return record.status


class ScanStage(_Base[ScanResult]):
    """Open, check and plan (metadata only); classify the archive against the last result."""

    name = "scan"

    def begin(self, context: StageContext) -> str:
        scheduler = context.scheduler
        return f"{context.workflow.archive.path} ({scheduler.kind} scheduler, {scheduler.workers} workers)"

    def reusable(self, context: StageContext) -> bool:
        return False

    def fingerprint(self, context: StageContext) -> str:
        return context.fingerprints["scan"]

    def run(self, context: StageContext) -> ScanResult:
        workflow, store = context.workflow, context.store
        # a killed run of this job left its scan record: plan around the baseline it reserved
        # (when the processes measure no more), so that the tiles, and the checkpoint, match
        killed = store.record("scan") or {}
        scanned = scan_stage(workflow, context.folder, context.scheduler, checked=context.checked,
                             recorded_baseline=killed.get("memory_baseline"))
        archive_now = archive_fingerprint(scanned.reader)
        previous = store.previous_record("scan")
        layout = store.previous.attrs.get(result_store.FORMAT_KEY) if store.previous is not None else None
        info = scanned.reader.describe()
        fields = workflow.archive.fields
        chunk = max(1, max(info.fields[f].snapshot_chunk for f in fields))
        chunk = min(chunk, info.fields[fields[0]].n_snapshots)
        # a killed first run left its scan record (with the content sample) in the staging
        # area: compare with it, so a resumed first run reads nothing again
        resuming = previous is None and store.record("scan") is not None
        classification = classify_archive(scanned.reader, list(fields), chunk, archive_now,
                                          store.record("scan") if resuming else previous)
        if resuming and classification.state == "unchanged":
            classification = replace(classification, state="new",
                                     reason=f"no previous result (resumed; archive {classification.reason})")
        # every array written from here on carries units, names and coordinates from the archive
        store.writer.metadata = store_metadata(workflow, scanned.reader, info, scanned.time, scanned.time_unit)
        # a store of an older layout is reused when the newer layouts add nothing this archive has
        needed = result_store.needed_layout(store.writer.metadata)
        if isinstance(layout, (int, float)) and int(layout) < needed:
            context.warnings.append(
                f"{store.path} holds result store layout {layout}; this archive's store needs layout {needed} "
                f"(units, coordinates, peak amplitudes, block checksums{', point positions' if needed >= 4 else ''}): "
                "every stage is recomputed")
        return ScanResult(scanned, classification, archive_now,
                          stage_fingerprints(workflow, classification.identity, needed))

    def write(self, context: StageContext, result: ScanResult) -> tuple[StageRecord, ScanResult]:
        scanned, classification = result.scanned, result.classification
        write_scan(context.store.writer, scanned.time, scanned.snapshot_index)
        if classification.state == "grown":
            context.warnings.append(verification_note(classification))
        context.warnings.extend(scanned.warnings)
        return StageRecord("scan", result.fingerprints["scan"], "computed", 0, classification.bytes_read, {
            "bytes_sampled": result.archive["bytes_sampled"], "archive": result.archive,
            "samples": classification.samples, "identity": classification.identity,
            "classification": classification.state, "classification_reason": classification.reason,
            "verified_blocks": [list(block) for block in classification.verified],
            "memory_baseline": int(scanned.plan.baseline_bytes) if scanned.plan is not None else 0}), result

    def load(self, context: StageContext, record: StageRecord) -> ScanResult:
        raise NotImplementedError("scan is never reused: it runs in every run")

    def end(self, context: StageContext, record: StageRecord) -> str:
        return f"archive {record.details['classification']} ({record.details['classification_reason']})"


class CompressStage(_Base[Compressed]):
    """Compress the prepared snapshot matrix (or extend the stored sketch of a grown archive)."""

    name = "compress"
    read_back = True

    def begin(self, context: StageContext) -> str:
        workflow, scanned = context.workflow, context.scanned
        lifted = ""
        if scanned.lifted_rows:
            size = format_bytes(8 * scanned.lifted_rows * int(scanned.snapshot_index.size))
            lifted = f", lifted to {scanned.lifted_rows} values per snapshot ({size} per read, never stored)"
        return (f"{workflow.compress.method}, rank {workflow.compress.rank}, "
                f"{scanned.snapshot_index.size} snapshots{lifted}")

    def run(self, context: StageContext) -> Compressed:
        appended = try_append(context.workflow, context.scanned, context.scheduler, context.store,
                              context.fingerprints, context.scan.classification, context.warnings)
        if appended is not None:
            return appended
        assert context.compress is not None  # the runner gives its retry policy
        return context.compress(context, context.store.checkpoint_directory(self.name, self.fingerprint(context)))

    def write(self, context: StageContext, result: Compressed) -> tuple[StageRecord, Compressed]:
        workflow, store = context.workflow, context.store
        write_compressed(store.writer, result, context.scheduler.compute, scale_setting=workflow.prepare.scale)
        appended = "appended_snapshots" in result.info
        # the checksums of the blocks read, compared with the previous result's (workflow/checksums.py)
        checks, verified = record_checksums(store, workflow, result.info, context.warnings, keep_previous=appended)
        details: dict[str, Any] = {**checks, "settings": context.fingerprints["compress_settings"],
                                   "method": workflow.compress.method, "checksum_note": verified}
        if appended:
            details["appended_snapshots"] = result.info["appended_snapshots"]
            return StageRecord(self.name, self.fingerprint(context), "appended", 1, int(result.bytes_read),
                               details), result
        store.clear_checkpoints(self.name)
        details.update(projection_kind=result.projection_kind, checkpointed=True)
        return StageRecord(self.name, self.fingerprint(context), "computed", int(result.passes),
                           int(result.bytes_read), details), result

    def load(self, context: StageContext, record: StageRecord) -> Compressed:
        return load_compressed_result(context.workflow, context.scanned, context.store, record.passes,
                                      str(record.details.get("method", context.workflow.compress.method)))

    def end(self, context: StageContext, record: StageRecord) -> str:
        note = str(record.details.get("checksum_note") or "")
        note = f"; {note}" if note and record.status in ("appended", "computed") else ""
        if record.status == "appended":
            return (f"appended {record.details['appended_snapshots']} snapshots; "
                    f"{record.bytes_read / 1e6:.1f} MB read{note}")
        return f"{record.status}; {record.passes} passes, {record.bytes_read / 1e6:.1f} MB read in this run{note}"


#: coefficients (rank x snapshots, complex) up to this size are fitted with one BLAS thread
SMALL_FIT_BYTES = 8 * 2**20


class FitStage(_Base[Fitted]):
    """``fit.method`` on the compress result; writes the spectrum, operator, runs, eigenfunctions."""

    name = "fit"

    def begin(self, context: StageContext) -> str:
        return f"{context.workflow.fit.method} on {context.compressed.lowrank.rank} coefficients"

    def reusable(self, context: StageContext) -> bool:
        # fit is cheap (no archive read): recomputed whenever modes must be written again
        return all(_can_skip(context.store, name, context.fingerprints[name]) for name in ("fit", "modes"))

    def run(self, context: StageContext) -> Fitted:
        trim_heap()  # what compress freed goes back to the system before fit and modes allocate
        # a DMD of few coefficients is millisecond BLAS calls: one thread (a waiting pool made the
        # fit of 30 x 3941 probe coefficients 5-20x slower on a loaded 2-core machine, issue 15)
        compressed, workflow = context.compressed, context.workflow
        small = workflow.fit.method != "edmd" and \
            16 * compressed.lowrank.rank * int(context.scanned.snapshot_index.size) <= SMALL_FIT_BYTES
        with blas_threads(1) if small else contextlib.nullcontext():
            outcome = fit_stage(workflow, compressed, context.scanned,
                                memory_budget=compress_memory(workflow, context.scheduler),
                                say=context.reporter.message)
        return Fitted(0, tuple(outcome.warnings), outcome)

    def write(self, context: StageContext, result: Fitted) -> tuple[StageRecord, Fitted]:
        outcome = result.outcome
        assert outcome is not None
        # results.fit_output imports the fitting package (scipy.linalg, ~0.17 s): here, in
        # the stages that write the fit and the modes, not as every run starts
        from snaplift.results.fit_output import write_fit, write_fit_details

        writer, scanned = context.store.writer, context.scanned
        order, written = write_fit(writer, outcome, scanned.dt, residuals=outcome.residuals)
        write_fit_details(writer, outcome, order, scanned.time)
        warnings = [*outcome.warnings, *written]
        context.warnings.extend(warnings)
        details: dict[str, Any] = {outcome.details_key: dict(outcome.details)} if outcome.details else {}
        record = StageRecord(self.name, self.fingerprint(context), "computed", 0,
                             int(outcome.details.get("bytes_read", 0)),
                             {"method": outcome.method, **details, "n_modes": int(order.size), "warnings": warnings})
        return record, Fitted(int(order.size), tuple(warnings), outcome, order)

    def load(self, context: StageContext, record: StageRecord) -> Fitted:
        warnings = tuple(record.details.get("warnings", []))
        context.warnings.extend(warnings)
        return Fitted(int(record.details.get("n_modes", 0)), warnings)

    def end(self, context: StageContext, record: StageRecord) -> str:
        return f"computed; {record.details.get('n_modes', 0)} modes" if record.status == "computed" else record.status


class ModesStage(_Base[Fitted]):
    """The modes on the grid, fixed points and the reconstruction error."""

    name = "modes"

    def begin(self, context: StageContext) -> str:
        fitted = context.fitted
        return "modes" if fitted.outcome is None else f"{fitted.n_modes} modes on the grid"

    def reusable(self, context: StageContext) -> bool:
        return context.fitted.outcome is None  # the fit was reused, so are the modes

    def run(self, context: StageContext) -> Fitted:
        from snaplift.results.fit_output import modes_bytes

        check_free_space(context.store.area, modes_bytes(context.compressed.matrix, context.fitted.n_modes),
                         "the modes")
        trim_heap()
        return context.fitted

    def write(self, context: StageContext, result: Fitted) -> tuple[StageRecord, Fitted]:
        from snaplift.results.fit_output import write_modes

        assert result.outcome is not None and result.order is not None
        write_modes(context.store.writer, result.outcome, context.compressed, result.order, context.scheduler.compute)
        return StageRecord(self.name, self.fingerprint(context), "computed"), result

    def load(self, context: StageContext, record: StageRecord) -> Fitted:
        return context.fitted

    def end(self, context: StageContext, record: StageRecord) -> str:
        return record.status


class ReportStage(_Base[dict[str, Any]]):
    """A short summary of the spectrum and the errors, kept in the store's attributes."""

    name = "report"

    def begin(self, context: StageContext) -> str:
        return "summary"

    def reusable(self, context: StageContext) -> bool:
        return False

    def run(self, context: StageContext) -> dict[str, Any]:
        root: Any = context.store.writer.root
        spectrum, diagnostics = root["spectrum"], root["diagnostics"]
        count = min(10, spectrum["eigenvalue"].shape[0])
        # each array read once (a zarr read per value was 30 reads: 0.03-0.17 s of the run)
        frequency, growth, amplitude = (np.asarray(spectrum[name][:count]) for name in
                                        ("frequency", "growth", "amplitude"))
        leading = [{"frequency": float(frequency[k]), "growth": float(growth[k]),
                    "amplitude": float(amplitude[k])} for k in range(count)]
        return {"n_modes": int(spectrum["eigenvalue"].shape[0]), "leading_modes": leading,
                "max_projection_error": float(np.max(diagnostics["projection_error"][...])),
                "max_reconstruction_error": float(np.max(diagnostics["reconstruction_error"][...])),
                "warnings": len(context.warnings)}

    def write(self, context: StageContext, result: dict[str, Any]) -> tuple[StageRecord, dict[str, Any]]:
        return StageRecord(self.name, self.fingerprint(context), "computed", details={"summary": result}), result

    def load(self, context: StageContext, record: StageRecord) -> dict[str, Any]:
        return dict(record.details.get("summary", {}))

    def end(self, context: StageContext, record: StageRecord) -> str:
        return f"{context.fitted.n_modes} modes; {len(context.warnings)} warning(s)"


def _can_skip(store: StagedStore, stage: str, fingerprint: str) -> bool:
    """Whether ``stage`` has a kept or reusable record with this fingerprint (nothing is changed)."""
    for record in (store.record(stage), store.previous_record(stage)):
        if record and record.get("fingerprint") == fingerprint:
            return True
    return False


#: the pipeline, in order: the runner loops over it
STAGES: tuple[Stage[Any], ...] = (ScanStage(), CompressStage(), FitStage(), ModesStage(), ReportStage())
