"""The workflow runner: the one place that owns the scheduler and writes results.

``run_workflow(path)`` validates the file, opens the scheduler named by ``cluster``, runs
the stages of :mod:`snaplift.workflow.stages` and commits the result store atomically.
"""

from __future__ import annotations

import datetime as _dt
import platform
import socket
from collections.abc import Callable
from dataclasses import dataclass
from pathlib import Path

import numpy as np

from snaplift import __version__
from snaplift.cluster import Scheduler, open_scheduler
from snaplift.fitting import DMDFit, reconstruct, spectrum_table
from snaplift.prepare import to_physical
from snaplift.results.store import StoreWriter, grid_dimensions
from snaplift.workflow.schema import Workflow, load_workflow, resolve_path, section_fingerprint
from snaplift.workflow.stages import Compressed, Scanned, compress_stage, fit_stage, scan_stage

__all__ = ["RunSummary", "run_workflow", "run"]

Progress = Callable[[str], None]

CAUTION = (
    "A data-driven surrogate is valid only near the data it was fitted to. Engineering decisions "
    "rest on validated simulation, experiment, applicable codes and licensed engineering judgement."
)


@dataclass(frozen=True)
class RunSummary:
    path: Path
    passes: int
    bytes_read: int
    n_modes: int
    warnings: tuple[str, ...]


def _versions() -> dict[str, str]:
    import dask
    import h5py
    import scipy
    import zarr

    return {"snaplift": __version__, "numpy": np.__version__, "scipy": scipy.__version__,
            "dask": dask.__version__, "zarr": zarr.__version__, "h5py": h5py.__version__,
            "python": platform.python_version()}


def run_workflow(path: str | Path, *, overwrite: bool = False, progress: Progress | None = None) -> RunSummary:
    """Run a workflow file end to end and return where the results are.

    Example
    -------
    >>> summary = run_workflow("workflows/fin-duct.yaml")  # doctest: +SKIP
    >>> summary.path  # doctest: +SKIP
    PosixPath('.../results/fin-duct.zarr')
    """
    workflow, text, folder = load_workflow(path)
    return run(workflow, text, folder, overwrite=overwrite, progress=progress)


def run(workflow: Workflow, text: str, folder: Path, *, overwrite: bool = False,
        progress: Progress | None = None) -> RunSummary:
    say = progress or (lambda message: None)
    started = _dt.datetime.now(_dt.timezone.utc)
    fingerprint = section_fingerprint(workflow)
    output = Path(resolve_path(folder, workflow.output.path))
    writer = StoreWriter(output, overwrite=overwrite, workflow_fingerprint=fingerprint)
    try:
        with open_scheduler(workflow.cluster) as scheduler:
            say(f"scan: opening {workflow.archive.path} ({scheduler.kind} scheduler, {scheduler.workers} workers)")
            scanned = scan_stage(workflow, folder, scheduler)
            say(f"compress: randomized SVD of rank {workflow.compress.rank} over {scanned.snapshot_index.size} snapshots")
            compressed = compress_stage(workflow, scanned, scheduler)
            say(f"fit: DMD on {compressed.lowrank.rank} coefficients")
            fit = fit_stage(workflow, compressed, scanned)
            say("modes: writing modes, basis and diagnostics")
            warnings = _write_results(writer, workflow, scanned, compressed, fit, scheduler)
        finished = _dt.datetime.now(_dt.timezone.utc)
        writer.commit({
            "workflow": text,
            "workflow_fingerprint": fingerprint,
            "archive": str(scanned.reader.path),
            "archive_format": scanned.reader.format_name,
            "versions": _versions(),
            "host": socket.gethostname(),
            "started": started.isoformat(),
            "finished": finished.isoformat(),
            "passes": compressed.passes,
            "bytes_read": compressed.bytes_read,
            "compress_method": workflow.compress.method,
            "fit_method": workflow.fit.method,
            "warnings": list(warnings),
            "caution": CAUTION,
        })
    except BaseException:
        writer.abort()
        raise
    return RunSummary(output, compressed.passes, compressed.bytes_read, int(fit.eigenvalue.size), tuple(warnings))


def _write_results(writer: StoreWriter, workflow: Workflow, scanned: Scanned,
                   compressed: Compressed, fit: DMDFit, scheduler: Scheduler) -> list[str]:
    warnings: list[str] = []
    matrix, preparation, lowrank = compressed.matrix, compressed.preparation, compressed.lowrank
    table = spectrum_table(fit, sort="amplitude")
    order = np.asarray(table["index"])
    n_modes = order.size
    for name in ("eigenvalue", "rate", "frequency", "growth", "period", "amplitude", "phase", "near_nyquist"):
        writer.array("spectrum", name, np.asarray(table[name]), ("mode",))
    # partner: position (in this sorted table) of the complex-conjugate eigenvalue, -1 if none
    position = np.empty(n_modes, dtype=np.int64)
    position[order] = np.arange(n_modes)
    partner = np.asarray(table["partner"])
    writer.array("spectrum", "partner", np.where(partner >= 0, position[np.maximum(partner, 0)], -1), ("mode",))
    flagged = np.flatnonzero(np.asarray(table["near_nyquist"]))
    if flagged.size:
        warnings.append(
            f"{flagged.size} mode(s) lie within 10 % of the Nyquist frequency 1/(2 dt) = {0.5 / scanned.dt:.6g} Hz "
            f"(sorted positions {', '.join(map(str, flagged[:10]))}); their frequencies may be aliased"
        )
    writer.group_attrs("spectrum", {"sorted_by": "amplitude", "dt": scanned.dt,
                                    "frequency_units": "Hz (1/time unit of the archive)"})
    operator = np.asarray(fit.operator)
    writer.array("operator", "matrix", operator, ("mode_in", "mode_out"),
                 attrs={"convention": "column-vector: c_next = matrix @ c (reduced coordinates)"})
    writer.array("basis", "singular_value", lowrank.singular_value, ("rank",))
    writer.array("basis", "coefficient", lowrank.coefficient, ("rank", "snapshot"))
    writer.array("diagnostics", "time", scanned.time, ("snapshot",))
    writer.array("diagnostics", "snapshot_index", matrix.snapshot_index, ("snapshot",))
    projection = lowrank.projection_error()
    writer.array("diagnostics", "projection_error", projection, ("snapshot",),
                 attrs={"kind": "exact", "norm": "relative, weighted and scaled (physical inner product)"})
    reconstruction = _reconstruction_error(fit, lowrank.coefficient, lowrank.column_norm, projection)
    writer.array("diagnostics", "reconstruction_error", reconstruction, ("snapshot",),
                 attrs={"norm": "relative, weighted and scaled (physical inner product)"})
    writer.array("prepare", "scale", np.array([preparation.field_scale[f] for f in preparation.fields]),
                 ("field",), attrs={"fields": list(preparation.fields), "meaning": "each field was divided by this"})
    writer.group_attrs("prepare", {"center": preparation.centered, "scale": workflow.prepare.scale
                                   if isinstance(workflow.prepare.scale, str) else dict(workflow.prepare.scale)})

    dims = grid_dimensions({f.name: f.grid for f in matrix.fields})
    modes_rows = fit.modes[:, order]  # coefficient space (rank x mode)
    for rows in matrix.fields:
        (basis_rows,) = scheduler.compute(lowrank.basis[rows.offset:rows.stop])  # n_f x rank
        basis_rows = np.asarray(basis_rows)
        physical_basis = to_physical(basis_rows.T, rows, preparation, add_mean=False)
        writer.array("basis", rows.name, rows.expand(physical_basis), ("rank", *dims[rows.name]),
                     chunks=(1, *rows.grid))
        mode_array = writer.empty("modes", rows.name, (n_modes, *rows.grid), np.complex128,
                                  ("mode", *dims[rows.name]), chunks=(1, *rows.grid))
        for k in range(n_modes):
            values = basis_rows @ modes_rows[:, k]
            mode_array[k] = rows.expand(to_physical(values, rows, preparation, add_mean=False))
        if rows.keep is not None:
            mask = np.ones(int(np.prod(rows.grid)), dtype=bool)
            mask[rows.keep] = False
            writer.array("prepare", f"mask_{rows.name}", mask.reshape(rows.grid), dims[rows.name])
        if rows.sqrt_weight is not None:
            writer.array("prepare", f"weights_{rows.name}", rows.expand(rows.sqrt_weight**2), dims[rows.name])
        if preparation.mean is not None:
            mean = to_physical(preparation.mean[rows.offset:rows.stop], rows,
                               _unscaled(preparation), add_mean=False)
            writer.array("prepare", f"mean_{rows.name}", rows.expand(mean), dims[rows.name])
            # with the affine term the model is x_j = fixed_point + sum_k mode_k b_k lambda_k^j
            fixed = basis_rows @ fit.fixed_point if fit.fixed_point is not None else 0.0
            steady = to_physical(fixed, rows, preparation, add_mean=False) + mean
            writer.array("prepare", f"fixed_point_{rows.name}", rows.expand(np.real_if_close(steady)),
                         dims[rows.name], attrs={"meaning": "x_j = fixed_point + sum_k mode_k b_k lambda_k^j"})
    return warnings


def _reconstruction_error(fit: DMDFit, coefficient: np.ndarray, column_norm: np.ndarray,
                          projection: np.ndarray) -> np.ndarray:
    """Relative error of the DMD model of every snapshot, in the prepared (physical) norm.

    The basis is orthonormal, so the error splits into the part outside the basis
    (projection error) and the model's error inside it (Pythagoras).
    """
    model = reconstruct(fit, n_steps=coefficient.shape[1])
    if not np.iscomplexobj(coefficient):
        model = model.real
    inside = np.linalg.norm(coefficient - model, axis=0)
    outside = projection * column_norm
    total = np.sqrt(inside**2 + outside**2)
    return np.divide(total, column_norm, out=np.zeros_like(total), where=column_norm > 0)


def _unscaled(preparation):
    from dataclasses import replace

    return replace(preparation, field_scale={f: 1.0 for f in preparation.fields})
