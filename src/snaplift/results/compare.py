"""``snaplift compare A B``: which modes two result stores share, and how they differ.

Eigenvalues are matched by their continuous-time rates ``log(lambda) / dt`` (so stores
with different time steps compare), one to one, minimising the summed distance
(the linear assignment problem, solved by scipy's ``linear_sum_assignment``,
Crouse 2016). A pair is kept as a match when the rates lie within
``tolerance x max(|rate_A|, |rate_B|, 2 pi / span)`` of each other, ``span`` the longer of
the two fitted time spans (so that slow modes are compared on the frequency resolution
of the data rather than on their own tiny rates). Everything else is a mode only one store
has. When both stores give ``spectrum.attrs['time_unit_seconds']``, rates are compared in
1/s.

For each matched pair and each field both stores hold on the same grid, the modal
assurance criterion ``MAC = |a^H W b|^2 / ((a^H W a)(b^H W b))`` (Allemang & Brown 1982)
of the two mode shapes, with ``W`` the stored point weights (cell sizes) when there are
any, over the points finite in both.
"""

from __future__ import annotations

import json
from pathlib import Path
from typing import Any

import numpy as np
from scipy.optimize import linear_sum_assignment

from snaplift.errors import ConfigError
from snaplift.results.reading import StoreView, field_axes, open_store, units_of

__all__ = ["compare_stores", "compare_json", "modal_assurance", "render_comparison"]


def modal_assurance(a: np.ndarray, b: np.ndarray, weights: np.ndarray | None = None) -> float:
    """MAC of two mode shapes (Allemang & Brown 1982); NaN points of either are left out."""
    a, b = np.asarray(a).ravel(), np.asarray(b).ravel()
    w = np.ones(a.size) if weights is None else np.asarray(weights, dtype=np.float64).ravel()
    keep = np.isfinite(a) & np.isfinite(b) & np.isfinite(w)
    a, b, w = a[keep], b[keep], w[keep]
    denominator = float(np.real(np.vdot(a, w * a)) * np.real(np.vdot(b, w * b)))
    return float(abs(np.vdot(a, w * b)) ** 2 / denominator) if denominator > 0 else float("nan")


def _rates(view: StoreView) -> np.ndarray:
    """Continuous-time rates, in 1/s when the store's time unit converts to seconds."""
    seconds = view.spectrum.attrs.get("time_unit_seconds")
    if "rate" in view.spectrum:
        rate = np.asarray(view.spectrum["rate"].values, dtype=np.complex128)
        if units_of(view.spectrum["rate"]) == "1/s":  # stored in 1/s already (a store with time units)
            return rate
    else:
        rate = np.asarray(np.log(np.asarray(view.spectrum["eigenvalue"].values, dtype=np.complex128)) / view.dt,
                          dtype=np.complex128)
    # per archive time unit: dt and the stored rates of older stores are in the archive's unit
    return rate / float(seconds) if seconds else rate


def _weights(view: StoreView, field: str) -> np.ndarray | None:
    if view.prepare is not None and f"weights_{field}" in view.prepare:
        return np.asarray(view.prepare[f"weights_{field}"].values, dtype=np.float64)
    return None


def _same_grid(a: StoreView, b: StoreView, field: str) -> bool:
    """Same shape, and the same coordinate values on every dimension both stores give them for
    (a grid of the same size over another region is another grid: no MAC there)."""
    if a.modes[field].shape[1:] != b.modes[field].shape[1:]:
        return False
    for axis_a, axis_b in zip(field_axes(a.modes, field), field_axes(b.modes, field)):
        if not (axis_a.is_index or axis_b.is_index) and not np.allclose(
                axis_a.values, axis_b.values, rtol=1e-9, atol=1e-12 * float(np.max(np.abs(axis_a.values)) or 1.0)):
            return False
    return True


def _mode_record(view: StoreView, k: int) -> dict[str, Any]:
    return {"mode": int(k), "frequency": float(view.spectrum["frequency"].values[k]),
            "growth": float(view.spectrum["growth"].values[k]),
            "amplitude": float(view.spectrum["amplitude"].values[k]), "trusted": bool(view.trusted[k])}


def compare_stores(first: str | Path, second: str | Path, *, tolerance: float = 0.05) -> dict[str, Any]:
    """Match the modes of two stores; see the module docstring.

    Returns a dict: ``matched`` (A mode, B mode, frequencies, growth rates and their
    differences, ``mac`` per field), ``only_a``, ``only_b``, ``fields`` compared, ``units``.

    Example
    -------
    >>> result = compare_stores("rank20.zarr", "rank40.zarr")  # doctest: +SKIP
    >>> result["matched"][0]["mac"]["T"] > 0.99                 # doctest: +SKIP
    True
    """
    if not tolerance > 0:
        raise ConfigError(f"--tolerance must be > 0; got {tolerance}")
    a, b = open_store(first), open_store(second)
    rate_a, rate_b = _rates(a), _rates(b)
    both_seconds = bool(a.spectrum.attrs.get("time_unit_seconds") and b.spectrum.attrs.get("time_unit_seconds"))
    span = max(float(np.ptp(a.time)) or a.dt, float(np.ptp(b.time)) or b.dt)
    if both_seconds:
        span *= float(a.spectrum.attrs["time_unit_seconds"])
    distance = np.abs(rate_a[:, None] - rate_b[None, :])
    rows, columns = linear_sum_assignment(distance) if distance.size else (np.array([], int), np.array([], int))
    fields = [f for f in a.fields if f in b.fields]
    same_grid = {f: _same_grid(a, b, f) for f in fields}
    matched, used_a, used_b = [], set(), set()
    for i, j in sorted(zip(rows.tolist(), columns.tolist())):
        scale = max(abs(rate_a[i]), abs(rate_b[j]), 2 * np.pi / span)
        if distance[i, j] > tolerance * scale:
            continue
        used_a.add(i)
        used_b.add(j)
        record_a, record_b = _mode_record(a, i), _mode_record(b, j)
        mac: dict[str, float | None] = {}
        for field in fields:
            if same_grid[field]:
                mac[field] = modal_assurance(a.modes[field].values[i], b.modes[field].values[j], _weights(a, field))
            else:
                mac[field] = None
        matched.append({"a": i, "b": j, "frequency_a": record_a["frequency"], "frequency_b": record_b["frequency"],
                        "frequency_difference": record_b["frequency"] - record_a["frequency"],
                        "growth_a": record_a["growth"], "growth_b": record_b["growth"],
                        "growth_difference": record_b["growth"] - record_a["growth"],
                        "trusted_a": record_a["trusted"], "trusted_b": record_b["trusted"], "mac": mac})
    units = {"frequency": "Hz" if both_seconds else a.frequency_unit,
             "growth": "1/s" if both_seconds else a.growth_unit}
    return {"a": str(first), "b": str(second), "tolerance": tolerance, "fields": fields,
            "fields_on_other_grids": [f for f in fields if not same_grid[f]],
            "fields_only_a": [f for f in a.fields if f not in b.fields],
            "fields_only_b": [f for f in b.fields if f not in a.fields], "units": units,
            "matched": matched,
            "only_a": [_mode_record(a, k) for k in range(rate_a.size) if k not in used_a],
            "only_b": [_mode_record(b, k) for k in range(rate_b.size) if k not in used_b]}


def _clean(value: Any) -> Any:
    # JSON has no NaN: a MAC that cannot be computed is null
    if isinstance(value, dict):
        return {k: _clean(v) for k, v in value.items()}
    if isinstance(value, list):
        return [_clean(v) for v in value]
    if isinstance(value, float) and not np.isfinite(value):
        return None
    return value


def compare_json(result: dict[str, Any]) -> str:
    return json.dumps(_clean(result), indent=2)


def render_comparison(result: dict[str, Any]) -> Any:
    """Rich tables: matched modes with differences and MAC per field, then the unmatched ones."""
    from rich.console import Group
    from rich.table import Table

    units = result["units"]
    table = Table(title=f"modes matched between A = {result['a']} and B = {result['b']} "
                        f"(nearest continuous-time rate, tolerance {result['tolerance']:g})", title_justify="left")
    for header in ("A", "B", f"frequency A [{units['frequency']}]", "difference", f"growth A [{units['growth']}]",
                   "difference", "trusted A/B", *(f"MAC {f}" for f in result["fields"])):
        table.add_column(header, justify="right")
    for m in result["matched"]:
        macs = ["-" if m["mac"][f] is None else f"{m['mac'][f]:.4f}" for f in result["fields"]]
        table.add_row(str(m["a"]), str(m["b"]), f"{m['frequency_a']:.5g}", f"{m['frequency_difference']:+.2e}",
                      f"{m['growth_a']:.4g}", f"{m['growth_difference']:+.2e}",
                      f"{'yes' if m['trusted_a'] else 'no'}/{'yes' if m['trusted_b'] else 'no'}", *macs)
    parts: list[Any] = [table]
    for key, name in (("only_a", "A"), ("only_b", "B")):
        only = Table(title=f"modes only {name} has ({len(result[key])})", title_justify="left")
        for header in ("mode", f"frequency [{units['frequency']}]", f"growth [{units['growth']}]", "amplitude",
                       "trusted"):
            only.add_column(header, justify="right")
        for r in result[key]:
            only.add_row(str(r["mode"]), f"{r['frequency']:.5g}", f"{r['growth']:.4g}", f"{r['amplitude']:.4g}",
                         "yes" if r["trusted"] else "no")
        parts.append(only)
    if result["fields_on_other_grids"]:
        parts.append(f"fields on different grids (no MAC): {', '.join(result['fields_on_other_grids'])}")
    for key, name in (("fields_only_a", "A"), ("fields_only_b", "B")):
        if result[key]:
            parts.append(f"fields only {name} has: {', '.join(result[key])}")
    return Group(*parts)
