"""Passes over the archive for the compress methods: jobs, and what each pass folds.

A pass is :func:`snaplift.stream.loop.stream_tiles` over the plan's tiles with one tile
task and one fold. Accumulators live in ``StreamState.arrays`` under fixed names, so the
state can be checkpointed between any two tiles:

- ``range``: ``(n, k)`` rows of a range product (``X Omega`` or ``A Z``), summed over
  the time blocks of each row block;
- ``corange_<f>``: ``(m, l)`` columns of ``(Psi_f X_f)^T`` for field ``f``;
- ``adjoint``: ``(m, k)`` rows of ``A^H Q``, summed over row blocks;
- ``row_sum`` ``(n,)``, ``squares`` ``(fields, m)``: statistics of the raw weighted data;
- ``<name>_norm_squares`` ``(m,)``: exact squared column norms of the prepared ``A``.
"""

from __future__ import annotations

import contextlib
import threading
import uuid
from collections.abc import Sequence
from concurrent.futures import Future
from dataclasses import replace
from typing import Any

import numpy as np

from snaplift._process_memory import trim_heap
from snaplift.archive.matrix import SnapshotMatrix
from snaplift.errors import ArchiveChangedError
from snaplift.linalg._testmatrix import load_sparse_library
from snaplift.linalg.sketch import exact_layout
from snaplift.stream._digest import digested, verify
from snaplift.stream._tasks import Preparing, TileRef, TileSource, product_task, resident_loaded, sketch_task
from snaplift.stream.loop import Checkpointer, Job, StreamState, TileRunner, stream_tiles

__all__ = ["build_jobs", "kept_row_blocks", "sketch_read", "product_read", "Pass", "preparing_of"]


def kept_row_blocks(matrix: SnapshotMatrix, point_blocks: Sequence[Sequence[tuple[int, int]]] | None
                    ) -> list[list[tuple[int, int]]]:
    """Planned grid-point ranges of every field as ranges of its kept rows (masked points dropped)."""
    out: list[list[tuple[int, int]]] = []
    for index, field in enumerate(matrix.fields):
        blocks = point_blocks[index] if point_blocks is not None else [(0, int(np.prod(field.grid)))]
        ranges = []
        for p0, p1 in blocks:
            if field.keep is None:
                r0, r1 = int(p0), int(p1)
            else:
                r0, r1 = int(np.searchsorted(field.keep, p0)), int(np.searchsorted(field.keep, p1))
            if r1 > r0:
                ranges.append((r0, r1))
        out.append(ranges)
    return out


def build_jobs(matrix: SnapshotMatrix, row_blocks: list[list[tuple[int, int]]],
               columns: Sequence[tuple[int, int]], *, whole: bool = False) -> list[Job]:
    """Tiles in read order (time block by time block, fields in order), with stored bytes read.

    The lifted fields of one archive field (``lift:`` pointwise terms, delays) are row
    blocks of one tile when each fits a tile at full height (its planned row blocks are
    one whole block): one task reads the raw block once (the column block plus the delay
    window) and forms all their rows in one buffer (``TileRef.span``). When the planner
    split their rows, their tiles of one row block come one after the other and share
    one raw read (:mod:`snaplift.archive._shared_reads`); the bytes of the shared read are
    counted once, on the first of them. ``whole``: one tile of every field (the in-memory
    path), per column block.
    """
    info = matrix.reader.describe()
    jobs: list[Job] = []
    index = matrix.snapshot_index
    groups: dict[str, list[int]] = {}
    for f, field in enumerate(matrix.fields):
        groups.setdefault(field.archive_field, []).append(f)

    def read_bytes(first: Any, span: int, r0: int, r1: int) -> int:
        itemsize = int(np.dtype(info.fields[first.archive_field].stored_dtype).itemsize)
        points = (int(first.keep[r1 - 1]) + 1 - int(first.keep[r0])) if first.keep is not None else r1 - r0
        return (span + (int(first.window) if first.siblings > 1 else 0)) * points * itemsize

    for c0, c1 in columns:
        span = int(index[c1 - 1] - index[c0] + 1)
        if whole:
            nbytes = sum(read_bytes(matrix.fields[members[0]], span, 0, matrix.fields[members[0]].n_rows)
                         for members in groups.values())
            first = matrix.fields[0]
            jobs.append(Job(len(jobs), TileRef(0, (0, first.n_rows), (int(c0), int(c1)), len(jobs),
                                               span=len(matrix.fields)), nbytes))
            continue
        for members in groups.values():
            first = matrix.fields[members[0]]
            whole_rows = all(row_blocks[f] == [(0, matrix.fields[f].n_rows)] for f in members)
            if len(members) > 1 and whole_rows and members == list(range(members[0], members[-1] + 1)):
                jobs.append(Job(len(jobs), TileRef(members[0], (0, first.n_rows), (int(c0), int(c1)), len(jobs),
                                                   span=len(members)), read_bytes(first, span, 0, first.n_rows)))
                continue
            for block, (r0, r1) in enumerate(row_blocks[members[0]]):
                for position, f in enumerate(members):
                    b0, b1 = row_blocks[f][block]
                    jobs.append(Job(len(jobs), TileRef(f, (b0, b1), (int(c0), int(c1)), len(jobs)),
                                    read_bytes(first, span, r0, r1) if position == 0 else 0))
    return jobs


class Pass:
    """How one method runs a pass: runner, shared source, in-flight bound, checkpointing."""

    def __init__(self, runner: TileRunner, source: TileSource, *, in_flight: int,
                 checkpoint: Checkpointer | None = None, progress: Any = None) -> None:
        self.runner = runner
        # each worker's next tile is read while it multiplies the current one
        source = replace(source, read_ahead=int(getattr(runner, "read_ahead", 0) or 0))
        self.source = source
        self.shared_source = runner.share(source)
        self.in_flight = in_flight
        self.checkpoint = checkpoint
        self.progress = progress
        #: bytes between processes of each pass run (:attr:`TileRunner.bytes_between_processes`)
        self.bytes_between_processes: list[int] = []

    def slot_key(self, state: StreamState) -> str:
        # unique per run of a pass: a stopped run's slots never meet a resumed run's
        return f"{state.key}:{state.pass_number}:{uuid.uuid4().hex[:12]}"

    def read(self, task: Any, shared: tuple[Any, ...], jobs: Sequence[Job], fold: Any, state: StreamState,
            *, slot: str | None = None, sums: tuple[str, ...] = ()) -> None:
        """Run a pass; the task is called as ``task(source, *shared, slot_spec, tile)``.

        With ``slot`` (an accumulator name) and a runner that has slots, range products are
        summed in place in ordered slots (:mod:`snaplift.stream._slots`) and collected
        into ``state.arrays[slot]``; otherwise ``slot_spec`` is None and ``fold`` adds the
        returned products. ``sums``: names of ``(n,)`` vectors that the task sums in the
        same slots (as ``(n, 1)`` accumulators, e.g. ``row_sum``), collected into
        ``state.arrays[name]`` alike; without slots the task returns them for ``fold``.
        """
        if self.source.resident and all(resident_loaded(self.source.resident, job.id) for job in jobs):
            jobs = [replace(job, nbytes=0) for job in jobs]  # the in-memory path reads once
        if self.progress is not None and hasattr(self.progress, "add_work"):
            self.progress.add_work(len([j for j in jobs if j.id not in state.done]))
        count = int(getattr(self.runner, "slots", 0) or 0) if slot is not None else 0
        key = self.slot_key(state)
        by_id = {job.id: job for job in jobs}
        pending: set[int] = set()
        last: dict[int, int] = {}
        order = {job.id: position for position, job in enumerate(j for j in jobs if j.id not in state.done)}
        jobs = _with_reads_ahead(jobs, state, key, count or self.runner.workers, self.source)

        files = self.runner.accumulator_files if count else None

        def per_job(job: Job) -> tuple[Any, int | None]:
            if not count:
                return None, None
            index = order[job.id] % count
            after = last.get(index, -1)
            last[index] = job.id
            return (key, index, after, files), index

        def fold_and_note(tile: Any, result: Any) -> None:
            verify(state, self.source, tile, result, self.checkpoint)  # before the values count
            fold(tile, result)
            pending.add(_tile_id(tile))

        def gather(name: str, target: str, vector: bool) -> set[int]:
            """Collect the slots of ``name`` into ``state.arrays[target]``; the tiles they hold."""
            parts = self.runner.collect(key, name)
            ids = [i for index in sorted(parts) for i in parts[index][1]]
            if len(ids) != len(set(ids)) or not set(ids) <= pending:
                raise RuntimeError(f"compress pass {state.pass_number}: a tile was counted twice "
                                   "(a task ran twice); run again to resume from the last checkpoint")
            for index in sorted(parts):  # a fixed order of summation
                value = parts[index][0]  # emptied out of its slot: ours to keep or add into
                if vector:
                    value = value[:, 0]
                if target in state.arrays:
                    state.arrays[target] += value
                else:
                    state.arrays[target] = value
                del value
            parts.clear()
            return set(ids)

        def flush() -> None:
            if not count:
                return
            assert slot is not None  # slots are keyed whenever tiles were counted into them
            missing = pending - gather("range", slot, False)
            missing_sums = {name: pending - gather(name, name, True) for name in sums}
            again_ids = missing.union(*missing_sums.values())
            if again_ids:
                # a worker died and took its slot with it: read those tiles again, returning
                # their products (their small results are already folded)
                again = StreamState(state.key)

                def add_only(tile: Any, result: Any) -> None:
                    verify(state, self.source, tile, result, self.checkpoint)
                    tile_id = _tile_id(tile)
                    if tile_id in missing:
                        _add_rows(state, slot, self.source, tile, result)
                    for name, lost in missing_sums.items():
                        if tile_id in lost:
                            g0, g1 = tile.global_rows(self.source)
                            state.arrays[name][g0:g1] += result[name]

                stream_tiles(self.runner, digested, (task, self.shared_source, *shared, None),
                          [by_id[i] for i in sorted(again_ids)], add_only, again, in_flight=self.in_flight)
                state.bytes_read += again.bytes_read
            pending.clear()
            last.clear()

        running = getattr(self.runner, "tiles_running", None)
        wire = int(getattr(self.runner, "bytes_between_processes", 0) or 0)
        # summed in slots, tasks return small results: worker processes keep several tiles
        # queued each (TileRunner.queued_tiles); lost tiles read again below return their
        # products, so they keep the plan's bound
        in_flight = max(self.in_flight, int(getattr(self.runner, "queued_tiles", 0) or 0)) if count \
            else self.in_flight
        try:
            with running() if running is not None else contextlib.nullcontext():
                stream_tiles(self.runner, digested, (task, self.shared_source, *shared), jobs, fold_and_note, state,
                          in_flight=in_flight, checkpoint=self.checkpoint, progress=self.progress,
                          flush=flush, per_job=per_job)
            flush()
            self.bytes_between_processes.append(int(getattr(self.runner, "bytes_between_processes", 0) or 0) - wire)
        except BaseException as error:
            if count:  # wake and fail tiles waiting for a predecessor that will never come
                self.runner.discard(key, abort=True)
            if isinstance(error, ArchiveChangedError) and self.checkpoint is not None:
                self.checkpoint.remove()  # read from another archive: the next run starts afresh
            raise

    def end_pass(self, state: StreamState, *, behind: bool = False) -> Future[None] | None:
        """Close a pass once its derived arrays are in ``state`` (and checkpoint that).

        With ``behind`` the checkpoint is written in a thread while the caller goes on
        (it must not change ``state``'s arrays meanwhile) and the returned future is waited
        for before the next save or the end of the compress; its ``result()`` raises what the
        save raised. (The sketch's finish runs beside it: 0.2-0.3 s of the run, issue 16.)
        """
        state.finish_pass()
        # the tile threads' allocator arenas keep what the pass freed; given back now, it is
        # not held beside the next pass's arrays (issue 11: peaks over compress.memory)
        trim_heap()
        if self.checkpoint is None:
            return None
        if not behind:
            self.checkpoint.save(state)
            return None
        future: Future[None] = Future()
        checkpoint = self.checkpoint

        def save() -> None:
            try:
                checkpoint.save(state)
            except BaseException as error:  # noqa: BLE001 -- handed to the waiting caller
                future.set_exception(error)
            else:
                future.set_result(None)

        threading.Thread(target=save, name="snaplift-checkpoint", daemon=True).start()
        return future


def _with_reads_ahead(jobs: Sequence[Job], state: StreamState, key: str, stride: int, source: TileSource
                      ) -> Sequence[Job]:
    """Jobs whose tiles name the tile read ahead for them: the one ``stride`` later (with
    slots, the next tile of the same slot, hence of the same worker process)."""
    todo = [job for job in jobs if job.id not in state.done]
    if not source.read_ahead or not todo or not all(isinstance(job.tile, TileRef) for job in todo):
        return jobs
    out = []
    for position, job in enumerate(todo):
        later = todo[position + stride].tile if position + stride < len(todo) else None
        ahead = replace(later, ahead=None, read_key=key) if later is not None else None
        out.append(replace(job, tile=replace(job.tile, ahead=ahead, read_key=key)))
    return out


def _add_rows(state: StreamState, name: str, source: TileSource, tile: Any, result: dict[str, Any]) -> None:
    """Fold a returned range product (``result['range']`` or ``['product']``) into its rows."""
    value = result.get("range", result.get("product"))
    if value is None:
        return
    g0, g1 = tile.global_rows(source)
    if name not in state.arrays:
        state.arrays[name] = np.zeros((source.n_rows, value.shape[1]), dtype=value.dtype)
    state.arrays[name][g0:g1] += value


def _tile_id(tile: Any) -> int:
    return int(tile[0].id if isinstance(tile, tuple) else tile.id)


def _zeros(state: StreamState, name: str, shape: tuple[int, ...], dtype: Any) -> np.ndarray:
    if name not in state.arrays:
        state.arrays[name] = np.zeros(shape, dtype=dtype)
    return state.arrays[name]


def sketch_read(passes: Pass, matrix: SnapshotMatrix, jobs: Sequence[Job], state: StreamState,
                range_width: int, corange_width: int, exact_limit: int = 0) -> None:
    """The first read: ``range`` = X_w Omega, ``corange_<f>`` = (Psi_f X_f)^T, statistics.

    The fields of at most ``exact_limit`` rows keep their raw rows instead, side by side in
    ``exact`` (m x their rows; :func:`snaplift.linalg.sketch.exact_layout`).
    """
    n, m = matrix.shape
    dtype = matrix.dtype
    if corange_width:
        load_sparse_library()  # before the first read (see there)
    exact, start = exact_layout([f.n_rows for f in matrix.fields], exact_limit if corange_width else 0)
    whole = len(jobs) == 1 and jobs[0].tile.columns == (0, m) and jobs[0].tile.span == len(matrix.fields)
    first_only = whole and not state.done  # the in-memory path: its one tile's blocks are the sums
    if corange_width and first_only:
        corange: list[Any] = [None] * len(matrix.fields)
    else:
        corange = [None if exact[f] else _zeros(state, f"corange_{f}", (m, corange_width), dtype)
                   for f in range(len(matrix.fields))] if corange_width else []
    kept = None if first_only or not start[-1] else _zeros(state, "exact", (m, int(start[-1])), dtype)
    row_sum = _zeros(state, "row_sum", (n,), dtype)
    squares = _zeros(state, "squares", (len(matrix.fields), m), np.float64)

    def fold(tile: TileRef, result: dict[str, Any]) -> None:
        g0, g1 = tile.global_rows(passes.source)
        c0, c1 = tile.columns
        _add_rows(state, "range", passes.source, tile, result)
        if result["row_sum"] is not None:  # None: summed in the worker's slot
            row_sum[g0:g1] += result["row_sum"]
        squares[tile.field:tile.field + tile.span, c0:c1] += np.reshape(result["squares"], (tile.span, -1))
        if not corange:
            return
        if result.get("exact") is not None:
            first = next(f for f in range(tile.field, tile.field + tile.span) if exact[f])
            e0 = int(start[first]) + (tile.rows[0] if tile.span == 1 else 0)
            block = result["exact"]
            if kept is None:  # the only tile: its block is the state
                state.arrays["exact"] = block
            else:
                kept[c0:c1, e0:e0 + block.shape[1]] = block
        parts = result["corange"] if tile.span > 1 else [result["corange"]]
        for f, part in enumerate(parts, start=tile.field):
            if part is None:
                continue
            if corange[f] is None:  # the only tile: its blocks are the sums
                corange[f] = state.arrays[f"corange_{f}"] = part
            else:
                corange[f][c0:c1] += part

    passes.read(sketch_task, ((int(range_width), int(corange_width), int(exact_limit)),), jobs, fold, state,
            slot="range", sums=("row_sum",))
    if "range" not in state.arrays:
        state.arrays["range"] = np.zeros((n, range_width), dtype=dtype)


def product_read(passes: Pass, matrix: SnapshotMatrix, jobs: Sequence[Job], state: StreamState,
                 preparing_handle: Any, operand: np.ndarray, kind: str, *, name: str, norms: bool = True) -> None:
    """``kind='range'``: ``state.arrays[name] = A @ operand`` (n x k); ``'adjoint'``: ``A^H @ operand``
    (m x k) plus, with ``norms``, ``<name>_norm_squares`` (exact squared column norms of A)."""
    n, m = matrix.shape
    width = operand.shape[1]
    dtype = np.result_type(matrix.dtype, operand.dtype)
    shared_operand = passes.runner.share(operand)
    if kind == "range":
        def fold(tile: TileRef, result: dict[str, Any]) -> None:
            _add_rows(state, name, passes.source, tile, result)  # only when not summed in slots
    else:
        out = _zeros(state, name, (m, width), dtype)
        squares = _zeros(state, f"{name}_norm_squares", (m,), np.float64) if norms else None

        def fold(tile: TileRef, result: dict[str, Any]) -> None:
            c0, c1 = tile.columns
            out[c0:c1] += result["product"]
            if squares is not None:
                squares[c0:c1] += result["squares"]

        if not norms:
            kind = "adjoint_only"
    try:
        passes.read(product_task, (preparing_handle, shared_operand, kind), jobs, fold, state,
                slot=name if kind == "range" else None)
    finally:
        unshare = getattr(passes.runner, "unshare", None)
        if unshare is not None:  # worker processes: the operand leaves them with its pass
            unshare(shared_operand)
    if kind == "range" and name not in state.arrays:
        state.arrays[name] = np.zeros((n, width), dtype=dtype)


def preparing_of(preparation: Any) -> Preparing:
    return Preparing(np.asarray(preparation.row_scale, dtype=np.float64),
                     None if preparation.mean is None else np.asarray(preparation.mean))
