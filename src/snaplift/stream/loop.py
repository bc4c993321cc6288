"""The bounded streaming loop over tiles, its runners, and its checkpointable state.

Compression reads the archive as a sequence of tiles. Each tile is a small task (reader
descriptor + index ranges) submitted to the scheduler with at most ``in_flight`` tasks
outstanding; small results are folded, *in tile order*, into per-row-block accumulators
held by the driver, and full-height range products are summed in place in per-worker
slots (:mod:`snaplift.stream._slots`) that the driver collects at pass ends and before
checkpoints. So memory is ``accumulators x (workers + 1) + in_flight x (tile + its
result)`` whatever the archive length, and no lazy graph of full-height partial sums is
ever built. Results depend on the seed and the data only; which worker summed which
tile changes them at rounding level.

The loop's state (:class:`StreamState`: accumulators, the ledger of tiles already folded,
the pass number, bytes read) is a plain object that :meth:`StreamState.save` writes
atomically (temporary file + ``os.replace``); a loop given a loaded state skips the
tiles in its ledger, so a killed run resumes and reads at most one checkpoint interval
again.

Runners: :class:`ThreadRunner` (a thread pool in this process, BLAS limited to a
share of the cores while tiles run) and :class:`ClientRunner` (a ``distributed``
client: worker processes, large read-only inputs scattered once). :func:`runner_for`
picks one for a scheduler.
"""

from __future__ import annotations

from collections import deque
from collections.abc import Callable, Iterable, Iterator
from concurrent.futures import ThreadPoolExecutor
from dataclasses import dataclass
from typing import Any, Protocol

import numpy as np

from snaplift.linalg._blas import blas_threads
from snaplift.stream._shared_arrays import SharedArray, SharedDirectory
from snaplift.stream.checkpoint import Checkpointer, StreamState, load_checkpoint, save_checkpoint
from snaplift.units import usable_cores

__all__ = ["TileRunner", "ThreadRunner", "ClientRunner", "InlineRunner", "runner_for", "StreamState", "Checkpointer",
           "stream_tiles", "save_checkpoint", "load_checkpoint"]


class TileRunner(Protocol):
    """What the loop needs of a scheduler."""

    workers: int
    kind: str

    def share(self, value: Any) -> Any: ...

    def submit(self, function: Callable[..., Any], *args: Any, where: int | None = None) -> Any: ...

    def result(self, future: Any) -> Any: ...

    def cancel(self, future: Any) -> None: ...

    def collect(self, key: str, name: str) -> dict[int, tuple[np.ndarray, list[int]]]: ...

    def discard(self, key: str, *, abort: bool) -> None: ...

    @property
    def slots(self) -> int:
        """Accumulation slots for range products (0: tasks return their products instead)."""
        ...

    @property
    def read_ahead(self) -> int:
        """Reader threads per process for reading each worker's next tile ahead (0: none;
        :mod:`snaplift.stream._prefetch`)."""
        ...

    @property
    def bytes_between_processes(self) -> int:
        """Bytes of values sent to and received from worker processes so far (0 for threads)."""
        ...

    @property
    def queued_tiles(self) -> int:
        """Tiles a pass that sums its range products in slots keeps outstanding at least
        (0: the plan's ``in_flight`` as it is)."""
        ...

    @property
    def accumulator_files(self) -> tuple[str, str] | None:
        """Where worker processes on this host make their slots' accumulators, so that
        :meth:`collect` maps them instead of receiving copies
        (:class:`~snaplift.stream._shared_arrays.SharedDirectory`; None: in the slots' process)."""
        ...


class ThreadRunner:
    """Tiles in a pool of ``workers`` threads of this process.

    While a pass runs (:meth:`tiles_running`) BLAS gets ``cores // workers`` threads (one
    each when there are as many workers as cores), so tiles do not oversubscribe the
    cores; between passes the driver's own linear algebra (TSQR of the range sketch,
    small SVDs) uses the whole BLAS thread pool.
    """

    kind = "threads"

    def __init__(self, workers: int) -> None:
        self.workers = max(1, int(workers))
        self._pool: ThreadPoolExecutor | None = None

    def __enter__(self) -> ThreadRunner:
        self._pool = ThreadPoolExecutor(self.workers, thread_name_prefix="snaplift-tile")
        return self

    def __exit__(self, *exc: Any) -> None:
        assert self._pool is not None
        self._pool.shutdown(wait=True, cancel_futures=True)
        self._pool = None

    @property
    def blas_threads_per_tile(self) -> int:
        return max(1, usable_cores() // self.workers)

    def tiles_running(self) -> Any:
        """Context of a pass: BLAS limited to :attr:`blas_threads_per_tile` threads."""
        return blas_threads(self.blas_threads_per_tile)

    def share(self, value: Any) -> Any:
        return value

    @property
    def slots(self) -> int:
        return self.workers

    @property
    def read_ahead(self) -> int:
        return self.workers

    bytes_between_processes = 0
    queued_tiles = 0  # a free thread takes the next tile from the pool's queue at once
    accumulator_files = None  # the slots are in this process

    def submit(self, function: Callable[..., Any], *args: Any, where: int | None = None) -> Any:
        if self._pool is None:
            raise RuntimeError("ThreadRunner used outside its 'with' block")
        return self._pool.submit(function, *args)

    def result(self, future: Any) -> Any:
        return future.result()

    def cancel(self, future: Any) -> None:
        future.cancel()

    def collect(self, key: str, name: str) -> dict[int, tuple[np.ndarray, list[int]]]:
        from snaplift.stream._slots import collect

        return collect(key, name)

    def discard(self, key: str, *, abort: bool) -> None:
        from snaplift.stream._slots import discard

        discard(key, abort=abort)


#: tiles kept outstanding per worker process in a pass summed in slots (:attr:`ClientRunner.queued_tiles`)
QUEUED_TILES_PER_WORKER = 4


class ClientRunner:
    """Tiles as ``distributed`` futures; shared inputs scattered once to every worker."""

    kind = "distributed"

    def __init__(self, client: Any, *, retries: int = 0, use_slots: bool = True) -> None:
        self.client = client
        self.retries = int(retries)
        self.addresses = sorted(client.scheduler_info().get("workers", {}))
        self.workers = max(1, len(self.addresses))
        # slot s lives in worker s; batch clusters whose workers retire return products instead
        self.use_slots = bool(use_slots) and bool(self.addresses)
        self._shared: list[Any] = []
        #: bytes of the values sent to workers (scattered inputs, task arguments) and received
        #: from them (task results, collected slots), by ``dask.sizeof``: what crosses between
        #: processes, without the framing of the messages
        self.bytes_sent = 0
        self.bytes_received = 0
        #: tasks submitted so far (their order is their priority: :meth:`submit`)
        self._submitted = 0
        #: the memory file system workers on this host make their accumulators in (:attr:`accumulator_files`)
        self._memory_files: SharedDirectory | None = None

    @property
    def bytes_between_processes(self) -> int:
        return self.bytes_sent + self.bytes_received

    @property
    def slots(self) -> int:
        return len(self.addresses) if self.use_slots else 0

    @property
    def read_ahead(self) -> int:
        """Tile threads of a worker: a slot's tiles run on one worker, so its next tile is
        read where it will be multiplied; workers that retire (no slots) read nothing ahead."""
        if not self.use_slots:
            return 0
        threads = self.client.nthreads()
        return max(1, max((int(n) for n in threads.values()), default=1))

    @property
    def queued_tiles(self) -> int:
        """:data:`QUEUED_TILES_PER_WORKER` per worker when every worker runs one task at a time
        and tiles are summed in slots (0 otherwise).

        Tiles are pinned to workers (tile ``i`` to slot ``i mod S``) and folded in order, so
        with the plan's ``workers + 1`` tiles outstanding a worker that finished its tile
        often had none queued: it idled for a round trip through the scheduler and the
        driver, and whenever the other worker was behind (measured on 2 GiB, 8 snapshots per
        chunk, warm: one of two workers idle 0.35-2.0 s of a 2.3-12 s compress). With
        several tiles queued per worker it runs ahead. The tasks of one worker run in the
        order they were submitted (:meth:`submit` gives earlier ones priority), so a queued
        tile never parks a full-height product; what each returns is small (its co-range
        columns and statistics), far below the full-height results the plan counts for
        worker processes (``in_flight x result``). With several threads per worker, tiles of
        one slot could run at once and park: the plan's bound is kept.
        """
        if not self.use_slots:
            return 0
        if any(int(n) != 1 for n in self.client.nthreads().values()):
            return 0
        return QUEUED_TILES_PER_WORKER * self.workers

    @property
    def accumulator_files(self) -> tuple[str, str] | None:
        if not self.use_slots:
            return None
        if self._memory_files is None:
            self._memory_files = SharedDirectory()
        return self._memory_files.spec

    def __enter__(self) -> ClientRunner:
        return self

    def __exit__(self, *exc: Any) -> None:
        for future in self._shared:
            future.release()
        self._shared = []
        if self._memory_files is not None:
            self._memory_files.close()
            self._memory_files = None

    def share(self, value: Any) -> Any:
        future = self.client.scatter(value, broadcast=True, hash=False)
        self.bytes_sent += _sizeof(value) * self.workers
        self._shared.append(future)
        return future

    def unshare(self, shared: Any) -> None:
        """Drop a value :meth:`share` gave every worker once its pass is over (an operand of
        ``n x k`` kept until the runner closes would stay in every worker beside the next one)."""
        if any(shared is kept for kept in self._shared):
            self._shared = [kept for kept in self._shared if kept is not shared]
            shared.release()

    def submit(self, function: Callable[..., Any], *args: Any, where: int | None = None) -> Any:
        self.bytes_sent += sum(_sizeof(arg) for arg in args if not _is_future(arg))
        # earlier tasks first: a worker given several queued tiles of one slot runs them in
        # the order they were submitted (distributed breaks ties among the tasks of one
        # submission burst by their random keys; a tile run before its predecessor parks a
        # full-height product, :mod:`snaplift.stream._slots`)
        self._submitted += 1
        if where is not None and self.use_slots:
            return self.client.submit(function, *args, pure=False, retries=self.retries,
                                      workers=[self.addresses[where % len(self.addresses)]],
                                      allow_other_workers=False, priority=-self._submitted)
        return self.client.submit(function, *args, pure=False, retries=self.retries, priority=-self._submitted)

    def result(self, future: Any) -> Any:
        if self.use_slots:
            # a task pinned to a worker that died would wait forever: notice and stop
            while True:
                try:
                    value = future.result(timeout=5)
                    break
                except TimeoutError:
                    alive = set(self.client.scheduler_info().get("workers", {}))
                    if not set(self.addresses) <= alive:
                        raise RuntimeError(
                            "a worker holding compress accumulators was lost; run again to resume from "
                            "the last checkpoint"
                        ) from None
        else:
            value = future.result()
        future.release()
        self.bytes_received += _sizeof(value)
        return value

    def cancel(self, future: Any) -> None:
        future.cancel()

    def collect(self, key: str, name: str) -> dict[int, tuple[np.ndarray, list[int]]]:
        """The slots of every worker process, each fetched straight from its worker.

        One task pinned to each live worker empties its slots (no tile task runs then: the
        pass has drained), and the client gathers the results from the workers directly.
        ``Client.run`` went through the scheduler, which received every accumulator and
        sent it on (two transfers and two (de)serialisations; with a local cluster both in
        the driver's process): 2 x 170 MB took 0.3-0.5 s that way, 0.1-0.4 s directly.
        Workers that share this process's memory file system made their whole-height
        accumulators there (:attr:`accumulator_files`); those are mapped here, neither sent
        nor copied, and their bytes are counted as received all the same. A worker lost
        meanwhile gives nothing; its tiles are read again by the pass.
        """
        from snaplift.stream._slots import collect_remote

        alive = set(self.client.scheduler_info().get("workers", {}))
        addresses = [address for address in self.addresses if address in alive]
        futures = [self.client.submit(collect_remote, key, name, pure=False, workers=[address],
                                      allow_other_workers=False) for address in addresses]
        out: dict[int, tuple[np.ndarray, list[int]]] = {}
        try:
            finished = [future for future, address in zip(futures, addresses) if self._finished(future, address)]
            for part in self.client.gather(finished, direct=True):  # from every worker at once
                self.bytes_received += _sizeof(part)
                for index, (value, tiles) in part.items():
                    if isinstance(value, SharedArray):
                        self.bytes_received += value.nbytes
                        value = value.load()
                    out[index] = (value, tiles)
        finally:
            for future in futures:
                future.release()
        return out

    def _finished(self, future: Any, address: str) -> bool:
        """Wait for a task pinned to ``address`` (its value stays on the worker); False when
        that worker was lost meanwhile. The task's own error is raised, with its type."""
        from concurrent.futures import CancelledError

        def lost() -> bool:
            return address not in self.client.scheduler_info().get("workers", {})

        while True:
            try:
                error = future.exception(timeout=5)
            except TimeoutError:
                if lost():
                    future.cancel()
                    return False
                continue
            except CancelledError:
                if lost():
                    return False
                raise
            if error is None:
                return True
            if lost():
                return False
            raise error

    def discard(self, key: str, *, abort: bool) -> None:
        from snaplift.stream._slots import discard

        try:
            self.client.run(discard, key, abort=abort)
        except Exception:  # a lost worker has no slots left to discard
            pass


def _sizeof(value: Any) -> int:
    from dask.sizeof import sizeof  # dask is installed wherever a distributed client runs

    return int(sizeof(value))


def _is_future(value: Any) -> bool:
    """A reference to data already on the workers (a scattered input): nothing is sent again."""
    from distributed import Future  # imported already wherever a client runs

    return isinstance(value, Future)


class _Done:
    __slots__ = ("value",)

    def __init__(self, value: Any) -> None:
        self.value = value


class InlineRunner:
    """Tasks run in this thread as they are submitted: the in-memory path, where one tile
    holds the whole matrix and a scheduler round trip would only add latency. BLAS keeps
    its whole thread pool (the one task is the only work)."""

    kind = "inline"
    workers = 1
    slots = 0
    read_ahead = 0
    bytes_between_processes = 0
    queued_tiles = 0
    accumulator_files = None

    def __enter__(self) -> InlineRunner:
        return self

    def __exit__(self, *exc: Any) -> None:
        return None

    def share(self, value: Any) -> Any:
        return value

    def submit(self, function: Callable[..., Any], *args: Any, where: int | None = None) -> Any:
        return _Done(function(*args))

    def result(self, future: Any) -> Any:
        return future.value

    def cancel(self, future: Any) -> None:
        return None

    def collect(self, key: str, name: str) -> dict[int, tuple[np.ndarray, list[int]]]:
        return {}

    def discard(self, key: str, *, abort: bool) -> None:
        return None


def runner_for(scheduler: Any) -> ThreadRunner | ClientRunner:
    """The runner matching a :class:`snaplift.cluster.Scheduler` (use it as a context manager)."""
    client = getattr(scheduler, "client", None)
    if client is not None:
        # workers of batch jobs retire on a lifetime: keep no state in them
        stable = getattr(scheduler, "kind", "local") in ("local", "allocation")
        return ClientRunner(client, retries=getattr(scheduler, "task_retries", 0), use_slots=stable)
    return ThreadRunner(getattr(scheduler, "workers", 1))



@dataclass(frozen=True)
class Job:
    """One tile task of a pass: its id in the ledger, its descriptor, bytes it reads."""

    id: int
    tile: Any
    nbytes: int


def stream_tiles(
    runner: TileRunner,
    task: Callable[..., Any],
    shared: tuple[Any, ...],
    jobs: Iterable[Job],
    fold: Callable[[Any, Any], None],
    state: StreamState,
    *,
    in_flight: int,
    checkpoint: Checkpointer | None = None,
    progress: Any = None,
    flush: Callable[[], None] | None = None,
    per_job: Callable[[Job], tuple[Any, int | None]] | None = None,
) -> None:
    """Run ``task(*shared, job.tile)`` for every job not in ``state.done``; fold results in order.

    At most ``in_flight`` tasks are outstanding. ``fold(tile, result)`` updates
    ``state.arrays``; after it the job's id enters the ledger and its bytes are counted.
    With a tile-count interval no more than that many tiles are submitted between two
    saves, so a killed run reads at most one interval again (with a duration, at most the
    tiles of one interval plus those in flight). When a checkpoint is due, the
    outstanding tasks are drained and folded, ``flush()``
    brings what workers hold in their slots into ``state``, and only then is the state
    saved, so a checkpoint is always consistent. ``per_job(job)`` gives an extra argument
    (placed before the tile) and a placement hint for each task. On an error the
    outstanding tasks are cancelled and the error propagates (a task's own error keeps
    its type).
    """
    todo: Iterator[Job] = (job for job in jobs if job.id not in state.done)
    queue: deque[tuple[Job, Any]] = deque()
    limit = max(1, int(in_flight))

    def fold_head() -> bool:
        """Fold the oldest result; True when the checkpoint is due."""
        job, future = queue.popleft()
        result = runner.result(future)
        fold(job.tile, result)
        state.done.add(job.id)
        state.bytes_read += job.nbytes
        if progress is not None:
            progress.advance(1)
        return checkpoint is not None and checkpoint.tick()

    # tiles submitted since the last save: with a tile-count interval, no more than one
    # interval is ever outstanding or unsaved, so a kill re-reads at most that many tiles
    since_save = 0
    quota = checkpoint.every_tiles if checkpoint is not None else None

    def save() -> None:
        nonlocal since_save
        while queue:
            fold_head()
        if flush is not None:
            flush()
        assert checkpoint is not None
        checkpoint.save(state)
        since_save = 0

    try:
        for job in todo:
            if quota is not None and since_save >= quota:
                save()
            since_save += 1
            if per_job is None:
                future = runner.submit(task, *shared, job.tile)
            else:
                extra, where = per_job(job)
                future = runner.submit(task, *shared, extra, job.tile, where=where)
            queue.append((job, future))
            if len(queue) >= limit and fold_head():
                save()
        while queue:
            if fold_head():
                save()
    except BaseException:
        for _, future in queue:
            runner.cancel(future)
        raise
