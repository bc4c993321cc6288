"""``snaplift forecast``: a forecast as an xarray dataset in field units, on the fields' grids,
optionally set against the archive where the two overlap, and written to zarr.

The values come from :func:`snaplift.results.forecast.forecast_fields` (the model
``x_{j+s} = offset + sum_k mode_k b_k lambda_k^s``). Step ``s`` from column ``j`` is
archive snapshot ``snapshot_index[j] + s * every`` (``every`` the spacing of the fitted
snapshots in the archive); it overlaps the archive while that snapshot exists and lies in
the run of column ``j``. The error per step and field is ``||forecast_s - archive_s||``
over the grid points that are not masked, with the stored point weights (cell sizes)
when there are any (the physical norm), divided by the RMS of ``||archive_s||`` over the
compared steps: one scale per field, so a field passing through zero (a standing wave)
does not make a step's error look huge.
"""

from __future__ import annotations

import os
import shutil
import uuid
import warnings
from pathlib import Path

import numpy as np
import psutil
import xarray as xr

from snaplift.errors import ArchiveError, ResultStoreError
from snaplift.results.forecast import FORECAST_CAUTION, forecast_fields, overlap_snapshots
from snaplift.results.reading import StoreView, open_store
from snaplift.results.source import archive_snapshots, open_source

__all__ = ["FORECAST_CAUTION", "archive_fields", "forecast_dataset", "overlap_snapshots", "write_forecast"]

FORECAST_KEY = "snaplift_forecast"


def archive_fields(view: StoreView) -> list[str]:
    """The fields to forecast: the archive's own (a lifted field such as ``T_square`` is an
    observable of the fit, not a field of the archive); the lifted ones only when the fit
    kept no archive field as it is (``lift: pointwise`` without the term ``x``)."""
    lifted = dict(view.prepare.attrs.get("lifted", {})) if view.prepare is not None else {}
    own = [f for f in view.fields if f not in lifted]
    return own or list(view.fields)


def forecast_dataset(store: str | Path, snapshot: int, n_steps: int, *, compare: bool = False) -> xr.Dataset:
    """The forecast of every field from column ``snapshot`` as a dataset.

    Variables ``<field>`` (step, *grid) for each archive field (not lifted ones such as
    ``T_square``; see :func:`archive_fields`) in field units with the store's grid coordinates,
    ``time`` (step,); with ``compare`` also ``error_<field>`` (step,) and
    ``archive_snapshot`` (step,), NaN / -1 where the forecast does not overlap the archive.

    Example
    -------
    >>> ds = forecast_dataset("results/fin-duct.zarr", snapshot=-1, n_steps=20)  # doctest: +SKIP
    >>> ds["T"].dims                                                              # doctest: +SKIP
    ('step', 'y', 'x')
    """
    view = open_store(store)
    if isinstance(n_steps, (int, np.integer)) and not isinstance(n_steps, bool) and n_steps >= 0:
        points = sum(int(np.prod(view.modes[f].shape[1:])) for f in archive_fields(view))
        needed = 3 * 8 * (int(n_steps) + 1) * points  # the fields, and the temporaries that form them
        available = int(psutil.virtual_memory().available)
        if needed > available // 2:
            raise ResultStoreError(
                f"a forecast of {n_steps} steps of {points} grid values needs about {needed / 2**30:.1f} GiB, more "
                f"than half of the {available / 2**30:.1f} GiB available; forecast fewer steps at a time "
                "(--from and --steps)")
    values = forecast_fields(store, snapshot, n_steps, fields=archive_fields(view))
    time = values.pop("time")
    column = int(snapshot) % view.time.size
    variables: dict[str, xr.DataArray] = {}
    for name, field in values.items():
        template = view.modes[name]
        attrs = {k: v for k, v in template.attrs.items() if k in ("units", "long_name", "standard_name")}
        variables[name] = xr.DataArray(field, dims=("step", *template.dims[1:]), attrs=attrs)
    coords: dict[str, xr.Variable | xr.DataArray] = {}
    for dim in {str(d) for v in variables.values() for d in v.dims[1:]}:
        if dim in view.modes.coords:
            coords[dim] = view.modes.coords[dim].variable.to_base_variable()
    time_attrs = {"long_name": "time"}
    if view.time_unit:
        time_attrs["units"] = view.time_unit
    coords["time"] = xr.DataArray(time, dims=("step",), attrs=time_attrs)
    coords["step"] = xr.DataArray(np.arange(n_steps + 1), dims=("step",),
                                  attrs={"long_name": f"steps of dt = {view.dt:.6g} after the start snapshot"})
    dataset = xr.Dataset(variables, coords=coords, attrs={
        "source": str(Path(store).resolve()), "start_column": column, "start_time": float(view.time[column]),
        "dt": view.dt, "caution": FORECAST_CAUTION, FORECAST_KEY: True})
    if compare:
        _compare(dataset, view, column, n_steps)
    return dataset


def _compare(dataset: xr.Dataset, view: StoreView, column: int, n_steps: int) -> None:
    lifted = dict(view.prepare.attrs.get("lifted", {})) if view.prepare is not None else {}
    try:
        source = open_source(view.attrs, view.fields, lifted)
    except ArchiveError as error:
        raise ArchiveError(f"forecast --compare: {error}") from None
    if not source.fields:
        raise ArchiveError(f"forecast --compare: none of the fields {', '.join(view.fields)} is in the archive "
                           f"{source.reader.path} as it is (lifted fields have no archive values)")
    snapshots = overlap_snapshots(view, column, n_steps, source.n_snapshots)
    dataset["archive_snapshot"] = xr.DataArray(snapshots, dims=("step",),
                                               attrs={"long_name": "archive snapshot at this step (-1: none)"})
    overlap = np.flatnonzero(snapshots >= 0)
    at_archive_times = _uneven_times(view, column, snapshots)
    if at_archive_times is not None:
        # uneven snapshot times: step s of dt is not snapshot j + s; the model is evaluated at
        # each compared snapshot's own time instead (known for the fitted snapshots)
        snapshots = np.where(np.isfinite(at_archive_times), snapshots, -1)
        overlap = np.flatnonzero(snapshots >= 0)
        dataset["archive_snapshot"].values[:] = snapshots
        dataset["archive_time"] = xr.DataArray(at_archive_times, dims=("step",), attrs={
            "long_name": "time of the archive snapshot compared at this step (uneven times: the model is "
                         "evaluated there for the comparison)",
            **({"units": view.time_unit} if view.time_unit else {})})
        offsets = np.where(np.isfinite(at_archive_times), at_archive_times - view.time[column], 0.0)
        model_at = forecast_fields(view.path, column, n_steps, fields=list(source.fields), offsets=offsets)
    for name in source.fields:
        forecast = np.asarray(dataset[name].values).reshape(n_steps + 1, -1)
        if at_archive_times is not None:
            forecast = np.asarray(model_at[name]).reshape(n_steps + 1, -1)
        weights = np.ones(forecast.shape[1])
        if view.prepare is not None and f"weights_{name}" in view.prepare:
            weights = np.asarray(view.prepare[f"weights_{name}"].values, dtype=np.float64).ravel()
        difference = np.full(n_steps + 1, np.nan)
        reference = np.full(n_steps + 1, np.nan)
        for position, archive in archive_snapshots(source, name, snapshots[overlap]):
            step = int(overlap[position])
            model = forecast[step]
            keep = np.isfinite(model) & np.isfinite(archive)
            reference[step] = np.sum(weights[keep] * np.abs(archive[keep]) ** 2)
            difference[step] = np.sqrt(np.sum(weights[keep] * np.abs(model[keep] - archive[keep]) ** 2))
        # relative to the archive's RMS norm over the compared steps, not to each step's own
        # norm: a standing wave passes through zero, and a ratio to ~0 would read as 1e13
        scale = np.sqrt(np.nanmean(reference)) if overlap.size else np.nan
        relative = difference / scale if scale > 0 else difference
        dataset[f"error_{name}"] = xr.DataArray(relative, dims=("step",), attrs={
            "long_name": f"error of {name} against the archive relative to the archive's RMS norm over the "
                         "compared steps (weighted norm over the grid)", "units": "1"})


def _uneven_times(view: StoreView, column: int, snapshots: np.ndarray) -> np.ndarray | None:
    """Times of the archive snapshots ``snapshots`` (NaN where unknown: not fitted, or -1) when
    the fitted times are not evenly ``dt`` apart; ``None`` for even times."""
    time, index = view.time, np.asarray(view.diagnostics["snapshot_index"].values, dtype=np.int64)
    steps = np.diff(time)
    if steps.size == 0 or np.allclose(steps[steps > 0], view.dt, rtol=1e-6, atol=0):
        return None
    position = {int(i): k for k, i in enumerate(index)}
    return np.array([time[position[int(s)]] if int(s) in position else np.nan for s in snapshots])


def write_forecast(dataset: xr.Dataset, out: str | Path) -> Path:
    """Write a forecast dataset to a zarr store, whole or not at all (staging folder, rename)."""
    out = Path(out)
    if out.exists():
        try:
            previous = xr.open_zarr(str(out), chunks=None)
            ours = bool(previous.attrs.get(FORECAST_KEY))
            previous.close()
        except Exception:
            ours = False
        if not ours:
            raise ResultStoreError(f"{out} exists and is not a forecast written by snaplift; choose another --out")
    out.parent.mkdir(parents=True, exist_ok=True)
    staging = out.with_name(f"{out.name}.staging-{uuid.uuid4().hex[:8]}")
    try:
        with warnings.catch_warnings():
            # consolidated metadata is not in the v3 spec yet; xarray reads it (as for the result store)
            warnings.filterwarnings("ignore", message="Consolidated metadata", category=UserWarning)
            dataset.to_zarr(str(staging), mode="w", zarr_format=3, consolidated=True)
        if out.exists():
            shutil.rmtree(out)
        os.replace(staging, out)
    finally:
        shutil.rmtree(staging, ignore_errors=True)
    return out
