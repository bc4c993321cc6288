"""The compress stage's tile plan for a workflow and its scheduler (metadata only).

``compress.memory`` (or what the cluster gives) is the budget of the run's whole process
tree; the planner (:func:`snaplift.archive.plan_tiles`) gets the archive as it looks after
raw-field lifting (:func:`lifted_info`: one field per lifted field) and the lifted fields
of one archive field as one tile's rows.
"""

from __future__ import annotations

import importlib
from dataclasses import replace

from snaplift.archive import plan_tiles
from snaplift.archive._base import ArchiveInfo
from snaplift.archive.plan import IN_MEMORY_LIMIT, TilePlan
from snaplift.cluster import TASK_MODULES, Scheduler, resident_memory
from snaplift.errors import ArchiveError
from snaplift.units import parse_bytes
from snaplift.workflow.schema import Workflow

__all__ = ["baseline_modules", "compress_memory", "lifted_info", "plan_compress"]


def lifted_info(info: ArchiveInfo, workflow: Workflow) -> ArchiveInfo:
    """The archive as the planner sees it after raw-field lifting: one field per lifted field."""
    lift = workflow.field_lift
    if lift is None:
        return info
    fields = {f.name: replace(info.fields[f.source], name=f.name)
              for f in lift.lifted(list(workflow.archive.fields))}
    return replace(info, fields=fields)


def compress_memory(workflow: Workflow, scheduler: Scheduler) -> int:
    """``compress.memory``, else what the cluster gives: the process's memory under threads,
    memory per worker times workers for worker processes.

    The budget of the whole process tree of the run (driver, workers, nannies): the
    compress plan subtracts what those processes already hold (:func:`plan_compress`).
    """
    if workflow.compress.memory:
        return parse_bytes(workflow.compress.memory)
    if scheduler.kind == "threads":
        return int(scheduler.memory_per_worker)
    return int(scheduler.memory_per_worker) * max(1, int(scheduler.workers))


def plan_compress(workflow: Workflow, info: ArchiveInfo, scheduler: Scheduler, *,
                  recorded_baseline: int | None = None) -> TilePlan:
    """The tile plan of the compress stage for this workflow and scheduler (metadata only).

    ``compress.memory`` is the budget of the whole process tree: the resident memory the
    scheduler's processes hold now (:func:`snaplift.cluster.resident_memory`: this process,
    and the worker processes and nannies of a distributed cluster), plus a small margin, is
    the plan's ``baseline_bytes``, and the tiles are planned in what remains. With
    ``recorded_baseline`` (a resumed run) that value is kept when the processes measure no
    more, so the resumed run plans the tiles its checkpoint was made with
    (:meth:`snaplift.cluster.ResidentMemory.reserve`).
    """
    lifted = lifted_info(info, workflow)
    try:
        return _plan(workflow, lifted, scheduler, recorded_baseline)
    except ArchiveError as error:
        if lifted is info:
            raise
        count = len(lifted.fields)
        raise type(error)(f"{error}; lift: makes {count} lifted fields of the {len(workflow.archive.fields)} "
                          "archive fields: fewer delays or pointwise terms also shrink the tiles") from None


def _row_groups(workflow: Workflow) -> list[list[int]] | None:
    """The lifted fields of each archive field (adjacent, in row order): one tile's rows."""
    lift = workflow.field_lift
    if lift is None:
        return None
    groups: list[list[int]] = []
    sources: list[str] = []
    for index, lifted in enumerate(lift.lifted(list(workflow.archive.fields))):
        if sources and sources[-1] == lifted.source:
            groups[-1].append(index)
        else:
            groups.append([index])
            sources.append(lifted.source)
    return groups


def _plan(workflow: Workflow, info: ArchiveInfo, scheduler: Scheduler, recorded_baseline: int | None) -> TilePlan:
    settings = workflow.compress
    resident = resident_memory(scheduler.client, workers=scheduler.workers, modules=baseline_modules(settings.method))
    return plan_tiles(
        info, list(info.fields) if workflow.field_lift is not None else list(workflow.archive.fields),
        memory_bytes=compress_memory(workflow, scheduler),
        workers=scheduler.workers, method=settings.method, rank=settings.rank, oversample=settings.oversample,
        power_iterations=settings.power_iterations, check_pass=settings.check_pass,
        sketch_widths=settings.sketch_widths, shared_memory=scheduler.kind == "threads",
        corange_map=settings.corange_map or "sparse",
        baseline_bytes=resident.reserve(recorded_baseline), baseline_label=resident.label,
        row_groups=_row_groups(workflow),
        in_memory_limit=0 if settings.in_memory == "never" else IN_MEMORY_LIMIT,
    )


#: libraries compress loads after the plan, by method (measured, issue 16): the sketch's
#: first read loads the sparse sign map's library before it reads, in each process that
#: reads (:func:`snaplift.linalg._testmatrix.load_sparse_library`); the finish of the
#: sketch and of the randomized SVD runs scipy.linalg's BLAS in this process. Nothing else
#: of a run's start imports scipy, so the baseline imports them before it is measured
#: (about 10 and 9 MiB of resident memory): the tiles must not be planned into memory the
#: pass will then fill with libraries.
_TASK_LIBRARIES = {"sketch": ("scipy.sparse",)}
_DRIVER_LIBRARIES = {"sketch": ("scipy.linalg",), "randomized": ("scipy.linalg",)}


def baseline_modules(method: str) -> tuple[str, ...]:
    """What every process imports before its baseline is measured (this process also
    :data:`_DRIVER_LIBRARIES`): a tile task's modules and the libraries of ``method``."""
    for name in _DRIVER_LIBRARIES.get(method, ()):
        importlib.import_module(name)
    return (*TASK_MODULES, *_TASK_LIBRARIES.get(method, ()))
