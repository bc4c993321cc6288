"""The compress stage for a grown archive: extend the stored sketch with the new snapshots.

When the archive gained snapshots since the previous result (classified *grown* by
:mod:`snaplift.workflow.fingerprint`) and the previous result was a single-pass
``sketch`` with the same settings, the sketch state kept in the store's ``sketch/``
group is updated by reading only the new snapshots
(:func:`snaplift.stream.compress.sketch_append`; Tropp, Yurtsever, Udell, Cevher 2019,
SIAM J. Sci. Comput. 41(4): the sketches are linear in the data and the test matrices
are keyed by global snapshot index), then finished as in a full run
(:func:`snaplift.stream.sketch.finish_sketch`). The result equals a from-scratch run
with the same seed to rounding. Other methods (``randomized``, ``tsqr``) and
``check_pass: true`` (whose exact coefficients need every snapshot again) are
recomputed instead.
"""

from __future__ import annotations

from typing import Any

import numpy as np

from snaplift.archive.matrix import build_snapshot_matrix
from snaplift.cluster import Scheduler
from snaplift.results.stages import Compressed
from snaplift.workflow.scanning import Scanned
from snaplift.workflow.schema import Workflow

__all__ = ["append_compress", "can_append"]


def can_append(workflow: Workflow, old_index: np.ndarray | None, new_index: np.ndarray,
               sketch_state: dict[str, np.ndarray]) -> str | None:
    """None if the stored sketch can be extended to ``new_index``; else why not (one line)."""
    if workflow.compress.method != "sketch":
        return f"compress.method {workflow.compress.method!r} has no append path (only 'sketch' does)"
    if workflow.compress.check_pass:
        return "compress.check_pass needs every snapshot again"
    lift = workflow.field_lift
    if lift is not None and lift.delays > 1:
        return "delay windows at the old end change when snapshots are added"
    if workflow.archive.runs is not None or isinstance(workflow.archive.path, list):
        return "an archive of several runs is recomputed (appends extend one run)"
    if not sketch_state or old_index is None:
        return "the previous result kept no sketch state"
    old_index = np.asarray(old_index, dtype=np.int64)
    if new_index.size <= old_index.size or not np.array_equal(new_index[: old_index.size], old_index):
        return "the new snapshot selection does not extend the old one"
    return None


def append_compress(workflow: Workflow, scanned: Scanned, scheduler: Scheduler, sketch_state: dict[str, np.ndarray],
                    old_count: int) -> Compressed:
    """Compress result of the grown archive from the stored sketch plus a read of the new snapshots.

    Example
    -------
    >>> result = append_compress(workflow, scanned, scheduler, stored_sketch, 480)  # doctest: +SKIP
    >>> result.info["appended_snapshots"]                                           # doctest: +SKIP
    120
    """
    from snaplift.stream._passes import kept_row_blocks
    from snaplift.stream.compress import sketch_append
    from snaplift.stream.loop import runner_for
    from snaplift.stream.sketch import finish_sketch

    section = workflow.archive
    plan = scanned.plan
    index = np.asarray(scanned.snapshot_index, dtype=np.int64)

    def matrix_of(snapshots: np.ndarray) -> Any:
        return build_snapshot_matrix(scanned.reader, list(section.fields), snapshots=snapshots,
                                     snapshot_block=scanned.snapshot_block, weights=section.weights,
                                     mask=section.mask, lift=workflow.field_lift)

    new_matrix = matrix_of(index[old_count:])
    full_matrix = matrix_of(index)
    digests: dict[str, Any] = {}  # checksums of the new blocks as read (snaplift.workflow.checksums)
    with runner_for(scheduler) as runner:
        merged = sketch_append(sketch_state, new_matrix, plan, runner=runner,
                               in_flight=None if plan is None else plan.in_flight, digests=digests)
    row_blocks = kept_row_blocks(full_matrix, plan.point_blocks if plan is not None else None)
    preparation, lowrank = finish_sketch(merged, full_matrix, workflow.compress.rank,
                                         center=workflow.prepare.center, scale=workflow.prepare.scale,
                                         row_blocks=row_blocks)
    info = scanned.reader.describe()
    new_count = int(index.size - old_count)
    span = int(index[-1] - index[old_count] + 1)  # new snapshots are read as one range per block
    bytes_read = sum(info.fields[f].n_points * span * np.dtype(info.fields[f].stored_dtype).itemsize
                     for f in section.fields)
    return Compressed(full_matrix, preparation, lowrank, 1, int(bytes_read),
                      projection_kind=getattr(lowrank, "projection_kind", "estimate"), method="sketch",
                      sketch_state=merged.to_arrays(),
                      info={"appended_snapshots": new_count, "previous_snapshots": int(old_count),
                            "block_digests": digests or None, "blocks_verified": 0})
