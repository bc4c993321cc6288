"""What ``fit`` and ``modes`` write to the result store: spectrum, operator, runs,
eigenfunctions, modes on the grid, peak amplitudes and the reconstruction error.

They read the compress result as :class:`snaplift.results.stages.Compressed` (computed,
kept or reused: the same numbers) and the fit as a
:class:`~snaplift.fitting.FitResult` (every fit method gives one).
"""

from __future__ import annotations

from typing import Any

import numpy as np

from snaplift.archive.matrix import FieldRows, SnapshotMatrix
from snaplift.fitting.assessment import mode_ranking
from snaplift.fitting.spectrum import conjugate_pairs
from snaplift.fitting.spectrum import frequency as mode_frequency
from snaplift.linalg._blas import blas_threads
from snaplift.prepare import to_physical
from snaplift.results.stages import Compressed, _basis_field_rows, _unscaled, _vector_chunks
from snaplift.results.store import BackgroundWrites, StoreWriter, write_leading
from snaplift.units import usable_cores

__all__ = ["modes_bytes", "peak_amplitude", "write_fit", "write_fit_details", "write_modes"]


def modes_bytes(matrix: SnapshotMatrix, n_modes: int) -> int:
    return int(sum(n_modes * int(np.prod(f.grid)) * 16 for f in _mode_fields(matrix)))


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
    position = np.empty(n_modes, dtype=np.int64)  # position of each fitted mode in this sorted table
    position[order] = np.arange(n_modes)
    ranked = mode_ranking(fit, trusted=None if residuals is None else residuals.trusted)
    ranking = np.empty(n_modes, dtype=np.int64)
    ranking[position[ranked]] = np.arange(n_modes)
    writer.array("spectrum", "ranking", ranking, ("mode",),
                 attrs={"meaning": "0 = most important: trusted modes first, then by amplitude"})
    # partner: position (in this sorted table) of the complex-conjugate eigenvalue, -1 if none
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
    time_attrs: dict[str, Any] = {"time_unit": meta.time_unit, "frequency_unit": meta.frequency_unit,
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


def _basis_times(basis: np.ndarray, coefficients: np.ndarray) -> np.ndarray:
    """``basis @ coefficients`` without a complex copy of a real basis (numpy's mixed-type
    matmul converts the whole n x rank basis to complex first: issue 11, the modes stage
    went over compress.memory by that copy)."""
    if np.iscomplexobj(basis) or not np.iscomplexobj(coefficients):
        return basis @ coefficients
    if coefficients.ndim == 1:
        out = np.empty(basis.shape[0], dtype=np.result_type(basis, coefficients))
        out.real = basis @ np.ascontiguousarray(coefficients.real)
        out.imag = basis @ np.ascontiguousarray(coefficients.imag)
        return out
    # several modes: one real product over the basis gives every real and imaginary part
    width = coefficients.shape[1]
    both = basis @ np.concatenate([coefficients.real, coefficients.imag], axis=1)
    out = np.empty((basis.shape[0], width), dtype=np.result_type(basis, coefficients))
    out.real, out.imag = both[:, :width], both[:, width:]
    return out


#: complex mode values formed and written at once by :func:`write_modes`, in bytes
MODES_GROUP_BYTES = 16 * 2**20  # 4 modes of 262144 complex values


def write_modes(writer: StoreWriter, fit: Any, compressed: Compressed, order: np.ndarray, compute: Any) -> None:
    """Physical modes chunk by chunk, fixed points (affine fits), reconstruction error.

    ``fit`` is a :class:`~snaplift.fitting.FitResult`. Modes fitted on the
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
        # a few modes per product and per write: one pass over the basis forms them all
        # (a matrix-vector product per mode read the n x rank basis twice per mode), and
        # zarr encodes and writes the group's chunks together
        group = max(1, MODES_GROUP_BYTES // max(1, 16 * basis_rows.shape[0]))
        twins = _conjugate_twins(modes_rows) if not np.iscomplexobj(basis_rows) else np.zeros(n_modes, bool)
        previous: np.ndarray | None = None  # the physical values of the mode before
        # each group is written by a thread of its own while the next one is formed (at most
        # one group waits: the temporaries stay three groups); the products leave that
        # thread a core (a BLAS pool waiting on a busy core made them 2-3x slower, issue 16)
        with blas_threads(max(1, usable_cores() - 1)), BackgroundWrites() as background:
            for k0 in range(0, n_modes, group):
                k1 = min(k0 + group, n_modes)
                own = [k for k in range(k0, k1) if not twins[k]]
                products = _basis_times(basis_rows, modes_rows[:, own]) if own else None
                block = whole[k0:k1] if whole is not None else np.empty((k1 - k0, *rows.grid), np.complex128)
                for k in range(k0, k1):
                    if twins[k]:
                        # B conj(c) = conj(B c) for a real basis B, and to_physical scales by real numbers
                        assert previous is not None
                        values, largest[k] = np.conj(previous), largest[k - 1]
                    else:
                        assert products is not None
                        values = to_physical(products[:, own.index(k)], rows, preparation, add_mean=False)
                        largest[k] = _largest(values)
                    _place(rows, values, block[k - k0:k - k0 + 1])  # a slice: a view also for a probe (no grid)
                    previous = values
                del products
                if whole is None:
                    background.submit(write_leading, mode_array, k0, block)
                del block
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
    model: np.ndarray = np.zeros(coefficient.shape, dtype=np.complex128)
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


def _conjugate_twins(modes_rows: np.ndarray) -> np.ndarray:
    """True for each mode whose coefficients are exactly the conjugates of the mode's before.

    A real fit's complex modes come in conjugate pairs, adjacent in the spectrum's order
    (equal amplitudes); on a real basis the second of a pair is the first's conjugate on the
    grid too, without a product over the basis (half the modes stage's arithmetic).
    """
    twins = np.zeros(modes_rows.shape[1], dtype=bool)
    for k in range(1, modes_rows.shape[1]):
        column = modes_rows[:, k]
        twins[k] = bool(np.any(column.imag != 0)) and np.array_equal(column, np.conj(modes_rows[:, k - 1]))
    return twins


def _place(rows: FieldRows, values: np.ndarray, out: np.ndarray) -> None:
    """``out[...] = rows.expand(values)`` without the grid-sized temporary: NaN at masked points.

    ``out`` is a contiguous view (for a probe, a one-element slice: an indexed 0-d element
    would be a copy, and the values would be lost)."""
    flat = out.reshape(-1)
    assert np.shares_memory(flat, out), "modes: the placed values must land in the block"
    if rows.keep is None:
        flat[...] = values
    else:
        flat.fill(np.nan)
        flat[rows.keep] = values


def _largest(values: np.ndarray) -> float:
    """Largest modulus of a mode's values (NaN at masked or zero-weight points ignored; 0 if none)."""
    magnitude = np.abs(np.asarray(values))
    return float(np.max(magnitude, where=np.isfinite(magnitude), initial=0.0))


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
