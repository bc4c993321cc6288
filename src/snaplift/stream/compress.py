"""Compress the prepared snapshot matrix: one front door for the three methods.

``compress(matrix, plan, options, runner=...)`` runs the method's passes over the
planned tiles as bounded streaming loops (:mod:`snaplift.stream.loop`) and returns
a :class:`Compression`: the preparation (centring, scales, statistics of the first
read), the low-rank factors, passes, bytes read, whether coefficients/projection errors
are exact or estimates, and the sketch state for later appends.

- ``sketch``: Tropp, Yurtsever, Udell, Cevher (2017/2019), one read (+1 with
  ``check_pass``); :mod:`snaplift.linalg.sketch`.
- ``randomized``: Halko, Martinsson, Tropp (2011), ``2 + 2q`` reads;
  :func:`snaplift.linalg.randomized.randomized_compress`.
- ``tsqr``: Demmel, Grigori, Hoemmen, Langou (2012), two reads, exact;
  :func:`snaplift.linalg.tsqr.tsqr_compress`.

With ``checkpoint_dir`` the loop state is saved atomically every ``checkpoint_every``
(tiles or a duration) and at every pass end; calling :func:`compress` again with the
same arguments resumes from it, skipping finished passes and tiles.
"""

from __future__ import annotations

import contextlib
import hashlib
import json
import os
import threading
from collections.abc import Callable
from dataclasses import dataclass, field
from typing import Any

import numpy as np

from snaplift.archive.matrix import SnapshotMatrix
from snaplift.archive.plan import TilePlan, row_map_bytes
from snaplift.compress_methods import check_rank, get_method
from snaplift.errors import ArchiveError
from snaplift.linalg._blas import blas_threads
from snaplift.linalg._kernels import normalize_signs
from snaplift.linalg._testmatrix import ROW_MAPS
from snaplift.linalg.randomized import LowRank
from snaplift.linalg.sketch import SketchState, merge_sketches
from snaplift.prepare import Preparation
from snaplift.stream._digest import digest_table
from snaplift.stream._method_passes import randomized_compress, tsqr_compress
from snaplift.stream._passes import Pass, build_jobs, kept_row_blocks, preparing_of, product_read, sketch_read
from snaplift.stream._tasks import TileSource, release_caches, release_resident
from snaplift.stream.loop import Checkpointer, InlineRunner, StreamState, ThreadRunner, TileRunner
from snaplift.stream.sketch import finish_sketch

__all__ = ["CompressOptions", "Compression", "compress", "sketch_append", "default_in_flight"]


@dataclass(frozen=True)
class CompressOptions:
    """The ``compress`` and ``prepare`` settings the methods need, as plain values."""

    method: str = "randomized"
    rank: int = 40
    oversample: int = 10
    power_iterations: int = 1
    seed: int = 0
    sketch_widths: tuple[int, int] | None = None
    check_pass: bool = False
    center: bool = False
    scale: Any = "rms"
    #: co-range test matrix of ``sketch``: "sparse" (sparse sign, Tropp et al. 2019) or "gaussian"
    corange_map: str = "sparse"

    def widths(self, n: int, m: int) -> tuple[int, int]:
        """Sketch widths ``(k, l)`` of the first read for this method (:mod:`snaplift.compress_methods`)."""
        return get_method(self.method).widths(self.rank, oversample=self.oversample,
                                              sketch_widths=self.sketch_widths, n=n, m=m)


@dataclass(frozen=True)
class Compression:
    preparation: Preparation
    lowrank: LowRank
    passes: int
    #: bytes read from the archive by this call (a resumed call excludes what was checkpointed)
    bytes_read: int
    projection_kind: str
    method: str
    sketch_state: dict[str, np.ndarray] = field(default_factory=dict)
    info: dict[str, Any] = field(default_factory=dict)


#: an in-memory matrix up to this size is compressed with one BLAS thread
SINGLE_THREAD_BYTES = 32 * 2**20


def default_in_flight(workers: int) -> int:
    """Tasks outstanding: one per worker plus one queued, so no worker waits for the driver."""
    return int(workers) + 1


def _job_key(matrix: SnapshotMatrix, plan: TilePlan | None, options: CompressOptions, jobs: list[Any]) -> str:
    from snaplift.archive import _handles

    try:
        signature = list(_handles.signature(matrix.reader.path))
    except Exception:  # a series of files: the reader's own description is the signature
        signature = [matrix.reader.describe().size_bytes]
    payload = {
        "archive": matrix.reader.path, "signature": signature, "options": repr(options),
        "fields": [(f.name, f.n_rows) for f in matrix.fields],
        "snapshots": hashlib.sha256(np.ascontiguousarray(matrix.snapshot_index).tobytes()).hexdigest(),
        "tiles": [(j.tile.field, j.tile.rows, j.tile.columns, j.tile.span) for j in jobs],
    }
    return hashlib.sha256(json.dumps(payload, sort_keys=True, default=str).encode()).hexdigest()[:24]


def _columns(matrix: SnapshotMatrix, plan: TilePlan | None, method: str) -> list[tuple[int, int]]:
    m = matrix.shape[1]
    if get_method(method).whole_columns:
        return [(0, m)]
    return list(matrix.blocks)


def _source(matrix: SnapshotMatrix, options: CompressOptions, corange_width: int, row_blocks: list,
            resident: str = "") -> TileSource:
    if options.corange_map not in ROW_MAPS:
        raise ArchiveError(f"compress.corange_map {options.corange_map!r} is not one of {', '.join(ROW_MAPS)}")
    itemsize = np.dtype(matrix.dtype).itemsize
    cache = row_map_bytes(options.corange_map, matrix.shape[0], corange_width, itemsize) + (1 << 20)
    return TileSource(matrix.reader, matrix.fields, np.asarray(matrix.snapshot_index, dtype=np.int64),
                      bool(np.issubdtype(matrix.dtype, np.complexfloating)), int(options.seed), int(cache),
                      options.corange_map, resident)


def compress(matrix: SnapshotMatrix, plan: TilePlan | None, options: CompressOptions, *,
             runner: TileRunner | None = None, in_flight: int | None = None,
             checkpoint_dir: str | os.PathLike[str] | None = None, checkpoint_every: int | str | None = None,
             progress: Any = None) -> Compression:
    """Compress ``matrix`` with the method of ``options`` in bounded streaming passes.

    Parameters
    ----------
    matrix
        From :func:`snaplift.archive.matrix.build_snapshot_matrix` (its column blocks follow the plan).
    plan
        The tile plan (row blocks per field); None reads whole fields.
    options
        Method and settings.
    runner
        An entered :class:`~snaplift.stream.loop.ThreadRunner` or ``ClientRunner``
        (default: one thread).
    in_flight
        Tasks outstanding at once (default :func:`default_in_flight`).
    checkpoint_dir, checkpoint_every
        Save the loop state there, every so many tiles or seconds (default 60 s); resume
        from it when it matches this job.
    progress
        Object with ``add_work(n)`` / ``advance(n)`` (e.g. ``Scheduler.progress``).

    Returns
    -------
    Compression

    Example
    -------
    >>> result = compress(matrix, plan, CompressOptions(method="sketch", rank=20))  # doctest: +SKIP
    >>> result.passes, result.projection_kind                                        # doctest: +SKIP
    (1, 'estimate')
    """
    in_memory = plan is not None and plan.in_memory
    if runner is None or (in_memory and not isinstance(runner, InlineRunner)):
        # the in-memory path runs its one tile per pass here, whatever the scheduler
        with (InlineRunner() if in_memory else ThreadRunner(1)) as own:
            return compress(matrix, plan, options, runner=own, in_flight=in_flight, checkpoint_dir=checkpoint_dir,
                            checkpoint_every=checkpoint_every, progress=progress)
    n, m = matrix.shape
    rank = int(options.rank)
    check_rank(rank, n, m)
    get_method(options.method)
    row_blocks = kept_row_blocks(matrix, plan.point_blocks if plan is not None else None)
    jobs = build_jobs(matrix, row_blocks, [(0, m)] if in_memory else _columns(matrix, plan, options.method),
                      whole=in_memory)
    range_width, corange_width = options.widths(n, m)
    key = _job_key(matrix, plan, options, jobs)
    source = _source(matrix, options, corange_width, row_blocks, resident=key if in_memory else "")
    # the in-memory path reads a small matrix once: a killed run loses less than a checkpoint costs
    checkpoint = Checkpointer(checkpoint_dir, checkpoint_every) if checkpoint_dir is not None and not in_memory \
        else None
    state = (checkpoint.load(key) if checkpoint is not None else None) or StreamState(key)
    resumed = state.pass_number > 0 or bool(state.done)
    bytes_before = int(state.bytes_read)
    passes = Pass(runner, source, in_flight=in_flight or default_in_flight(runner.workers), checkpoint=checkpoint,
               progress=progress)
    # a small matrix in memory: one BLAS thread (its calls take milliseconds; a thread pool
    # waiting on a shared machine made them 5-50x slower, measured in the small-problems benchmark)
    small = in_memory and n * m * np.dtype(matrix.dtype).itemsize <= SINGLE_THREAD_BYTES
    try:
        with blas_threads(1) if small else contextlib.nullcontext():
            return _compress(matrix, options, passes, jobs, state, source, checkpoint, rank, range_width,
                             corange_width, row_blocks, resumed, bytes_before)
    finally:
        release_resident(key)
        _release_caches(runner)


def _release_caches(runner: TileRunner, *, test_matrices: bool = True) -> None:
    """Once a compress is done, drop what sped up its passes: the cached row test matrices
    (``8 n l`` bytes; kept with ``test_matrices=False``) and the kept tile buffers (one tile
    per reading thread), in this process and in every worker."""
    release_caches(test_matrices)
    client = getattr(runner, "client", None)
    if client is not None:
        try:  # one broadcast through the scheduler, not one per cache
            client.run(release_caches, test_matrices)
        except Exception:  # a lost worker has nothing left to drop
            pass


def _compress(matrix: SnapshotMatrix, options: CompressOptions, passes: Pass, jobs: list[Any], state: StreamState,
              source: TileSource, checkpoint: Checkpointer | None, rank: int, range_width: int, corange_width: int,
              row_blocks: list, resumed: bool, bytes_before: int) -> Compression:
    runner = passes.runner
    passes_of = METHOD_PASSES[options.method]
    preparation, lowrank, sketch_arrays = passes_of(_PassInputs(passes, matrix, jobs, state, source, options, rank,
                                                               range_width, corange_width, row_blocks))
    pass_count = int(state.pass_number)
    info = {"method": options.method, "range_width": range_width, "corange_width": corange_width,
            "corange_map": options.corange_map if options.method == "sketch" else None,
            "tiles": len(jobs), "in_memory": bool(source.resident), "in_flight": passes.in_flight,
            "runner": getattr(runner, "kind", "?"),
            "resumed": resumed, "checkpoints_saved": checkpoint.saves if checkpoint is not None else 0,
            "bytes_read_all_runs": int(state.bytes_read), "bytes_read_before_resume": bytes_before,
            # worker processes: bytes sent and received per pass run, next to the range accumulator's size
            "bytes_between_processes": list(passes.bytes_between_processes),
            "range_accumulator_bytes": int(matrix.shape[0]) * int(range_width) * int(np.dtype(matrix.dtype).itemsize),
            # checksums of the blocks read, and how many reads were verified against them (stream/_digest.py)
            "block_digests": digest_table(state, source, jobs),
            "blocks_verified": int(state.info.get("blocks_verified", 0))}
    if checkpoint is not None:
        checkpoint.remove()
    # bytes read by this call; a resumed run does not count what the killed one read
    return Compression(preparation, lowrank, pass_count, int(state.bytes_read) - bytes_before,
                       lowrank.projection_kind, options.method, sketch_arrays, info)


@dataclass(frozen=True)
class _PassInputs:
    """What the passes of a compress method get: the pass runner, the matrix and its tile
    jobs, the stream state (resumed or fresh), the options and the widths."""

    passes: Pass
    matrix: SnapshotMatrix
    jobs: list[Any]
    state: StreamState
    source: TileSource
    options: CompressOptions
    rank: int
    range_width: int
    corange_width: int
    row_blocks: list


_Passes = tuple[Preparation, LowRank, dict[str, np.ndarray]]


def _sketch_passes(m: _PassInputs) -> _Passes:
    """Single-pass sketch (Tropp et al. 2017/2019), finished in the driver; ``check_pass``
    adds one read for exact coefficients."""
    passes, matrix, state, options = m.passes, m.matrix, m.state, m.options
    saving = None
    ahead = _row_maps_ahead(m) if state.pass_number == 0 else None
    try:
        if state.pass_number == 0:
            # a field no wider than the co-range sketch is kept whole (exact_layout)
            sketch_read(passes, matrix, m.jobs, state, m.range_width, m.corange_width, m.corange_width)
            # checkpointed while the sketch is finished: the finish only reads the state's arrays
            saving = passes.end_pass(state, behind=True)
    finally:
        if ahead is not None:
            ahead.join()  # also after a failed read: no map enters the cache once it is released
    try:
        # the single read is over: its tile buffers go before the finishing temporaries come
        # (the row test matrices stay: finishing applies them once more)
        _release_caches(passes.runner, test_matrices=False)
        sketch = SketchState.from_stream(state.arrays, [f.n_rows for f in matrix.fields], matrix.snapshot_index,
                                         options.seed, m.source.complex_valued, options.corange_map,
                                         corange_width=m.corange_width, exact_limit=m.corange_width)
        preparation, lowrank = finish_sketch(sketch, matrix, m.rank, center=options.center, scale=options.scale,
                                             row_blocks=m.row_blocks)
    finally:
        if saving is not None:
            saving.result()  # before the next save (check pass) or the checkpoint's removal
    if options.check_pass:
        lowrank = _check_pass(passes, matrix, m.jobs, state, preparation, lowrank)
    return preparation, lowrank, sketch.to_arrays()


def _row_maps_ahead(m: _PassInputs) -> threading.Thread | None:
    """With worker processes, make this process's row test matrices (the finish applies them
    to ``Q``: :func:`snaplift.linalg.sketch.psi_products`, same keys, same cache) in a thread
    while the workers read, instead of after the read (0.1-0.5 s of the run's serial tail on a
    2-core machine, 262144 rows). The tile plan counts this copy with the driver's arrays.
    Under threads the tile tasks fill the same cache. A failure here is left to the finish."""
    if m.passes.runner.kind != "distributed" or not m.corange_width:
        return None
    from snaplift.linalg._testmatrix import cached_row_map

    def make() -> None:
        with contextlib.suppress(Exception):
            for field_rows, blocks in zip(m.matrix.fields, m.row_blocks):
                for r0, r1 in blocks:
                    cached_row_map(field_rows.offset + r0, field_rows.offset + r1, m.corange_width,
                                   seed=m.options.seed, complex_valued=m.source.complex_valued,
                                   kind=m.options.corange_map)

    thread = threading.Thread(target=make, name="snaplift-row-maps", daemon=True)
    thread.start()
    return thread


def _randomized_passes(m: _PassInputs) -> _Passes:
    """Randomized SVD with power iterations (Halko et al. 2011)."""
    options = m.options
    preparation, lowrank = randomized_compress(
        m.passes, m.matrix, m.jobs, m.state, rank=m.rank, oversample=options.oversample,
        power_iterations=options.power_iterations, seed=options.seed, center=options.center, scale=options.scale)
    return preparation, lowrank, {}


def _tsqr_passes(m: _PassInputs) -> _Passes:
    """TSQR of row blocks (Demmel et al. 2012), then the SVD of R."""
    preparation, lowrank = tsqr_compress(m.passes, m.matrix, m.jobs, m.state, rank=m.rank, center=m.options.center,
                                         scale=m.options.scale)
    return preparation, lowrank, {}


#: the passes of each method of :data:`snaplift.compress_methods.METHODS` (the registry keeps
#: what a method is, widths, passes, memory terms; this table what it runs; a test checks that
#: the two name the same methods)
METHOD_PASSES: dict[str, Callable[[_PassInputs], _Passes]] = {
    "sketch": _sketch_passes, "randomized": _randomized_passes, "tsqr": _tsqr_passes}


def _check_pass(passes: Pass, matrix: SnapshotMatrix, jobs: list[Any], state: StreamState,
                preparation: Preparation, lowrank: LowRank) -> LowRank:
    """One more read: exact ``C = U^H A`` and column norms; the SVD of C refines the factors."""
    if state.pass_number == 1:
        preparing = passes.runner.share(preparing_of(preparation))
        product_read(passes, matrix, jobs, state, preparing, np.asarray(lowrank.basis), "adjoint", name="check")
        passes.end_pass(state)
    coefficient = np.asarray(state.arrays["check"]).conj().T  # r x m, exact
    u_c, s, vh = np.linalg.svd(coefficient, full_matrices=False)
    u_c, vh = normalize_signs(u_c, vh)
    return LowRank(basis=np.asarray(lowrank.basis) @ u_c, singular_value=s.astype(np.float64), vh=vh,
                   column_norm=np.sqrt(np.asarray(state.arrays["check_norm_squares"], dtype=np.float64)),
                   passes=2, projection_kind="exact")


def sketch_append(old: SketchState | dict[str, np.ndarray], new_matrix: SnapshotMatrix, plan: TilePlan | None, *,
                  runner: TileRunner | None = None, in_flight: int | None = None,
                  digests: dict[str, Any] | None = None) -> SketchState:
    """Update a stored sketch with snapshots appended to the archive, reading only those.

    ``new_matrix`` is the snapshot matrix of the *new* snapshots only (same fields, mask,
    weights; archive snapshot numbers after the stored ones). The merged state finished
    by :func:`snaplift.stream.sketch.finish_sketch` equals a from-scratch sketch of all
    snapshots with the same seed to rounding, because both sketches are linear in the
    data and the test matrices are keyed by global index (Tropp et al. 2019, Sec. 2.3).

    Example
    -------
    >>> merged = sketch_append(stored_arrays, new_matrix, plan)            # doctest: +SKIP
    >>> preparation, lowrank = finish_sketch(merged, full_matrix, 20, center=False, scale="rms")  # doctest: +SKIP
    """
    old_state = old if isinstance(old, SketchState) else SketchState.from_arrays(old)
    if runner is None:
        with ThreadRunner(1) as own:
            return sketch_append(old_state, new_matrix, plan, runner=own, in_flight=in_flight, digests=digests)
    k, l = old_state.widths
    options = CompressOptions(method="sketch", rank=1, seed=old_state.seed, sketch_widths=(k, l),
                              corange_map=old_state.corange_map)
    row_blocks = kept_row_blocks(new_matrix, plan.point_blocks if plan is not None else None)
    jobs = build_jobs(new_matrix, row_blocks, list(new_matrix.blocks))
    source = _source(new_matrix, options, l, row_blocks)
    state = StreamState("append")
    passes = Pass(runner, source, in_flight=in_flight or default_in_flight(runner.workers))
    # the stored state's layout: which fields it kept whole (none in a store from before)
    sketch_read(passes, new_matrix, jobs, state, k, l, old_state.exact_limit)
    new = SketchState.from_stream(state.arrays, [f.n_rows for f in new_matrix.fields], new_matrix.snapshot_index,
                                  old_state.seed, source.complex_valued, old_state.corange_map,
                                  corange_width=l, exact_limit=old_state.exact_limit)
    return merge_sketches(old_state, new)
