"""Plain text of :func:`snaplift.workflow.bench.regime.run_regimes`: one block per chunk layout."""

from __future__ import annotations

from typing import Any

__all__ = ["render_regimes"]

GIB = 2.0**30
_STAGES = (("startup", "startup (imports, scan, fingerprint sampling)"), ("compress", "compress"), ("fit", "fit"),
           ("modes", "modes"), ("store", "store (report record, commit, exit)"), ("between", "between stages"))


def render_regimes(figures: dict[str, Any]) -> str:
    size = figures["archive_bytes"] / GIB
    lines = [f"archive: {size:.2f} GiB time-major HDF5, {figures['snapshots']} snapshots x {figures['points']} points, "
             f"float64, rank {figures['rank']}, {figures['workers']} workers; known singular values 0.95^j"]
    if figures.get("read_limit"):
        lines.append(f"read-bound regime: reads capped at {figures['read_limit']}, page cache of each command at "
                     f"{figures['cache_limit']} (slowfs-run; page cache dropped before each command)")
    for label, f in figures["layouts"].items():
        lines += ["", f"== {label} =="]
        if "capped" in f:
            lines += _capped(f["capped"], figures)
        if "cold" in f:
            c = f["cold"]
            lines.append(f"cold, uncapped: dd (8 MiB requests) {c['dd_rate'] / 1e6:.0f} MB/s; the sketch's compress "
                         f"pass read at {c['compress_rate'] / 1e6:.0f} MB/s = "
                         f"{c['compress_rate'] / c['dd_rate']:.2f}x dd")
            if "reads_rate" in c:
                lines.append(f"  its tiles ({c['tile_snapshots']} snapshots) read alone through the readers, cold: "
                             f"{c['reads_rate'] / 1e6:.0f} MB/s = {c['reads_rate'] / c['dd_rate']:.2f}x dd"
                             + (f" (the same chunks in uncompressed zarr: {c['zarr_reads_rate'] / 1e6:.0f} MB/s = "
                                f"{c['zarr_reads_rate'] / c['dd_rate']:.2f}x dd)" if "zarr_reads_rate" in c else "")
                             + f"; the pass warm (its arithmetic): {c['warm_rate'] / 1e6:.0f} MB/s")
        if "workers" in f:
            lines += _workers(f["workers"], figures)
        if "model" in f:
            lines += _model(f["model"])
    return "\n".join(lines)


def _capped(c: dict[str, Any], figures: dict[str, Any]) -> list[str]:
    read = c["read"]
    lines = [f"{'whole command':44s} {'seconds':>8s} {'x one read':>10s} {'passes':>6s} {'err top10':>10s}",
             f"{'one read of the archive (dd, 8 MiB requests)':44s} {read:8.1f} {1.0:10.2f} {1:6d} {'-':>10s}"]
    names = {"sketch": "snaplift run, sketch", "randomized": "snaplift run, randomized q=1",
             "svd_compressed q=0": "dask svd_compressed q=0 (compress only)",
             "svd_compressed q=1": "dask svd_compressed q=1 (compress only)"}
    for key, name in names.items():
        if key in c:
            r = c[key]
            lines.append(f"{name:44s} {r['seconds']:8.1f} {r['seconds'] / read:10.2f} {r['passes']:6d} "
                         f"{r['error_top10']:10.1e}")
    sketch = c["sketch"]
    stages = sketch.get("stages") or {}
    if stages.get("compress"):
        from snaplift.units import parse_bytes

        cap = float(parse_bytes(str(figures["read_limit"]).removesuffix("/s")))
        for key in ("sketch", "randomized"):
            if key in c and c[key]["stages"].get("compress"):
                rate = c[key]["bytes_read"] / c[key]["stages"]["compress"]
                lines.append(f"read bandwidth during the compress stage ({key}, writing the basis included): "
                             f"{rate / 1e6:.0f} MB/s = {rate / cap:.2f} of the cap")
        whole = sketch["seconds"]
        lines.append("stages of the sketch run, share of the whole run (" + f"{whole:.1f} s):")
        lines += [f"  {name:48s} {stages[key]:6.2f} s {100 * stages[key] / whole:5.1f} %"
                  for key, name in _STAGES if key in stages]
        after = stages.get("fit", 0) + stages.get("modes", 0) + stages.get("store", 0)
        lines.append(f"  fit + modes + store = {after / stages['compress']:.2f}x the compress stage")
    if "report_seconds" in c:
        lines.append(f"  report figures (snaplift report, on its own): {c['report_seconds']:.2f} s = "
                     f"{100 * c['report_seconds'] / sketch['seconds']:.1f} % of the run")
    return lines


def _workers(w: dict[str, Any], figures: dict[str, Any]) -> list[str]:
    t = w["threads"]
    plan = (f"{t['tiles']} tiles of <= {t['snapshots_per_tile']} snapshots"
            + (", the worker processes' plan for both" if t.get("same_plan") else ""))
    runs = t.get("runs") or [t["seconds"]]
    fastest = f"fastest of {len(runs)}, taking turns with worker processes; " if len(runs) > 1 else ""
    lines = [f"warm, sketch compress with threads: {t['seconds']:.2f} s "
             f"({t['seconds'] / (figures['archive_bytes'] / GIB):.2f} s/GiB; {fastest}{plan})"]
    if "local" in w:
        loc = w["local"]
        acc = loc["range_accumulator_bytes"]
        per_pass = ", ".join(f"{sent / 2**20:.1f} MiB = {sent / acc:.2f}" for sent in loc["bytes_per_pass"]) \
            if acc else "-"
        lines.append(f"  with worker processes (cluster: local), same tiles: {loc['seconds']:.2f} s = "
                     f"{loc['ratio']:.2f}x threads (target <= 1.3); sent between processes per pass (engine count) "
                     f"{per_pass} range accumulators of {acc / 2**20:.1f} MiB (target <= {figures['workers'] + 1})")
        if len(runs) > 1:
            lines.append("  every run (s): worker processes " + ", ".join(f"{r:.2f}" for r in loc.get("runs", []))
                         + "; threads " + ", ".join(f"{r:.2f}" for r in runs))
        if loc.get("cpu_seconds") is not None and t.get("cpu_seconds"):
            lines.append(f"  CPU of the process tree: {loc['cpu_seconds']:.2f} s with worker processes, "
                         f"{t['cpu_seconds']:.2f} s with threads = {loc['cpu_ratio']:.2f}x (wall moves toward it "
                         "when the machine is busy)")
        if loc.get("first_seconds") is not None:
            lines.append(f"  (before it, the first compress on the fresh cluster, also this process's first: "
                         f"{loc['first_seconds']:.2f} s)")
    return lines


def _model(m: dict[str, Any]) -> list[str]:
    lines = [f"cost model (arithmetic {m['arithmetic_seconds_per_gib']:.2f} s/GiB measured warm, read "
             f"{m['read_bandwidth'] / 1e6:.0f} MB/s, fixed costs {m['fixed_seconds']:.1f} s measured):"]
    for key, name in (("overlapped", "reads overlapped with arithmetic"), ("in_turn", "reads and arithmetic in turn")):
        p = m[key]
        verdict = "compress within 30 %" if abs(p["gap_compress"]) <= 0.3 else "compress NOT within 30 %"
        lines.append(f"  {name}: compress {p['compress']:.1f} s (measured {m['measured_compress']:.1f} s, "
                     f"{100 * p['gap_compress']:+.0f} %), whole run {p['whole']:.1f} s (measured "
                     f"{m['measured_whole']:.1f} s, {100 * p['gap_whole']:+.0f} %): {verdict}")
    t = m["terabyte"]
    lines.append("  on paper, 1 TB on 32 nodes at 1 GB/s each (this machine's cores per node): "
                 f"read {t['read']:.1f} s, "
                 f"arithmetic {t['arithmetic']:.1f} s, network {t['network_bytes'] / 1e9:.2f} GB per pass "
                 f"({t['network']:.1f} s at 10 Gbit/s), compress {t['compress']:.1f} s")
    return lines
