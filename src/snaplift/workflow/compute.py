"""The computations of the compress and fit stages, as functions of plain values.

:func:`compress_stage` compresses the prepared snapshot matrix in bounded streaming passes
(:mod:`snaplift.stream.compress`); :func:`try_append` extends the stored sketch of a grown
archive instead, when it can (:mod:`snaplift.workflow.append`); :func:`fit_stage` runs
``fit.method`` on the coefficients. None of them writes the result store: the stages
(:mod:`snaplift.workflow.stages`) do, inside the runner's staging store.
"""

from __future__ import annotations

from pathlib import Path
from typing import TYPE_CHECKING, Any

import numpy as np

from snaplift.cluster import Scheduler
from snaplift.compress_methods import check_rank
from snaplift.results.stages import Compressed, load_compressed
from snaplift.results.staging import StagedStore
from snaplift.stream.compress import CompressOptions, compress
from snaplift.stream.loop import runner_for
from snaplift.workflow.append import append_compress, can_append
from snaplift.workflow.fingerprint import Classification
from snaplift.workflow.fit_methods import fit_outcome
from snaplift.workflow.scanning import Scanned, lifted_scale, snapshot_matrix_of
from snaplift.workflow.schema import Workflow

if TYPE_CHECKING:
    from snaplift.fitting.methods import FitResult

__all__ = ["compress_stage", "fit_stage", "load_compressed_result", "try_append"]


def compress_stage(workflow: Workflow, scanned: Scanned, scheduler: Scheduler, *,
                   checkpoint_dir: str | Path | None = None) -> Compressed:
    """Compress the prepared snapshot matrix with ``compress.method`` in bounded streaming passes.

    Statistics for centring and scaling come from the first read. With ``checkpoint_dir``
    (a folder) the loop state is saved there every ``compress.checkpoint_every`` (default
    60 s) and at each pass end, and a repeated call with the same settings resumes from it.
    """
    plan = scanned.plan
    matrix = snapshot_matrix_of(workflow, scanned)
    n, m = matrix.shape
    settings = workflow.compress
    rank = settings.rank
    if workflow.state_source == "state":
        rank = min(rank, n, m)  # a small raw state: its basis is only kept for the diagnostics
    check_rank(rank, n, m)
    options = CompressOptions(
        method=settings.method, rank=rank, oversample=settings.oversample,
        power_iterations=settings.power_iterations, seed=settings.seed,
        sketch_widths=settings.sketch_widths,
        check_pass=settings.check_pass, center=workflow.prepare.center,
        scale=lifted_scale(workflow.prepare.scale, matrix), corange_map=settings.corange_map or "sparse",
    )
    with runner_for(scheduler) as runner:
        result = compress(matrix, plan, options, runner=runner,
                          in_flight=None if plan is None else plan.in_flight,
                          checkpoint_dir=checkpoint_dir, checkpoint_every=settings.checkpoint_every,
                          progress=scheduler.progress)
    return Compressed(matrix, result.preparation, result.lowrank, result.passes, result.bytes_read,
                      projection_kind=result.projection_kind, method=result.method,
                      sketch_state=result.sketch_state, info=result.info)


def load_compressed_result(workflow: Workflow, scanned: Scanned, store: StagedStore, passes: int,
                           method: str) -> Compressed:
    """The compress result read back from the staging store (computed, kept or reused alike)."""
    lift = workflow.field_lift
    fields = [f.name for f in lift.lifted(list(workflow.archive.fields))] if lift else list(workflow.archive.fields)
    return load_compressed(store.writer.root, scanned.reader, fields, passes=passes, method=method,
                           snapshot_block=scanned.snapshot_block, where=str(store.store_path))


def try_append(workflow: Workflow, scanned: Scanned, scheduler: Scheduler, store: StagedStore,
               fingerprints: dict[str, str], classification: Classification, warnings: list[str]) -> Compressed | None:
    """The compress result of a grown archive by extending the stored sketch, or None (said in ``warnings``)."""
    if classification.state != "grown":
        return None
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


def fit_stage(workflow: Workflow, compressed: Compressed, scanned: Scanned, *, memory_budget: int | None = None,
              say: Any = None) -> FitResult:
    """``fit.method`` on the compress result (:mod:`snaplift.workflow.fit_methods`).

    DMD of the coefficients (affine term when the data were centred), EDMD of a
    dictionary of the coefficients or of the raw state, or optimized DMD; each with
    residuals (Colbrook & Townsend 2024) and amplitudes per run. ``memory_budget`` bounds
    the lifted matrix of EDMD; ``say`` receives the lifted size before fitting.
    """
    return fit_outcome(workflow, compressed, scanned, memory_budget=memory_budget, say=say)
