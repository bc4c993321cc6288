"""What each stage writes to the result store, and how a later stage reads it back.

The runner writes each stage's outputs as soon as the stage finishes (into the staging
store, :mod:`snaplift.results.staging`); later stages read them back from there with
:func:`load_compressed`, whether they were computed a moment ago, kept from a killed run
or hard-linked from the previous complete store. So ``fit`` and ``modes`` see the same
numbers in all three cases.

What compress leaves (README.md, "The result store"), and what ``fit``/``modes`` need of it:

- ``basis/singular_value`` (rank,), ``basis/coefficient`` (rank, snapshot) and
  ``basis/<field>`` (rank, *grid): the basis vectors in field units (scale, weights and
  mask undone; NaN at masked points). Loading redoes ``sqrt(w) / scale`` on the kept
  points, which gives back the prepared basis rows to rounding (~1e-16 relative).
- ``prepare/scale`` (field,), ``prepare/mean_<field>``, ``prepare/weights_<field>``,
  ``prepare/mask_<field>`` and the group attributes ``center`` / ``scale``.
- ``diagnostics/column_norm`` (norm of every prepared snapshot, for the energy outside
  the basis), ``diagnostics/snapshot_norm`` (weighted raw norm), ``projection_error``.
- ``sketch/<name>``: the state a compress method keeps for appending snapshots later,
  if it has any (``Compressed.sketch_state``, a mapping of arrays).
"""

from __future__ import annotations

from dataclasses import dataclass, replace
from typing import Any

import numpy as np

from snaplift.archive._base import Reader
from snaplift.archive.matrix import FieldRows, SnapshotMatrix
from snaplift.errors import ResultStoreError
from snaplift.prepare import Preparation, to_physical
from snaplift.fitting.spectrum import conjugate_pairs
from snaplift.fitting.spectrum import frequency as mode_frequency
from snaplift.results.store import StoreWriter

__all__ = [
    "LoadedCompressed",
    "basis_bytes",
    "load_compressed",
    "modes_bytes",
    "write_compressed",
    "write_fit",
    "write_fit_details",
    "write_modes",
    "write_scan",
]


def basis_bytes(matrix: SnapshotMatrix, rank: int) -> int:
    """Bytes ``basis/<field>`` takes on disk (uncompressed upper bound)."""
    itemsize = np.dtype(matrix.dtype).itemsize
    return int(sum(rank * int(np.prod(f.grid)) * itemsize for f in matrix.fields))


def modes_bytes(matrix: SnapshotMatrix, n_modes: int) -> int:
    return int(sum(n_modes * int(np.prod(f.grid)) * 16 for f in _mode_fields(matrix)))


def write_scan(writer: StoreWriter, time: np.ndarray, snapshot_index: np.ndarray) -> None:
    writer.array("diagnostics", "time", np.asarray(time), ("snapshot",))
    writer.array("diagnostics", "snapshot_index", np.asarray(snapshot_index), ("snapshot",))


def _unscaled(preparation: Preparation) -> Preparation:
    return replace(preparation, field_scale={f: 1.0 for f in preparation.fields})


#: an array of vectors (rank or mode x grid) up to this size is one chunk; larger ones
#: get one chunk per vector (a chunk file per value of a small field, e.g. lifted
#: probes, would cost a file write each)
ONE_CHUNK_BYTES = 4 * 2**20
#: per-field arrays up to this size are written together (:meth:`StoreWriter.arrays`)
SMALL_ARRAY_BYTES = 64 * 2**10


def _vector_chunks(values: np.ndarray | None, shape: tuple[int, ...] | None = None, itemsize: int = 8
                   ) -> tuple[int, ...]:
    shape = tuple(values.shape) if values is not None else tuple(shape or ())
    itemsize = values.dtype.itemsize if values is not None else itemsize
    if int(np.prod(shape)) * itemsize <= ONE_CHUNK_BYTES:
        return tuple(max(1, int(n)) for n in shape)
    return (1, *shape[1:])


def write_compressed(writer: StoreWriter, compressed: Any, compute: Any, *, scale_setting: Any) -> None:
    """Write everything ``fit`` and ``modes`` need of a compress result (module docstring)."""
    matrix, preparation, lowrank = compressed.matrix, compressed.preparation, compressed.lowrank
    dims = writer.metadata.grid_dims({f.name: f.grid for f in matrix.fields})
    writer.array("basis", "singular_value", np.asarray(lowrank.singular_value), ("rank",))
    writer.array("basis", "coefficient", np.asarray(lowrank.coefficient), ("rank", "snapshot"))
    writer.array("diagnostics", "column_norm", np.asarray(lowrank.column_norm), ("snapshot",),
                 attrs={"meaning": "norm of each prepared (weighted, scaled, centred) snapshot"})
    writer.array("diagnostics", "snapshot_norm", np.asarray(preparation.snapshot_norm), ("snapshot",),
                 attrs={"meaning": "weighted norm of each raw snapshot"})
    writer.array("diagnostics", "projection_error", lowrank.projection_error(), ("snapshot",),
                 attrs={"kind": getattr(compressed, "projection_kind", "exact"),
                        "norm": "relative, weighted and scaled (physical inner product)"})
    writer.array("prepare", "scale", np.array([preparation.field_scale[f] for f in preparation.fields]),
                 ("field",), attrs={"fields": list(preparation.fields), "meaning": "each field was divided by this",
                                    "units_per_field": [writer.metadata.units_of(f) for f in preparation.fields]})
    writer.array("prepare", "field", np.array(list(preparation.fields), dtype=str), ("field",))
    lifted = {rows.name: {"source": rows.archive_field, "term": rows.term, "snapshot_shift": int(rows.snapshot_shift)}
              for rows in matrix.fields if rows.lifted}
    writer.group_attrs("prepare", {"center": preparation.centered,
                                   "scale": scale_setting if isinstance(scale_setting, str) else dict(scale_setting),
                                   "lifted": lifted})
    small: list[tuple[str, np.ndarray, tuple[str, ...]]] = []  # written together: one round trip
    for rows in matrix.fields:
        # one basis vector at a time: the field's temporaries are one vector, not n x rank;
        # small fields (e.g. the lifted fields of a delay-embedded probe) are written together
        basis_rows = _basis_field_rows(lowrank.basis, rows, compute)
        dtype = np.result_type(basis_rows, float)
        shape = (basis_rows.shape[1], *rows.grid)
        if int(np.prod(shape)) * dtype.itemsize <= SMALL_ARRAY_BYTES and len(matrix.fields) > 1:
            physical = to_physical(np.asarray(basis_rows).T, rows, preparation, add_mean=False)
            small.append((rows.name, rows.expand(physical), ("rank", *dims[rows.name])))
        else:
            basis_array = writer.empty("basis", rows.name, shape, dtype, ("rank", *dims[rows.name]),
                                       chunks=_vector_chunks(None, shape, dtype.itemsize))
            whole = np.empty(shape, dtype) if basis_array.chunks[0] == shape[0] else None
            for vector in range(basis_rows.shape[1]):
                values = rows.expand(to_physical(basis_rows[:, vector], rows, preparation, add_mean=False))
                if whole is None:
                    basis_array[vector] = values
                else:
                    whole[vector] = values
            if whole is not None:  # one chunk: written at once
                basis_array[...] = whole
        del basis_rows
        if rows.keep is not None:
            mask = np.ones(int(np.prod(rows.grid)), dtype=bool)
            mask[rows.keep] = False
            writer.array("prepare", f"mask_{rows.name}", mask.reshape(rows.grid), dims[rows.name])
        if rows.sqrt_weight is not None:
            writer.array("prepare", f"weights_{rows.name}", rows.expand(rows.sqrt_weight**2), dims[rows.name])
        if preparation.mean is not None:
            mean = to_physical(preparation.mean[rows.offset:rows.stop], rows, _unscaled(preparation), add_mean=False)
            writer.array("prepare", f"mean_{rows.name}", rows.expand(mean), dims[rows.name])
    writer.arrays("basis", small)
    for name, value in (getattr(compressed, "sketch_state", None) or {}).items():
        value = np.asarray(value)
        writer.array("sketch", name, value, tuple(f"{name}_{i}" for i in range(value.ndim)))


@dataclass(frozen=True)
class _StoredLowRank:
    """The compress result as read back: same attributes fit/modes use of ``LowRank``."""

    basis: Any  # dask array, or numpy for a small basis
    singular_value: np.ndarray
    coefficient: np.ndarray
    column_norm: np.ndarray
    passes: int

    @property
    def rank(self) -> int:
        return int(self.singular_value.size)

    @property
    def vh(self) -> np.ndarray:
        s = self.singular_value
        return np.divide(self.coefficient, s[:, np.newaxis], out=np.zeros_like(self.coefficient),
                         where=s[:, np.newaxis] > 0)

    def projection_error(self) -> np.ndarray:
        captured = np.sum(np.abs(self.coefficient) ** 2, axis=0)
        missed = np.sqrt(np.clip(self.column_norm**2 - captured, 0.0, None))
        return np.divide(missed, self.column_norm, out=np.zeros_like(missed), where=self.column_norm > 0)


@dataclass(frozen=True)
class LoadedCompressed:
    """A compress result read back from a store (``matrix``, ``preparation``, ``lowrank``)."""

    matrix: SnapshotMatrix
    preparation: Preparation
    lowrank: _StoredLowRank
    passes: int
    bytes_read: int
    sketch_state: dict[str, np.ndarray]


def _group(root: Any, name: str, where: str) -> Any:
    if name not in root:
        raise ResultStoreError(f"{where} has no group '{name}'; the compress stage did not finish there")
    return root[name]


def _lazy(array: Any) -> Any:
    """``dask.array`` (``array`` None) or a lazy view of a stored array: only for a large
    basis, since importing dask.array (and the xarray/pandas it pulls in) takes ~0.5 s."""
    import dask.array as da

    return da if array is None else da.from_zarr(array)


#: a stored basis up to this size is loaded into memory rather than as a lazy array (the
#: many small fields of a delay-embedded probe); larger ones stay lazy, one field's rows
#: at a time, as compress.memory plans it (at 64 MiB a 200,000-point rank-40 basis was
#: loaded whole, twice with its prepared copy: 136 MiB over the budget in
#: tests/faults/test_memory_budget.py)
EAGER_BASIS_BYTES = 4 * 2**20


def load_compressed(root: Any, reader: Reader, fields: list[str], *, passes: int = 0,
                    snapshot_block: int = 1, where: str = "result store") -> LoadedCompressed:
    """Read a compress result back from ``root`` (a staging or complete store) without the archive.

    Example
    -------
    >>> compressed = load_compressed(zarr.open_group("r.zarr"), reader, ["u"])  # doctest: +SKIP
    >>> compressed.lowrank.coefficient.shape                                      # doctest: +SKIP
    (40, 2000)
    """
    basis, prepare, diagnostics = (_group(root, g, where) for g in ("basis", "prepare", "diagnostics"))
    scale = np.asarray(prepare["scale"][...], dtype=np.float64)
    stored_fields = list(prepare["scale"].attrs.get("fields", fields))
    if stored_fields != list(fields):
        raise ResultStoreError(f"{where}: compress result is for fields {stored_fields}, the workflow asks for {fields}")
    rows: list[FieldRows] = []
    basis_blocks: list[np.ndarray] = []
    means: list[np.ndarray] = []
    offset = 0
    centered = bool(prepare.attrs.get("center", False))
    lifted = dict(prepare.attrs.get("lifted", {}))
    # each array opened once (a metadata read each: 120 for the lifted fields of a probe)
    members = dict(basis.arrays())
    for name in fields:
        if name not in members:
            raise ResultStoreError(f"{where}: basis/{name} is missing; the compress stage did not finish there")
    # a small basis (many lifted fields of few points, e.g. delay-embedded probes) is read
    # at once; a lazy graph over one array per lifted field costs more than the reading
    eager = sum(int(np.prod(members[name].shape)) * members[name].dtype.itemsize for name in fields) \
        <= EAGER_BASIS_BYTES
    xp = np if eager else _lazy(None)
    for name, field_scale in zip(fields, scale):
        # lazy: the modes stage computes one field's rows at a time
        physical = np.asarray(members[name][...]) if eager else _lazy(members[name])
        grid = tuple(int(s) for s in physical.shape[1:])
        flat = physical.reshape(physical.shape[0], -1)
        keep = None
        if f"mask_{name}" in prepare:
            keep = np.flatnonzero(~np.asarray(prepare[f"mask_{name}"][...], dtype=bool).ravel())
        kept = flat if keep is None else flat[:, keep]
        sqrt_weight = None
        if f"weights_{name}" in prepare:
            w = np.asarray(prepare[f"weights_{name}"][...], dtype=np.float64).ravel()
            sqrt_weight = np.sqrt(w if keep is None else w[keep])
        factor = (sqrt_weight if sqrt_weight is not None else 1.0) / field_scale
        # physical = prepared * scale / sqrt(w); at w == 0 the prepared rows are zero
        prepared = xp.where(xp.isfinite(kept), kept * factor, 0.0)
        basis_blocks.append(prepared.T)
        n_rows = int(prepared.shape[1])
        if centered:
            mean = np.asarray(prepare[f"mean_{name}"][...]).ravel()
            mean = mean if keep is None else mean[keep]
            means.append(np.where(np.isfinite(mean), mean * (sqrt_weight if sqrt_weight is not None else 1.0), 0.0))
        lift = lifted.get(name, {})
        rows.append(FieldRows(name, grid, keep, sqrt_weight, offset, n_rows, source=lift.get("source"),
                              term=lift.get("term", "x"), snapshot_shift=int(lift.get("snapshot_shift", 0))))
        offset += n_rows
    row_scale = np.concatenate([np.full(r.n_rows, 1.0 / s) for r, s in zip(rows, scale)])
    preparation = Preparation(tuple(fields), {f: float(s) for f, s in zip(fields, scale)}, row_scale,
                              np.concatenate(means) if centered else None,
                              np.asarray(diagnostics["snapshot_norm"][...], dtype=np.float64))
    snapshot_index = np.asarray(diagnostics["snapshot_index"][...], dtype=np.int64)
    block = max(1, int(snapshot_block))
    blocks = tuple((c0, min(c0 + block, snapshot_index.size)) for c0 in range(0, snapshot_index.size, block))
    coefficient = np.asarray(basis["coefficient"][...])
    dtype = np.dtype(np.complex128 if np.iscomplexobj(coefficient) or any(np.iscomplexobj(b) for b in basis_blocks)
                     else np.float64)
    matrix = SnapshotMatrix(reader, tuple(rows), snapshot_index, blocks, dtype)
    lowrank = _StoredLowRank(
        basis=xp.concatenate(basis_blocks, axis=0),
        singular_value=np.asarray(basis["singular_value"][...], dtype=np.float64),
        coefficient=coefficient,
        column_norm=np.asarray(diagnostics["column_norm"][...], dtype=np.float64),
        passes=passes,
    )
    sketch = {name: np.asarray(a[...]) for name, a in root["sketch"].arrays()} if "sketch" in root else {}
    return LoadedCompressed(matrix, preparation, lowrank, passes, 0, sketch)


def write_fit(writer: StoreWriter, fit: Any, dt: float, *, residuals: Any = None) -> tuple[np.ndarray, list[str]]:
    """Spectrum (sorted by amplitude) and operator; returns the sort order and warnings.

    ``dt`` is the step in the archive's time unit (stored as the ``dt`` attribute); the
    fit's own ``dt`` is in seconds when that unit converts (``writer.metadata``), so
    frequencies are in Hz and rates in 1/s.

    ``residuals`` (a :class:`~snaplift.fitting.ResidualReport`) fills ``spectrum/residual``
    and ``spectrum/trusted``.
    """
    from snaplift.fitting import spectrum_table

    warnings: list[str] = []
    extra = {} if residuals is None else {"residual": residuals.residual, "trusted": residuals.trusted}
    table = spectrum_table(fit, sort="amplitude", **extra)
    order = np.asarray(table["index"])
    n_modes = order.size
    names = ["eigenvalue", "rate", "frequency", "growth", "period", "amplitude", "phase", "near_nyquist"]
    for name in names + list(extra):
        writer.array("spectrum", name, np.asarray(table[name]), ("mode",))
    if residuals is not None:
        writer.group_attrs("spectrum", {"residual_pairs": residuals.pairs, "residual_pair_count": residuals.n_pairs,
                                        "trust_threshold": residuals.threshold,
                                        "residual_reference": "Colbrook & Townsend 2024, CPAM (arXiv 2111.14889)"})
        untrusted = int(np.count_nonzero(~np.asarray(residuals.trusted)))
        if untrusted:
            warnings.append(f"{untrusted} of {n_modes} eigenvalue(s) have residual above the trust threshold "
                            f"{residuals.threshold:g} on {residuals.n_pairs} {residuals.pairs} pairs")
    # ranking: the tool's own order of importance, trusted modes first, then by amplitude
    # (snaplift.fitting.mode_ranking); 0 is the most important mode
    flags = np.asarray(table["trusted"], dtype=bool) if residuals is not None else np.ones(order.size, bool)
    ranking = np.empty(order.size, dtype=np.int64)
    ranking[np.argsort(~flags, kind="stable")] = np.arange(order.size)
    writer.array("spectrum", "ranking", ranking, ("mode",),
                 attrs={"meaning": "0 = most important: trusted modes first, then by amplitude"})
    # partner: position (in this sorted table) of the complex-conjugate eigenvalue, -1 if none
    position = np.empty(n_modes, dtype=np.int64)
    position[order] = np.arange(n_modes)
    partner = np.asarray(table["partner"])
    writer.array("spectrum", "partner", np.where(partner >= 0, position[np.maximum(partner, 0)], -1), ("mode",))
    flagged = np.flatnonzero(np.asarray(table["near_nyquist"]))
    if residuals is not None:
        warnings.extend(residuals.warnings)
    elif flagged.size:
        warnings.append(
            f"{flagged.size} mode(s) lie within 10 % of the Nyquist frequency 1/(2 dt) = {0.5 / fit.dt:.6g} "
            f"{writer.metadata.frequency_unit} "
            f"(sorted positions {', '.join(map(str, flagged[:10]))}); their frequencies may be aliased"
        )
    meta = writer.metadata
    time_attrs = {"time_unit": meta.time_unit, "frequency_unit": meta.frequency_unit,
                  "growth_unit": meta.growth_unit, "period_unit": meta.period_unit}
    if meta.seconds_per_unit is not None:
        time_attrs["time_unit_seconds"] = meta.seconds_per_unit
    # dt in the archive's own time unit, like diagnostics/time (forecasts step by it)
    writer.group_attrs("spectrum", {"sorted_by": "amplitude", "dt": dt, "dt_unit": meta.time_unit, **time_attrs})
    writer.array("operator", "matrix", np.asarray(fit.operator), ("mode_in", "mode_out"),
                 attrs={"convention": "column-vector: c_next = matrix @ c (reduced coordinates)"})
    return order, warnings


def _mode_fields(matrix: SnapshotMatrix) -> list[FieldRows]:
    """Fields that get modes: every field and pointwise term at the window's first time
    (delay copies hold the same modes later in the window)."""
    return [rows for rows in matrix.fields if rows.snapshot_shift == 0]


def write_fit_details(writer: StoreWriter, outcome: Any, order: np.ndarray, time: np.ndarray) -> None:
    """Amplitudes per run (``runs/``), eigenfunctions on the snapshots and the dictionary (EDMD)."""
    lengths = np.asarray(outcome.run_lengths, dtype=np.int64)
    starts = np.concatenate(([0], np.cumsum(lengths)[:-1])).astype(np.int64)
    writer.array("runs", "run_start", starts, ("run",), attrs={"meaning": "first snapshot (column) of each run"})
    writer.array("runs", "run_length", lengths, ("run",))
    writer.array("runs", "amplitude", np.asarray(outcome.run_amplitude)[:, order], ("run", "mode"),
                 attrs={"meaning": "optimal amplitude of each mode in each run (Jovanovic et al. 2014)"})
    if outcome.eigenfunction is not None:
        writer.array("eigenfunctions", "time", np.asarray(time), ("snapshot",))
        writer.array("eigenfunctions", "value", np.asarray(outcome.eigenfunction)[order], ("mode", "snapshot"),
                     attrs={"meaning": "Koopman eigenfunctions evaluated on the snapshots, scaled so that "
                                       "x_j = sum_k mode_k value[k, j]"})
    attrs = {"method": outcome.method, "space": outcome.space}
    if outcome.details:
        attrs[outcome.details_key] = dict(outcome.details)
    writer.group_attrs("operator", attrs)


def _basis_field_rows(basis: Any, rows: Any, compute: Any) -> np.ndarray:
    """One field's rows of the (lazy) basis, one basis vector at a time into one array.

    Computing the whole slice at once held every chunk's decoding temporaries and then
    the concatenated copy: several times the n x rank the result needs (issue 11).
    """
    part = basis[rows.offset:rows.stop]
    if isinstance(part, np.ndarray):
        return part
    if part.nbytes <= SMALL_ARRAY_BYTES:  # a small field: one task, not one per vector
        (whole,) = compute(part)
        return np.asarray(whole)
    out = np.empty(part.shape, dtype=part.dtype, order="F")
    for column in range(part.shape[1]):
        (out[:, column],) = compute(part[:, column])
    return out


def _basis_times(basis: np.ndarray, coefficients: np.ndarray) -> np.ndarray:
    """``basis @ coefficients`` without a complex copy of a real basis (numpy's mixed-type
    matmul converts the whole n x rank basis to complex first: issue 11, the modes stage
    went over compress.memory by that copy)."""
    if np.iscomplexobj(basis) or not np.iscomplexobj(coefficients):
        return basis @ coefficients
    out = np.empty(basis.shape[0], dtype=np.result_type(basis, coefficients))
    out.real = basis @ np.ascontiguousarray(coefficients.real)
    out.imag = basis @ np.ascontiguousarray(coefficients.imag)
    return out


def write_modes(writer: StoreWriter, fit: Any, compressed: Any, order: np.ndarray, compute: Any) -> None:
    """Physical modes chunk by chunk, fixed points (affine fits), reconstruction error.

    ``fit`` is a :class:`~snaplift.workflow.fit_methods.FitOutcome`. Modes fitted on the
    coefficients are the basis times the modes' coefficients (missing trailing
    coefficients are zero); modes fitted on the raw state are its values on the grid.
    """
    matrix, preparation, lowrank = compressed.matrix, compressed.preparation, compressed.lowrank
    dims = writer.metadata.grid_dims({f.name: f.grid for f in matrix.fields})
    n_modes = int(order.size)
    _write_mode_frequency(writer, fit, order)
    if fit.space == "state":
        _write_state_modes(writer, fit, matrix, order, dims)
        return
    rank = lowrank.rank
    modes_rows = np.zeros((rank, n_modes), dtype=np.complex128)  # coefficient space (rank x mode)
    modes_rows[: fit.modes.shape[0]] = fit.modes[:, order]
    writer.array("operator", "mode_coefficient", modes_rows, ("rank", "mode"),
                 attrs={"meaning": "modes in the coordinates of basis/coefficient (prepared data = basis @ this)"})
    if fit.fixed_point is not None:
        fixed_point = np.zeros(rank, dtype=np.result_type(fit.fixed_point, float))
        fixed_point[: fit.fixed_point.size] = fit.fixed_point
        writer.array("operator", "fixed_point_coefficient", fixed_point, ("rank",))
    for rows in _mode_fields(matrix):
        basis_rows = _basis_field_rows(lowrank.basis, rows, compute)
        mode_array = writer.empty("modes", rows.name, (n_modes, *rows.grid), np.complex128,
                                  ("mode", *dims[rows.name]), chunks=_vector_chunks(None, (n_modes, *rows.grid), 16))
        largest = np.zeros(n_modes)
        # one chunk (a small field): the modes are gathered and written at once
        whole = np.empty((n_modes, *rows.grid), np.complex128) if mode_array.chunks[0] == n_modes else None
        for k in range(n_modes):
            values = to_physical(_basis_times(basis_rows, modes_rows[:, k]), rows, preparation, add_mean=False)
            largest[k] = _largest(values)
            if whole is None:
                mode_array[k] = rows.expand(values)
            else:
                whole[k] = rows.expand(values)
        if whole is not None:
            mode_array[...] = whole
        _write_peak(writer, rows.name, largest, fit, order, np.dtype(matrix.dtype).kind != "c")
        if preparation.mean is not None:
            mean = to_physical(preparation.mean[rows.offset:rows.stop], rows, _unscaled(preparation), add_mean=False)
            # with the affine term the model is x_j = fixed_point + sum_k mode_k b_k lambda_k^j
            fixed = basis_rows @ fit.fixed_point if fit.fixed_point is not None else np.zeros(rows.n_rows)
            steady = to_physical(fixed, rows, preparation, add_mean=False) + mean
            writer.array("prepare", f"fixed_point_{rows.name}", rows.expand(np.real_if_close(steady)),
                         dims[rows.name], attrs={"meaning": "x_j = fixed_point + sum_k mode_k b_k lambda_k^j"})
    coefficient, column_norm = lowrank.coefficient, lowrank.column_norm
    projection = lowrank.projection_error()
    model = np.zeros(coefficient.shape, dtype=np.complex128)
    model[: fit.model.shape[0]] = fit.model
    if not np.iscomplexobj(coefficient):
        model = model.real
    # the basis is orthonormal: the error splits into the part outside the basis
    # (projection error) and the model's error inside it (Pythagoras)
    inside = np.linalg.norm(coefficient - model, axis=0)
    total = np.sqrt(inside**2 + (projection * column_norm) ** 2)
    reconstruction = np.divide(total, column_norm, out=np.zeros_like(total), where=column_norm > 0)
    writer.array("diagnostics", "reconstruction_error", reconstruction, ("snapshot",),
                 attrs={"norm": "relative, weighted and scaled (physical inner product)"})


def _largest(values: np.ndarray) -> float:
    """Largest modulus of a mode's values (NaN at masked or zero-weight points ignored)."""
    magnitude = np.abs(np.asarray(values))
    finite = magnitude[np.isfinite(magnitude)]
    return float(finite.max()) if finite.size else 0.0


def _write_mode_frequency(writer: StoreWriter, fit: Any, order: np.ndarray) -> None:
    """``modes/frequency`` (mode,): the non-index coordinate of the mode arrays."""
    values = mode_frequency(np.asarray(fit.eigenvalue)[order], fit.dt)
    writer.array("modes", "frequency", np.asarray(values, dtype=np.float64), ("mode",))


def peak_amplitude(largest: np.ndarray, amplitude: np.ndarray, eigenvalue: np.ndarray, *,
                   real: bool = True) -> np.ndarray:
    """Peak amplitude of each mode's part of the data at the first snapshot, in field units.

    A mode ``phi_k`` (field units, per unit amplitude) with amplitude ``b_k`` contributes
    ``phi_k b_k lambda_k^j`` to snapshot ``j``; a complex-conjugate pair contributes
    ``2 Re(phi_k b_k lambda_k^j)``, an oscillation of amplitude ``2 |phi_k b_k|`` at each
    point. So the peak is ``max |phi_k| |b_k|``, doubled for a mode with a conjugate
    partner (both modes of a pair show the pair's peak): a standing wave
    ``40 Pa cos(omega t) sin(k x)`` reads 40 Pa.
    """
    partner = conjugate_pairs(np.asarray(eigenvalue, dtype=np.complex128))
    # complex data have no conjugate symmetry: each mode stands alone
    factor = np.where(partner >= 0, 2.0, 1.0) if real else np.ones(partner.shape)
    return np.asarray(largest) * np.abs(np.asarray(amplitude)) * factor


def _write_peak(writer: StoreWriter, name: str, largest: np.ndarray, fit: Any, order: np.ndarray, real: bool) -> None:
    amplitude = np.asarray(fit.amplitude)[order]
    eigenvalue = np.asarray(fit.eigenvalue)[order]
    writer.array("spectrum", f"peak_{name}", peak_amplitude(largest, amplitude, eigenvalue, real=real), ("mode",),
                 attrs={"meaning": "max over the grid of |mode| |amplitude| (x 2 for a conjugate pair): the "
                                   "mode's peak contribution at the first snapshot of the fit, in field units"})


def _write_state_modes(writer: StoreWriter, fit: Any, matrix: SnapshotMatrix, order: np.ndarray,
                       dims: dict[str, tuple[str, ...]]) -> None:
    modes = np.asarray(fit.modes)[:, order]
    for rows in matrix.fields:
        values = modes[rows.offset:rows.stop].T  # (mode, kept points), raw units
        writer.array("modes", rows.name, rows.expand(values).astype(np.complex128), ("mode", *dims[rows.name]),
                     chunks=(1, *rows.grid))
        largest = np.array([_largest(v) for v in values])
        _write_peak(writer, rows.name, largest, fit, order, np.dtype(matrix.dtype).kind != "c")
    data, model = np.asarray(fit.data), np.asarray(fit.model)
    model = model.real if not np.iscomplexobj(data) else model
    norm = np.linalg.norm(data, axis=0)
    error = np.linalg.norm(data - model, axis=0)
    writer.array("diagnostics", "reconstruction_error", np.divide(error, norm, out=np.zeros_like(error),
                                                                  where=norm > 0), ("snapshot",),
                 attrs={"norm": "relative, raw state values (unweighted, unscaled)"})
