"""The spectrum as a table: rich for people, JSON for programs."""

from __future__ import annotations

import json
import math
from pathlib import Path
from typing import Any

import numpy as np

from snaplift.results.store import open_result, read_group

__all__ = ["load_spectrum", "spectrum_records", "render_spectrum", "spectrum_json"]

COLUMNS = ("eigenvalue", "rate", "frequency", "growth", "period", "amplitude", "residual", "trusted", "partner",
           "ranking")


def load_spectrum(path: str | Path) -> dict[str, np.ndarray]:
    """The ``spectrum/`` group of a complete result store."""
    return read_group(path, "spectrum")


def spectrum_records(spectrum: dict[str, np.ndarray], *, sort: str = "amplitude") -> list[dict[str, Any]]:
    """One dict per mode, sorted by ``sort`` (descending for amplitude, ascending otherwise)."""
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
    for rank, i in enumerate(order):
        record: dict[str, Any] = {"mode": int(i)}
        for name in COLUMNS:
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


def spectrum_json(path: str | Path, *, sort: str = "amplitude") -> str:
    root = open_result(path)
    records = spectrum_records(load_spectrum(path), sort=sort)
    return json.dumps({"result": str(path), "dt": root["spectrum"].attrs.get("dt"), "modes": records}, indent=2)


def _number(value: float, digits: int = 4) -> str:
    if value is None or math.isinf(value):
        return "inf"
    return f"{value:.{digits}g}"


def render_spectrum(path: str | Path, *, sort: str = "amplitude", limit: int | None = 20) -> Any:
    """A rich Table of the spectrum of a result store."""
    from rich.table import Table

    records = spectrum_records(load_spectrum(path), sort=sort)
    table = Table(title=f"spectrum of {path} (sorted by {sort})", title_justify="left")
    has_residual = bool(records) and "residual" in records[0]
    headers = ["mode", "|eigenvalue|", "frequency [Hz]", "growth [1/s]", "period [s]", "amplitude"]
    headers += ["residual", "trusted"] if has_residual else []
    for header in headers:
        table.add_column(header, justify="right")
    for record in records[: limit or None]:
        eig = record["eigenvalue"]
        row = [str(record["mode"]), _number(abs(complex(eig["real"], eig["imag"])), 6),
               _number(record["frequency"]), _number(record["growth"]),
               _number(record["period"]), _number(record["amplitude"])]
        if has_residual:
            row += [_number(record["residual"], 2), "yes" if record["trusted"] else "no"]
        table.add_row(*row)
    if limit and len(records) > limit:
        table.caption = f"{len(records) - limit} more modes not shown (use --all)"
    return table
