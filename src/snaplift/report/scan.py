"""The scan report as a table (rich) or JSON."""

from __future__ import annotations

import json
from typing import Any

from snaplift.archive import ScanReport

__all__ = ["render_scan", "scan_json", "human_bytes"]


def human_bytes(count: float | None) -> str:
    if count is None:
        return "-"
    value = float(count)
    for unit in ("B", "KiB", "MiB", "GiB", "TiB"):
        if abs(value) < 1024 or unit == "TiB":
            return f"{value:.0f} {unit}" if unit == "B" else f"{value:.1f} {unit}"
        value /= 1024
    return f"{value:.1f} TiB"  # pragma: no cover


def scan_json(report: ScanReport) -> str:
    return json.dumps(report.to_dict(), indent=2, default=str)


def render_scan(report: ScanReport) -> Any:
    """A rich renderable: archive summary, fields, values seen, tile plan, warnings."""
    from rich.console import Group
    from rich.table import Table

    data = report.to_dict()
    head = Table.grid(padding=(0, 2))
    head.add_column(style="bold")
    head.add_column()
    size = human_bytes(data["size_bytes"])
    head.add_row("archive", f"{data['path']} ({data['format']}, {data['files']} file(s), {size} on disk)")
    head.add_row("snapshots", str(data["n_snapshots"]))
    runs = data.get("run_lengths") or []
    if len(runs) > 1:
        shown = ", ".join(map(str, runs[:12])) + (", ..." if len(runs) > 12 else "")
        head.add_row("runs", f"{len(runs)} runs of {shown} snapshots (no pair crosses a run boundary)")
    spacing = data.get("spacing") or {}
    if data.get("time_source"):
        unit = f" {data['time_unit']}" if data.get("time_unit") else ""
        # several runs: first of the first run .. last of the last, and the runs' spans summed
        across = f", summed over {len(runs)} runs" if len(runs) > 1 else ""
        head.add_row("time", f"{data['time_source']}: {data['time_first']:.6g} .. {data['time_last']:.6g}{unit} "
                              f"(span {data['time_span']:.6g}{across})")
    if spacing:
        kind = "uniform" if spacing.get("uniform") else "NOT uniform"
        head.add_row("spacing", f"dt = {spacing['dt']:.6g}, {kind}; worst gap {spacing['worst_gap_value']:.6g} "
                                f"after snapshot {spacing['worst_gap_index']} "
                                f"(max relative deviation {spacing['max_relative_deviation']:.2g})")
    head.add_row("other datasets", ", ".join(data.get("variables") or []) or "-")

    fields = Table(title="fields", title_justify="left")
    for header in ("field", "shape", "stored dtype", "chunks", "size", "units"):
        fields.add_column(header)
    for f in data["fields"]:
        fields.add_row(f["name"], "x".join(map(str, f["shape"])), f["stored_dtype"],
                       "x".join(map(str, f["chunks"])) if f["chunks"] else "contiguous",
                       human_bytes(f["nbytes"]), str(f.get("units") or "-"))

    values = Table(title="values " + ("(every value)" if data.get("full") else "(sample of snapshots)"),
                   title_justify="left")
    for header in ("field", "values read", "NaN", "Inf", "min", "max"):
        values.add_column(header, justify="right")
    for v in data.get("values") or []:
        values.add_row(v["name"], str(v["values_read"]), str(v["nan_count"]), str(v["inf_count"]),
                       f"{v['minimum']:.6g}" if v["minimum"] is not None else "-",
                       f"{v['maximum']:.6g}" if v["maximum"] is not None else "-")

    parts: list[Any] = [head, fields, values]
    plan = data.get("plan")
    if plan:
        tiles = Table.grid(padding=(0, 2))
        tiles.add_column(style="bold")
        tiles.add_column()
        method = f"compress.method {plan['method']}, " if plan.get("method") else ""
        tiles.add_row("tile plan", f"{method}{plan['n_tiles']} tiles of {plan['tile_shape'][0]} points x "
                                   f"{plan['tile_shape'][1]} snapshots ({plan['n_snapshot_blocks']} snapshot blocks; "
                                   f"row blocking: {plan.get('row_blocking', 'none')})")
        passes = int(plan.get("passes") or 1)
        tiles.add_row("bytes to read", f"{human_bytes(plan['bytes_to_read'])} per pass"
                                       + (f", {passes} passes: {human_bytes(plan['bytes_to_read'] * passes)}"
                                          if passes > 1 else ", 1 pass"))
        per_worker = plan.get("peak_bytes_per_worker")
        tiles.add_row("memory", f"{human_bytes(plan['memory_per_tile_bytes'])} per tile in flight, "
                                + (f"{human_bytes(per_worker)} per worker, " if per_worker else "")
                                + f"peak estimate {human_bytes(plan['peak_bytes_estimate'])} "
                                + (f"incl. {human_bytes(plan['baseline_bytes'])} the processes hold before the pass "
                                   if plan.get("baseline_bytes") else "")
                                + f"(budget {human_bytes(plan['memory_bytes'])}, {plan.get('workers', 1)} worker(s))")
        parts.append(tiles)
    elif data.get("plan_error"):
        parts.append(f"[red]tile plan: {data['plan_error']}[/red]")
    probes = data.get("probes")
    if probes:
        parts.append(_probes(probes))
    for warning in data.get("warnings") or []:
        parts.append(f"[yellow]warning: {warning}[/yellow]")
    return Group(*parts)


def _probes(probes: dict[str, Any]) -> Any:
    from rich.table import Table

    grid = Table.grid(padding=(0, 2))
    grid.add_column(style="bold")
    grid.add_column()
    grid.add_row("probes", f"{', '.join(probes['probes'])}: {probes['values_per_snapshot']} value(s) per snapshot; "
                           "lift them with delays to see their frequencies")
    delays = probes["delays"]
    unit = probes.get("window_unit") or ""
    unit = f" {unit}" if unit else ""
    if probes.get("longest_period") is not None:
        seen = (f"spans the longest period in the periodogram, {probes['longest_period']:.6g}{unit} "
                f"(probe {probes['longest_period_probe']})")
    else:
        seen = "no periodogram peak found: a minimal window"
    window = probes['window'] if probes['window'] is not None else 0
    grid.add_row("suggested lift", f"- {{kind: delays, count: {delays['count']}, spacing: {delays['spacing']}}}  "
                                   f"(window {window:.6g}{unit}: {seen})")
    cost = (f"lifted matrix {probes['lifted_rows']} x {probes['lifted_columns']} "
            f"({human_bytes(probes['lifted_bytes'])})")
    plan = probes.get("plan")
    if plan:
        where = "in memory (one read)" if plan.get("in_memory") else f"{plan['n_tiles']} tiles"
        cost += (f"; compress.method {plan['method']}: {where}, peak estimate "
                 f"{human_bytes(plan['peak_bytes_estimate'])} of {human_bytes(plan['memory_bytes'])}")
    elif probes.get("plan_error"):
        cost += f"; [red]{probes['plan_error']}[/red]"
    grid.add_row("memory", cost)
    return grid
