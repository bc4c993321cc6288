"""The spectrum as a table: rich for people, JSON for programs."""

from __future__ import annotations

import json
import math
from pathlib import Path
from typing import Any

import numpy as np

from snaplift.results.store import open_result, read_group, store_group

__all__ = ["load_spectrum", "spectrum_records", "render_spectrum", "spectrum_json", "spectrum_units", "delay_hint"]

COLUMNS = ("eigenvalue", "rate", "frequency", "growth", "period", "amplitude", "residual", "trusted", "partner",
           "ranking")


def load_spectrum(path: str | Path) -> dict[str, np.ndarray]:
    """The ``spectrum/`` group of a complete result store."""
    return read_group(path, "spectrum")


def spectrum_units(path: str | Path) -> dict[str, str]:
    """Units of the spectrum columns of a store: ``frequency``, ``growth``, ``period``, ``peak_<field>``.

    Stores written before the time unit was recorded say ``1/(time unit)``.
    """
    root = open_result(path)
    attrs = dict(root["spectrum"].attrs)
    units = {"frequency": str(attrs.get("frequency_unit", "1/(time unit)")),
             "growth": str(attrs.get("growth_unit", "1/(time unit)")),
             "period": str(attrs.get("period_unit", "(time unit)"))}
    for name, array in store_group(root, "spectrum").arrays():
        if name.startswith("peak_"):
            # a field the archive gave no unit: its peak has none either (not "1")
            units[name] = str(array.attrs.get("units", "unit unknown"))
    return units


def _peak_columns(spectrum: dict[str, np.ndarray], fields: list[str] | None, path: str | Path) -> list[str]:
    if not fields:
        return []
    available = sorted(n[len("peak_"):] for n in spectrum if n.startswith("peak_"))
    for name in fields:
        if f"peak_{name}" not in spectrum:
            from snaplift.errors import ResultStoreError

            raise ResultStoreError(f"--field {name!r}: result store {path} has no spectrum/peak_{name}; fields with "
                                   f"peak amplitudes: {', '.join(available) or '(none; written by an older snaplift)'}")
    return [f"peak_{name}" for name in fields]


def spectrum_records(spectrum: dict[str, np.ndarray], *, sort: str = "amplitude",
                     peaks: list[str] | None = None) -> list[dict[str, Any]]:
    """One dict per mode, sorted by ``sort`` (descending for amplitude, ascending otherwise);
    ``peaks`` adds those ``peak_<field>`` columns (all when None)."""
    n = len(spectrum["eigenvalue"])
    if sort == "amplitude":
        # the store is already sorted by amplitude with conjugate pairs adjacent (+f, -f)
        order = np.arange(n)
    else:
        if sort not in spectrum:
            from snaplift.errors import ResultStoreError

            raise ResultStoreError(f"this result store has no spectrum/{sort} (written by an older snaplift or "
                                   "without residuals); sort by amplitude, frequency or growth")
        keys = np.asarray(spectrum[sort])
        order = np.argsort(np.abs(keys) if np.iscomplexobj(keys) else keys, kind="stable")
    records = []
    for i in order:
        record: dict[str, Any] = {"mode": int(i)}
        extra = [n for n in spectrum if n.startswith("peak_")] if peaks is None else peaks
        for name in (*COLUMNS, *extra):
            if name not in spectrum:
                continue
            value = spectrum[name][i]
            if name in ("trusted", "partner", "ranking"):
                record[name] = bool(value) if name == "trusted" else int(value)
            elif np.iscomplexobj(value):
                record[name] = {"real": float(np.real(value)), "imag": float(np.imag(value))}
            else:
                # JSON has no infinity: an infinite period (zero frequency) is null
                record[name] = float(value) if np.isfinite(value) else None
        records.append(record)
    assert len(records) == n
    return records


def spectrum_json(path: str | Path, *, sort: str = "amplitude", fields: list[str] | None = None) -> str:
    root = open_result(path)
    spectrum = load_spectrum(path)
    peaks = _peak_columns(spectrum, fields, path) if fields else None
    records = spectrum_records(spectrum, sort=sort, peaks=peaks)
    attrs = root["spectrum"].attrs
    return json.dumps({"result": str(path), "dt": attrs.get("dt"), "time_unit": attrs.get("time_unit"),
                       "units": spectrum_units(path), "modes": records, "hint": delay_hint(path)}, indent=2)


def _number(value: float, digits: int = 4) -> str:
    if value is None or math.isinf(value):
        return "inf"
    return f"{value:.{digits}g}"


def render_spectrum(path: str | Path, *, sort: str = "amplitude", limit: int | None = 20,
                    fields: list[str] | None = None) -> Any:
    """A rich Table of the spectrum of a result store; ``fields`` adds their peak amplitudes
    (None: every field's when there are at most 3)."""
    from rich.table import Table

    spectrum = load_spectrum(path)
    if fields is None:
        every = [n for n in spectrum if n.startswith("peak_")]
        peaks = every if len(every) <= 3 else []
    else:
        peaks = _peak_columns(spectrum, fields, path)
    records = spectrum_records(spectrum, sort=sort, peaks=peaks)
    units = spectrum_units(path)
    table = Table(title=f"spectrum of {path} (sorted by {sort})", title_justify="left")
    has_residual = bool(records) and "residual" in records[0]
    headers = ["mode", "|eigenvalue|", f"frequency [{units['frequency']}]", f"growth [{units['growth']}]",
               f"period [{units['period']}]", "amplitude"]
    headers += [f"peak {p[len('peak_'):]} [{units.get(p, '1')}]" for p in peaks]
    headers += ["residual", "trusted"] if has_residual else []
    from rich.markup import escape

    for header in headers:
        # "[s]" would be read as rich markup (strike) and vanish
        table.add_column(escape(header), justify="right")
    for record in records[: limit or None]:
        eig = record["eigenvalue"]
        row = [str(record["mode"]), _number(abs(complex(eig["real"], eig["imag"])), 6),
               _number(record["frequency"]), _number(record["growth"]),
               _number(record["period"]), _number(record["amplitude"])]
        row += [_number(record[p]) for p in peaks]
        if has_residual:
            row += [_number(record["residual"], 2), "yes" if record["trusted"] else "no"]
        table.add_row(*row)
    captions = []
    if limit and len(records) > limit:
        captions.append(f"{len(records) - limit} more modes not shown (use --all)")
    hint = delay_hint(path)
    if hint:
        captions.append(hint)
    table.caption = "\n".join(captions) or None
    table.caption_justify = "left"
    return table


def _current_delays(workflow_text: str) -> int:
    """``count`` of the workflow's ``lift: delays`` entry (1: none)."""
    import yaml

    try:
        lift = (yaml.safe_load(workflow_text) or {}).get("lift") or []
    except yaml.YAMLError:
        return 1
    for entry in lift if isinstance(lift, list) else []:
        if isinstance(entry, dict) and entry.get("kind") == "delays":
            return int(entry.get("count", 1) or 1)
    return 1


def delay_hint(path: str | Path) -> str | None:
    """Which ``lift: delays`` setting to try when the fit shows the signs of a too-small state.

    Signs (common practice for DMD of few observables): a real eigenvalue off the unit
    circle among the leading modes where an oscillation is expected (a standing wave seen
    by too few values needs a conjugate pair); leading modes at the Nyquist frequency
    (negative real eigenvalues); more than half of the modes untrusted. Delay embedding
    (Hankel stacking; Arbabi & Mezic 2017; Brunton et al. 2017) enlarges the state.
    """
    root = open_result(path)
    spectrum = load_spectrum(path)
    eigenvalue = np.asarray(spectrum["eigenvalue"], dtype=np.complex128)
    n = eigenvalue.size
    if n == 0:
        return None
    leading = slice(0, min(n, 6))
    partner = np.asarray(spectrum.get("partner", np.full(n, -1)))[leading]
    lead = eigenvalue[leading]
    signs = []
    real_decaying = (partner < 0) & (np.abs(lead.imag) <= 1e-8 * np.maximum(1, np.abs(lead))) & \
        (np.abs(np.abs(lead) - 1) > 1e-3)
    if np.count_nonzero(real_decaying) >= 2:
        signs.append(f"{int(np.count_nonzero(real_decaying))} real eigenvalues off the unit circle among the leading "
                     "modes (an oscillation seen through too few values)")
    if "near_nyquist" in spectrum and np.any(np.asarray(spectrum["near_nyquist"])[leading]):
        signs.append("leading modes near the Nyquist frequency")
    if "trusted" in spectrum:
        untrusted = int(np.count_nonzero(~np.asarray(spectrum["trusted"], dtype=bool)))
        if untrusted > n // 2:
            signs.append(f"{untrusted} of {n} modes untrusted")
    if not signs:
        return None
    current = _current_delays(str(root.attrs.get("workflow", "")))
    suggestion = 4 if current <= 1 else 2 * current
    return (f"hint: {'; '.join(signs)}: the state may be too small for the dynamics; try "
            f"'lift: [{{kind: delays, count: {suggestion}}}]' (now {current}), or a larger fit.rank")
