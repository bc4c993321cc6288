"""``snaplift report``: one self-contained HTML page (figures embedded) plus each figure as PNG.

The page is written next to the store as ``RESULT.report/`` (``index.html`` and the
PNGs), into a staging folder first and renamed into place, so a half-written report never
replaces a whole one. It needs no network and opens from ``file://``. The forecast panel
reads the archive at a few probe points (the points of largest variance of the data as
projected on the basis) for at most :data:`PROBE_SNAPSHOTS` snapshots; when the archive
is not there any more it compares with the projection alone and says so.
"""

from __future__ import annotations

import base64
import html
import io
import json
import os
import shutil
import time as _time
import uuid
from collections.abc import Callable
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import numpy as np

from snaplift.errors import ArchiveError, ResultStoreError
from snaplift.report.figures import (
    PALETTE,
    Probe,
    eigenvalue_figure,
    energy_figure,
    error_figure,
    mode_figure,
    point_figure,
    probe_figure,
    spectrum_figure,
)
from snaplift.results.forecast import FORECAST_CAUTION, forecast_fields, overlap_snapshots
from snaplift.results.reading import StoreView, field_axes, leading_modes, open_store
from snaplift.results.source import archive_snapshots, open_source
from snaplift.results.store import open_result, read_group

__all__ = ["REPORT_CAUTION", "FigureJob", "ReportSummary", "draw_job", "figure_jobs", "render_report",
           "report_folder"]

REPORT_CAUTION = FORECAST_CAUTION.replace("This forecast comes from", "These results come from")
PROBE_SNAPSHOTS = 240
#: at most this many bytes of stored chunks are read for the archive values at the probe
#: points; a point of a time-major archive with one snapshot per chunk lies in a chunk per
#: snapshot, and 240 of them can be most of the archive (2 GiB, capped at 200 MB/s: 14 s),
#: so beyond it the forecast is compared with the projection on the basis only
PROBE_READ_BYTES = 64 * 2**20


def _probe_read_bytes(source: Any, fields: list[str], snapshots: np.ndarray) -> int:
    """Bytes of stored chunks the probe reads touch: one chunk in space per field, one per
    distinct snapshot chunk (contiguous storage or a file per snapshot: a small read each)."""
    info = source.reader.describe()
    total = 0
    for name in fields:
        field = info.fields[name]
        if not field.chunks:
            continue
        chunk_bytes = int(np.prod(field.chunks, dtype=np.int64)) * np.dtype(field.stored_dtype).itemsize
        total += int(np.unique(np.asarray(snapshots) // max(1, field.snapshot_chunk)).size) * chunk_bytes
    return total
LEADING_MODES = 4
MARKER = "snaplift-report.json"


@dataclass(frozen=True)
class ReportSummary:
    folder: Path
    index: Path
    figures: tuple[str, ...]
    seconds: float
    archive_values_read: int


def report_folder(store: str | Path) -> Path:
    """``RESULT.report`` next to the store."""
    store = Path(store)
    return store.with_name(store.name + ".report")


def _png(figure: Any) -> bytes:
    buffer = io.BytesIO()
    # zlib level 1: a quarter of level 6's time on large noisy images, files ~5 % larger
    figure.savefig(buffer, format="png", dpi=100, pil_kwargs={"compress_level": 1})
    return buffer.getvalue()


def _probe_points(view: StoreView, field: str, columns: slice) -> int | None:
    """Flat grid index of the point of largest variance of the projected data (basis x coefficients)."""
    if view.basis is not None and field in view.basis and "coefficient" in view.basis:
        basis = np.asarray(view.basis[field].values)
        flat = basis.reshape(basis.shape[0], -1)  # (rank, points)
        c = np.asarray(view.basis["coefficient"].values)[:, columns]
        c = c - c.mean(axis=1, keepdims=True)
        covariance = (c @ c.conj().T) / max(1, c.shape[1])
        finite = np.all(np.isfinite(flat), axis=0)
        safe = np.where(finite, flat, 0.0)
        # diag(B^H C B) point by point: one matrix product, then a two-operand einsum (the
        # three-operand einsum looped in C, a column sum over a copy strode through memory)
        variance = np.real(np.einsum("rp,rp->p", safe.conj(), covariance.T @ safe))
    else:
        values = np.abs(np.asarray(view.modes[field].values))
        flat = values.reshape(values.shape[0], -1)
        finite = np.all(np.isfinite(flat), axis=0)
        variance = np.where(finite, flat[0], 0.0)
    variance = np.where(finite, variance, -np.inf)
    return int(np.argmax(variance)) if np.isfinite(variance).any() else None


def _where(view: StoreView, field: str, point: int) -> str:
    axes = field_axes(view.modes, field)
    index = np.unravel_index(point, tuple(a.values.size for a in axes))
    return ", ".join(f"{a.dim} = {a.values[i]:.4g}" + (f" {a.units}" if a.units else "") for a, i in zip(axes, index))


def _probes(view: StoreView, fields: list[str]) -> tuple[list[Probe], str, int]:
    """Forecast from the first snapshot over the first run at one probe point per field."""
    length = view.time.size
    if "runs" in _group_names(view):
        length = int(np.asarray(read_group(view.path, "runs")["run_length"])[0])
    columns = slice(0, length)
    points = {f: p for f in fields if (p := _probe_points(view, f, columns)) is not None}
    if not points:
        return [], "", 0
    forecast = forecast_fields(view.path, 0, length - 1, fields=list(points),
                               points={f: np.array([p]) for f, p in points.items()})
    time = forecast["time"]
    lifted = dict(view.prepare.attrs.get("lifted", {})) if view.prepare is not None else {}
    note, read, archive_values = "", 0, {}
    try:
        source = open_source(view.attrs, list(points), lifted)
        snapshots = overlap_snapshots(view, 0, length - 1, None)
        steps = np.flatnonzero(snapshots >= 0)
        steps = steps[np.unique(np.linspace(0, steps.size - 1, min(steps.size, PROBE_SNAPSHOTS)).astype(int))]
        cost = _probe_read_bytes(source, list(source.fields), snapshots[steps])
        if cost > PROBE_READ_BYTES:
            raise ArchiveError(f"the archive values at the probe points lie in {cost / 2**20:.0f} MiB of stored "
                               f"chunks (over the report's {PROBE_READ_BYTES // 2**20} MiB read budget), not read")
        for field in source.fields:
            values = np.full(steps.size, np.nan)
            for position, value in archive_snapshots(source, field, snapshots[steps], np.array([points[field]])):
                values[position] = float(np.real(value[0]))
            archive_values[field] = (_archive_times(view, snapshots[steps], time[steps]), values)
            read += steps.size
    except ArchiveError as error:
        note = f"{error}; compared with the projection on the basis only"
    probes = []
    coefficient = np.asarray(view.basis["coefficient"].values)[:, columns] if view.basis is not None else None
    for field, point in points.items():
        projection = np.full(length, np.nan)
        if coefficient is not None and view.basis is not None and field in view.basis:
            row = np.asarray(view.basis[field].values).reshape(view.basis[field].shape[0], -1)[:, point]
            projection = np.real(row @ coefficient)
            mean_key = f"mean_{field}"
            if view.prepare is not None and mean_key in view.prepare:
                projection = projection + float(np.asarray(view.prepare[mean_key].values).ravel()[point])
        archive_time, archive = archive_values.get(field, (None, None))
        # complex archives: the real part, as for the archive values and the projection
        probes.append(Probe(f"Re {field}" if view.complex_data else field, _where(view, field, point), time,
                            np.real(forecast[field][:, 0]), view.time[columns], projection, archive_time, archive,
                            view.field_units(field)))
    return probes, note, read


def _archive_times(view: StoreView, snapshots: np.ndarray, fallback: np.ndarray) -> np.ndarray:
    """Each archive snapshot's own time where the store has it (uneven times: optimized DMD),
    else the model step's time (even times, where the two agree)."""
    index = np.asarray(view.diagnostics["snapshot_index"].values, dtype=np.int64)
    known = dict(zip(index.tolist(), view.time.tolist()))
    return np.array([known.get(int(s), float(t)) for s, t in zip(snapshots, fallback)])


def _group_names(view: StoreView) -> list[str]:
    return list(open_result(view.path).group_keys())


def _result_bytes(stages: dict[str, Any]) -> int:
    record = stages.get("compress") or {}
    key = "bytes_read" if record.get("status") in ("computed", "appended") else "bytes_read_before"
    return int(record.get(key, 0) or 0)


def _provenance(view: StoreView) -> list[tuple[str, str]]:
    a = view.attrs
    stages = a.get("stages") or {}
    rows = [
        ("result store", str(view.path.resolve())),
        ("archive", f"{a.get('archive', '-')} ({a.get('archive_format', '?')}; {a.get('archive_state', '?')})"),
        ("compress", f"{a.get('compress_method', '?')}, {a.get('passes', '?')} pass(es) over the archive"),
        ("fit", f"{a.get('fit_method', '?')}; {view.spectrum.sizes['mode']} modes, "
                f"{int(view.trusted.sum())} trusted"),
        ("time step", f"dt = {view.dt:.6g}" + (f" {view.time_unit}" if view.time_unit else "")),
        ("bytes read", f"{int(a.get('bytes_read', 0)) / 1e6:.1f} MB in the last run; the compress result read "
                       f"{_result_bytes(stages) / 1e6:.1f} MB when it was computed"),
        ("stages", ", ".join(f"{name} {record.get('status', '?')}" for name, record in stages.items()) or "-"),
        ("started / finished", f"{a.get('started', '?')} / {a.get('finished', '?')}"),
        ("host", str(a.get("host", "-"))),
        ("versions", ", ".join(f"{k} {v}" for k, v in (a.get("versions") or {}).items()) or "-"),
        ("workflow fingerprint", str(a.get("workflow_fingerprint", "-"))),
    ]
    return rows


STYLE = f"""
body {{ font-family: 'DejaVu Sans', 'Segoe UI', Helvetica, Arial, sans-serif; color: #1a1a1a;
       max-width: 1180px; margin: 0 auto; padding: 0 1.2em 3em; background: #fbfaf7; line-height: 1.45; }}
header {{ border-bottom: 4px solid {PALETTE['trusted']}; padding: 1.1em 0 0.6em; margin-bottom: 1em; }}
header h1 {{ margin: 0; font-size: 1.55em; }}
header p {{ margin: 0.25em 0 0; color: #4d4d4d; }}
h2 {{ font-size: 1.2em; margin-top: 1.8em; border-left: 6px solid {PALETTE['untrusted']}; padding-left: 0.5em; }}
.caution {{ background: #fff4e5; border: 2px solid {PALETTE['untrusted']}; padding: 0.8em 1em; border-radius: 4px; }}
figure {{ margin: 0.6em 0 1.4em; background: white; border: 1px solid #e3e1da; padding: 0.5em; }}
figure img {{ max-width: 100%; height: auto; display: block; }}
figcaption {{ font-size: 0.9em; color: #4d4d4d; margin-top: 0.3em; }}
table {{ border-collapse: collapse; font-size: 0.9em; background: white; }}
td, th {{ border: 1px solid #e3e1da; padding: 0.3em 0.6em; text-align: left; vertical-align: top; }}
th {{ background: #eef3f8; }}
td.num {{ text-align: right; font-variant-numeric: tabular-nums; }}
pre {{ background: white; border: 1px solid #e3e1da; padding: 0.7em; overflow-x: auto; font-size: 0.85em; }}
.warn {{ color: #8a3b0c; }}
td.trusted {{ color: {PALETTE['trusted']}; font-weight: bold; }}
td.untrusted {{ color: #9a5410; }}
footer {{ margin-top: 2em; font-size: 0.85em; color: #4d4d4d; }}
"""

# counts decoded images (naturalWidth > 0) into the page, so a headless browser can tell
CHECK_SCRIPT = """
<script>
function snapliftCountImages() {
  var images = document.getElementsByTagName('img');
  var decoded = 0;
  for (var i = 0; i < images.length; i++) { if (images[i].complete && images[i].naturalWidth > 0) decoded++; }
  document.getElementById('image-check').textContent = 'images decoded: ' + decoded + ' of ' + images.length;
}
window.addEventListener('load', snapliftCountImages);
</script>
"""


def _spectrum_rows(view: StoreView, limit: int = 16) -> str:
    s = view.spectrum
    n = s.sizes["mode"]
    ranking = np.asarray(s["ranking"].values) if "ranking" in s else np.arange(n)
    order = np.argsort(ranking, kind="stable")[:limit]
    residual = np.asarray(s["residual"].values) if "residual" in s else np.full(n, np.nan)
    rows = []
    for k in order:
        eig = complex(s["eigenvalue"].values[k])
        trusted = bool(view.trusted[k])
        rows.append(
            f"<tr><td class='num'>{k}</td><td class='num'>{abs(eig):.6f}</td>"
            f"<td class='num'>{float(s['frequency'].values[k]):.5g}</td>"
            f"<td class='num'>{float(s['growth'].values[k]):.4g}</td>"
            f"<td class='num'>{float(s['amplitude'].values[k]):.4g}</td><td class='num'>{residual[k]:.2g}</td>"
            f"<td class='{'trusted' if trusted else 'untrusted'}'>"
            f"{'&#9679; trusted' if trusted else '&#9650; untrusted'}</td></tr>")
    head = (f"<tr><th>mode</th><th>|eigenvalue|</th><th>frequency [{html.escape(view.frequency_unit)}]</th>"
            f"<th>growth [{html.escape(view.growth_unit)}]</th><th>amplitude</th><th>residual</th><th>trust</th></tr>")
    return f"<table>{head}{''.join(rows)}</table>"


def _page(view: StoreView, figures: list[tuple[str, str, bytes]], seconds: float, read: int) -> str:
    parts = [f"<!DOCTYPE html><html lang='en'><head><meta charset='utf-8'><title>snaplift report: "
             f"{html.escape(view.path.name)}</title><style>{STYLE}</style></head><body>",
             f"<header><h1>Modes and spectrum of {html.escape(view.path.name)}</h1>"
             f"<p>{html.escape(str(view.attrs.get('archive', '')))} &middot; "
             f"{view.spectrum.sizes['mode']} modes &middot; "
             f"fields {', '.join(html.escape(f) for f in view.fields)}</p></header>",
             f"<p class='caution'><strong>Caution.</strong> {html.escape(REPORT_CAUTION)}</p>",
             "<h2>Leading modes (trusted first, then by amplitude)</h2>", _spectrum_rows(view)]
    for name, caption, data in figures:
        if name.startswith("modes_") and not any(n.startswith("modes_") for n, _, _ in figures[:figures.index(
                (name, caption, data))]):
            parts.append("<h2>Mode shapes</h2>")
        encoded = base64.b64encode(data).decode("ascii")
        parts.append(f"<figure id='{html.escape(name)}'><img alt='{html.escape(caption)}' "
                     f"src='data:image/png;base64,{encoded}'><figcaption>{html.escape(caption)} "
                     f"(<a href='{html.escape(name)}.png'>{html.escape(name)}.png</a>)</figcaption></figure>")
    parts.append("<h2>Provenance</h2><table>")
    for key, value in _provenance(view):
        parts.append(f"<tr><th>{html.escape(key)}</th><td>{html.escape(value)}</td></tr>")
    parts.append("</table>")
    warnings = [str(w) for w in view.attrs.get("warnings") or []]
    parts.append(f"<h2>Warnings ({len(warnings)})</h2>")
    parts.append("<ul>" + "".join(f"<li class='warn'>{html.escape(w)}</li>" for w in warnings) + "</ul>"
                 if warnings else "<p>none</p>")
    parts.append(f"<h2>Workflow</h2><pre>{html.escape(str(view.attrs.get('workflow', '')))}</pre>")
    version = html.escape(str((view.attrs.get("versions") or {}).get("snaplift", "")))
    parts.append(f"<footer>Written by snaplift {version}"
                 f" in {seconds:.1f} s ({read} values read from the archive at the probe points). "
                 f"<span id='image-check'>images not checked (scripts off)</span></footer>")
    parts.append(CHECK_SCRIPT + "</body></html>")
    return "\n".join(parts)


@dataclass(frozen=True)
class FigureJob:
    """One figure of the page: ``draw()`` returns the figure (or None) and its caption.

    ``weight`` is its rough drawing cost (seconds on a small store, relative counts), by
    which :func:`render_report`'s ``split`` may share the figures between processes;
    ``reads`` marks a job that reads the store or the archive again (the forecast panel):
    it stays in the process that opened them.
    """

    name: str
    draw: Callable[[], tuple[Any, str]]
    weight: float = 1.0
    reads: bool = False


Rendered = tuple[str, str, bytes]  # name, caption, PNG
Split = Callable[[list[FigureJob]], list[Rendered | None]]


def draw_job(job: FigureJob) -> Rendered | None:
    """The job's PNG (None when it has no figure)."""
    figure, caption = job.draw()
    return None if figure is None else (job.name, caption, _png(figure))


def _serial(jobs: list[FigureJob]) -> list[Rendered | None]:
    return [draw_job(job) for job in jobs]


def figure_jobs(view: StoreView, leading: int = LEADING_MODES) -> tuple[list[FigureJob], dict[str, int]]:
    """The page's figures in page order, and a mapping that holds, once the forecast job has
    run, the count of archive values it read (``"read"``)."""
    fields = view.fields
    read = {"read": 0}
    jobs = [
        FigureJob("energy", lambda: (energy_figure(view), "Energy captured by the basis: dashed line the compress "
                                     "rank, dash-dot the fit rank.")),
        FigureJob("eigenvalues", lambda: (eigenvalue_figure(view), "Eigenvalues with the unit circle; discs trusted, "
                                          "triangles untrusted (held-out residual above the threshold); area by "
                                          "amplitude.")),
        FigureJob("spectrum", lambda: (spectrum_figure(view, fields[:6]), "Growth rate and peak amplitude per field "
                                       "(field units) against frequency."), 1.0 + 0.5 * len(fields[:6])),
    ]
    chosen = leading_modes(view, leading)
    points = [f for f in fields if int(np.prod(view.modes[f].shape[1:])) == 1]

    def modes(field: str) -> Callable[[], tuple[Any, str]]:
        return lambda: (mode_figure(view, field, chosen), f"Leading modes of {field}: real part and magnitude of "
                                                          "amplitude x mode in field units.")

    for field in fields:
        if field not in points:
            cells = int(np.prod(view.modes[field].shape[1:]))
            jobs.append(FigureJob(f"modes_{field}", modes(field), 2.0 * len(chosen) + cells / 2e5))
    if points:
        jobs.append(FigureJob("modes_points", lambda: (point_figure(view, points, chosen), "Leading modes of the "
                              "one-point fields: real part and magnitude of amplitude x mode.")))
    jobs.append(FigureJob("errors", lambda: (error_figure(view), "Relative error per snapshot: projection on the "
                                             "basis and reconstruction by the model."), 0.7))

    def forecast() -> tuple[Any, str]:
        probes, note, read["read"] = _probes(view, fields[:6])
        if not probes:
            return None, ""
        return (probe_figure(probes, view.time_unit, note),
                "Forecast from the first snapshot against the archive and the projection on the basis at the point "
                "of largest variance of each field." + (f" Note: {note}." if note else ""))

    jobs.append(FigureJob("forecast", forecast, 1.5, reads=True))
    return jobs, read


def render_report(store: str | Path, out: str | Path | None = None, *, leading: int = LEADING_MODES,
                  split: Split | None = None) -> ReportSummary:
    """Render the report of a complete result store to ``out`` (default ``RESULT.report/``).

    ``split`` draws the figure jobs (default one after the other, here); the report
    helper of ``snaplift run`` shares them between two processes
    (:mod:`snaplift.report.helper`).

    Example
    -------
    >>> summary = render_report("results/fin-duct.zarr")  # doctest: +SKIP
    >>> summary.index                                      # doctest: +SKIP
    PosixPath('results/fin-duct.zarr.report/index.html')
    """
    started = _time.perf_counter()
    view = open_store(store, light=True)
    folder = Path(out) if out is not None else report_folder(store)
    if folder.exists() and not (folder / MARKER).exists():
        raise ResultStoreError(f"{folder} exists and is not a snaplift report; remove it or choose another folder")
    jobs, read_count = figure_jobs(view, leading)
    figures = [rendered for rendered in (split or _serial)(jobs) if rendered is not None]
    read = read_count["read"]
    seconds = _time.perf_counter() - started
    staging = folder.with_name(f"{folder.name}.staging-{uuid.uuid4().hex[:8]}")
    staging.mkdir(parents=True)
    try:
        for name, _, data in figures:
            (staging / f"{name}.png").write_bytes(data)
        (staging / "index.html").write_text(_page(view, figures, seconds, read), encoding="utf-8")
        (staging / MARKER).write_text(json.dumps({"store": str(Path(store).resolve()),
                                                  "figures": [n for n, _, _ in figures]}))
        if folder.exists():
            shutil.rmtree(folder)
        os.replace(staging, folder)
    finally:
        shutil.rmtree(staging, ignore_errors=True)
    return ReportSummary(folder, folder / "index.html", tuple(n for n, _, _ in figures), seconds, read)
