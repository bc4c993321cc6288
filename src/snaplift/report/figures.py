"""The figures of a report, drawn with matplotlib's Agg canvas from a store read through xarray.

Our own look: a blue / amber palette that stays apart for the common colour-vision
deficiencies (blue against orange is the pair that red-green deficiencies keep; every
distinction also has a second cue, marker shape or line style), a blue-white-burnt-orange
diverging map for real parts (zero is white) and a white-to-ink-blue sequential map for
magnitudes. Trusted eigenvalues are filled blue discs, untrusted ones amber triangles.
"""

from __future__ import annotations

import textwrap
from collections.abc import Callable
from dataclasses import dataclass
from typing import Any, Literal

import numpy as np
from matplotlib.backends.backend_agg import FigureCanvasAgg
from matplotlib.colors import LinearSegmentedColormap
from matplotlib.figure import Figure
from matplotlib.ticker import MaxNLocator

from snaplift.results.reading import Axis, StoreView, field_axes, label

__all__ = ["PALETTE", "Probe", "energy_figure", "eigenvalue_figure", "spectrum_figure", "mode_figure",
           "error_figure", "probe_figure", "point_figure"]

PALETTE = {
    "trusted": "#1c5d99",    # ink blue
    "untrusted": "#d9822b",  # amber
    "archive": "#4d4d4d",    # slate
    "model": "#1c5d99",
    "projection": "#d9822b",
    "grid": "#e3e1da",
    "lines": ("#1c5d99", "#d9822b", "#a24d8f", "#4d4d4d", "#6fb3e0", "#8c6d1f"),
}
_DIVERGING = LinearSegmentedColormap.from_list("snaplift_diverging", ["#0b2f57", "#1c5d99", "#9cc3e4", "#f7f6f1",
                                                                     "#f2c48f", "#d9822b", "#8a3b0c"])
_SEQUENTIAL = LinearSegmentedColormap.from_list("snaplift_sequential", ["#f7f6f1", "#bcd7ec", "#6fa3cf",
                                                                       "#1c5d99", "#0b2740"])
# masked points blank
DIVERGING = _DIVERGING.with_extremes(bad=(1.0, 1.0, 1.0, 0.0))
SEQUENTIAL = _SEQUENTIAL.with_extremes(bad=(1.0, 1.0, 1.0, 0.0))


def _figure(width: float, height: float, layout: Literal["constrained"] | None = "constrained") -> Figure:
    # the Agg canvas of each figure itself: no pyplot, no global backend switched under the caller
    figure = Figure(figsize=(width, height), dpi=100, layout=layout)
    FigureCanvasAgg(figure)
    figure.patch.set_facecolor("white")
    return figure


def _fixed(width: float, height: float, rows: int, columns: int, *, left: float = 0.85, right: float = 0.25,
           top: float = 0.4, bottom: float = 0.55, wgap: float = 0.95, hgap: float = 0.4,
           **kwargs) -> tuple[Figure, Any]:
    """A figure of ``rows`` x ``columns`` axes at fixed margins in inches (labels, titles): no
    layout engine, which would draw the figure once more only to measure its labels."""
    figure = _figure(width, height, layout=None)
    axes = figure.subplots(rows, columns, squeeze=False, **kwargs)
    panel_width = (width - left - right - (columns - 1) * wgap) / columns
    panel_height = (height - top - bottom - (rows - 1) * hgap) / rows
    figure.subplots_adjust(left=left / width, right=1 - right / width, bottom=bottom / height, top=1 - top / height,
                           wspace=wgap / panel_width, hspace=hgap / panel_height)
    return figure, axes


def _style(ax) -> None:
    ax.grid(True, color=PALETTE["grid"], linewidth=0.8)
    ax.set_axisbelow(True)
    for side in ("top", "right"):
        ax.spines[side].set_visible(False)


def energy_figure(view: StoreView) -> Figure | None:
    """Cumulative energy of the singular values, compress rank and fit rank marked."""
    if view.basis is None or "singular_value" not in view.basis:
        return None
    s = np.asarray(view.basis["singular_value"].values, dtype=np.float64)
    energy = s**2
    total = energy.sum()
    if "column_norm" in view.diagnostics:  # the energy of the prepared data, basis or not
        total = max(total, float(np.sum(np.asarray(view.diagnostics["column_norm"].values) ** 2)))
    cumulative = np.cumsum(energy) / total if total > 0 else np.zeros_like(energy)
    index = np.arange(1, s.size + 1)
    figure, grid = _fixed(10, 3.6, 1, 2)
    left, right = grid[0]
    left.plot(index, cumulative, color=PALETTE["model"], marker="o", markersize=3.5, linewidth=1.6)
    left.set_ylim(min(0.0, float(cumulative.min())), 1.02)
    left.axhline(1.0, color=PALETTE["archive"], linewidth=0.8, linestyle=":")
    left.set_xlabel("number of basis vectors")
    left.set_ylabel("fraction of the energy captured")
    left.set_title("energy captured by the basis", loc="left", fontsize=11)
    positive = s[s > 0]
    if positive.size and positive.max() < 10 * positive.min():  # within a decade: a log axis labels only minor ticks
        right.plot(index, np.where(s > 0, s, np.nan), color=PALETTE["model"], marker="o", markersize=3.5, linewidth=1.2)
        right.ticklabel_format(axis="y", useOffset=False, style="plain")
    else:
        right.semilogy(index, np.where(s > 0, s, np.nan), color=PALETTE["model"], marker="o", markersize=3.5,
                       linewidth=1.2)
    right.set_xlabel("index")
    right.set_ylabel("singular value")
    right.set_title("singular values", loc="left", fontsize=11)
    fit_rank = _fit_rank(view, s.size)
    for ax in (left, right):
        _style(ax)
        ax.xaxis.set_major_locator(MaxNLocator(integer=True))  # counts of basis vectors
        ax.axvline(s.size, color=PALETTE["archive"], linestyle="--", linewidth=1.0)
        if fit_rank is not None and fit_rank < s.size:
            ax.axvline(fit_rank, color=PALETTE["untrusted"], linestyle="-.", linewidth=1.4)
    left.annotate(f"compress rank {s.size}: {cumulative[-1]:.4f}", xy=(s.size, cumulative[-1]),
                  xytext=(-8, -16), textcoords="offset points", ha="right", fontsize=9)
    if fit_rank is not None and fit_rank < s.size:
        left.annotate(f"fit rank {fit_rank}: {cumulative[fit_rank - 1]:.4f}", xy=(fit_rank, cumulative[fit_rank - 1]),
                      xytext=(8, -28), textcoords="offset points", fontsize=9, color=PALETTE["untrusted"])
    return figure


def _fit_rank(view: StoreView, compress_rank: int) -> int | None:
    if view.operator is None or "matrix" not in view.operator:
        return None
    if str(view.operator.attrs.get("space", "coefficients")) != "coefficients":
        return None
    if str(view.operator.attrs.get("method", "dmd")) == "edmd":
        return None
    return int(min(view.operator["matrix"].shape[0], compress_rank))


def _scatter_trust(ax, x: np.ndarray, y: np.ndarray, trusted: np.ndarray, sizes: np.ndarray | float,
                   count: bool = True) -> None:
    sizes = np.broadcast_to(np.asarray(sizes, dtype=np.float64), x.shape)
    for flag, name, marker in ((True, "trusted", "o"), (False, "untrusted", "^")):
        chosen = trusted == flag
        if not chosen.any():
            continue
        ax.scatter(x[chosen], y[chosen], s=sizes[chosen], marker=marker, color=PALETTE[name],
                   edgecolors="#1a1a1a", linewidths=0.6, alpha=0.85,
                   label=f"{name} ({int(chosen.sum())})" if count else name,
                   zorder=3)


def _marker_sizes(amplitude: np.ndarray) -> np.ndarray:
    amplitude = np.abs(np.asarray(amplitude, dtype=np.float64))
    top = amplitude.max() if amplitude.size and amplitude.max() > 0 else 1.0
    return 18.0 + 260.0 * np.sqrt(amplitude / top)


def eigenvalue_figure(view: StoreView) -> Figure:
    """Eigenvalues in the complex plane with the unit circle; size by amplitude."""
    eigenvalue = np.asarray(view.spectrum["eigenvalue"].values, dtype=np.complex128)
    trusted = view.trusted
    figure, grid = _fixed(10, 5.0, 1, 2, bottom=0.7)
    plane, zoom = grid[0]
    angle = np.linspace(0, 2 * np.pi, 400)
    for ax in (plane, zoom):
        ax.plot(np.cos(angle), np.sin(angle), color=PALETTE["archive"], linewidth=1.0, linestyle="--")
        _scatter_trust(ax, eigenvalue.real, eigenvalue.imag, trusted,
                       _marker_sizes(view.spectrum["amplitude"].values))
        ax.set_xlabel("real part")
        ax.set_ylabel("imaginary part")
        ax.set_aspect("equal", adjustable="box")
        _style(ax)
    plane.set_title("eigenvalues (dashed: unit circle)", loc="left", fontsize=11)
    reach = max(1.05, float(np.max(np.abs(eigenvalue))) * 1.05) if eigenvalue.size else 1.05
    plane.set_xlim(-reach, reach)
    plane.set_ylim(-reach, reach)
    plane.legend(loc="lower left", fontsize=9, title="residual test", title_fontsize=9, framealpha=0.9)
    # the unit circle near 1, where slow, lightly damped modes sit
    near = eigenvalue[np.abs(eigenvalue - 1) < 0.5] if eigenvalue.size else eigenvalue
    spread = max(0.02, float(np.max(np.abs(near - 1))) * 1.2) if near.size else 0.1
    zoom.set_xlim(1 - spread, 1 + spread * 0.6)
    zoom.set_ylim(-spread, spread)
    zoom.set_title("near 1 (slow modes)", loc="left", fontsize=11)
    figure.text(0.01, 0.005, "marker area grows with the mode amplitude", fontsize=8, color=PALETTE["archive"])
    return figure


def spectrum_figure(view: StoreView, fields: list[str]) -> Figure:
    """Growth rate against frequency, then peak amplitude (field units) against frequency per field."""
    frequency = np.asarray(view.spectrum["frequency"].values, dtype=np.float64)
    growth = np.asarray(view.spectrum["growth"].values, dtype=np.float64)
    trusted = view.trusted
    # conjugate partners of real data mirror the positive frequencies; complex data have none
    shown = np.ones(frequency.size, dtype=bool) if view.complex_data else frequency >= 0
    which = "all frequencies (complex data)" if view.complex_data else "frequency >= 0; conjugates mirror"
    figure, grid = _fixed(10, 2.4 * (1 + len(fields)) + 0.4, 1 + len(fields), 1, hgap=0.25, sharex=True)
    axes = grid[:, 0]
    top = axes[0]
    _scatter_trust(top, frequency[shown], growth[shown], trusted[shown],
                   _marker_sizes(np.asarray(view.spectrum["amplitude"].values)[shown]), count=False)
    top.axhline(0.0, color=PALETTE["archive"], linewidth=0.9)
    top.set_ylabel(label("growth rate", view.growth_unit))
    top.set_title(f"growth rate and peak amplitude against frequency ({which})",
                  loc="left", fontsize=11)
    top.legend(loc="best", fontsize=8, framealpha=0.9)
    _style(top)
    for ax, name in zip(axes[1:], fields):
        peak = view.peak_amplitude(name)
        top_peak = float(np.max(peak[shown])) if shown.any() and np.max(peak[shown]) > 0 else 1.0
        floor = top_peak * 1e-4  # four decades: the weak modes stay visible beside a steady one
        peak = np.maximum(peak, floor)
        for flag, key, marker in ((True, "trusted", "o"), (False, "untrusted", "^")):
            chosen = shown & (trusted == flag)
            if chosen.any():
                ax.vlines(frequency[chosen], floor, peak[chosen], color=PALETTE[key], linewidth=1.4,
                          linestyle="-" if flag else ":")
                ax.scatter(frequency[chosen], peak[chosen], marker=marker, color=PALETTE[key], s=34,
                           edgecolors="#1a1a1a", linewidths=0.5, zorder=3)
        # the short name on the axis (a long one runs into the next panel), the long one inside
        ax.set_ylabel(label(f"peak {name}", view.field_units(name)), fontsize=9)
        ax.text(0.005, 0.97, view.field_name(name), transform=ax.transAxes, fontsize=8, va="top",
                color="#444444")
        ax.set_yscale("log")
        ax.set_ylim(floor, top_peak * 2)
        _style(ax)
    axes[-1].set_xlabel(label("frequency", view.frequency_unit))
    return figure


def _panel(ax, figure: Figure, values: np.ndarray, axes: list[Axis], *, diverging: bool, units: str,
           title: str, bar_ax=None) -> None:
    """One panel: a line (1-D) or an image with its colour bar (2-D; in ``bar_ax`` when given,
    else beside ``ax``)."""
    finite = values[np.isfinite(values)]
    if diverging:
        reach = float(np.max(np.abs(finite))) if finite.size else 1.0
        top = reach or 1.0
        limits = {"vmin": -top, "vmax": top, "cmap": DIVERGING}
    else:
        top = float(finite.max()) if finite.size and finite.max() > 0 else 1.0
        limits = {"vmin": 0.0, "vmax": top, "cmap": SEQUENTIAL}
    ax.set_title(title, loc="left", fontsize=9)
    if len(axes) == 1:
        # magnitude in a third colour: amber means "untrusted" everywhere else on the page
        ax.plot(axes[0].values, values, color=PALETTE["model"] if diverging else PALETTE["lines"][2],
                marker="o" if values.size < 40 else None, markersize=3, linewidth=1.4)
        ax.set_xlabel(axes[0].title, fontsize=8)
        ax.set_ylabel(label("value", units), fontsize=8)
        ax.ticklabel_format(axis="y", useOffset=False)
        if not diverging:  # a magnitude: from zero, so a flat one reads as flat
            ax.set_ylim(0.0, top * 1.1)
        elif finite.size and np.ptp(finite) <= 1e-6 * max(float(np.max(np.abs(finite))), 1e-300):
            # a flat line (a mean mode): round-off would otherwise fill the axis with 300.0000000002
            centre = float(np.mean(finite))
            pad = 0.1 * abs(centre) or 1.0
            ax.set_ylim(centre - pad, centre + pad)
        _style(ax)
        return
    rows, columns = axes  # values is (rows, columns)
    if _uniform(rows.values) and _uniform(columns.values):  # an image: much faster to draw
        extent = _extent(rows.values, columns.values)
        mesh = ax.imshow(np.ma.masked_invalid(_fit_pixels(values, ax, figure)), origin="lower", extent=extent,
                         interpolation="nearest", aspect="auto", **limits)
    else:
        mesh = ax.pcolormesh(columns.values, rows.values, np.ma.masked_invalid(values), shading="nearest",
                             rasterized=True, **limits)
    if bar_ax is None:  # placed by hand (mode figures) already at the grid's aspect
        ax.set_aspect("equal" if rows.units == columns.units else "auto")
    ax.set_xlabel(columns.title, fontsize=8)
    # a long name wraps: on a flat image it would run into the panels above and below
    ax.set_ylabel(textwrap.fill(rows.title, 18), fontsize=8)
    ax.tick_params(labelsize=7)
    bar = figure.colorbar(mesh, cax=bar_ax) if bar_ax is not None else figure.colorbar(mesh, ax=ax, shrink=0.9,
                                                                                       pad=0.01)
    bar.ax.tick_params(labelsize=7)
    bar.set_label(units or "field units", fontsize=8)


def _extent(rows: np.ndarray, columns: np.ndarray) -> tuple[float, float, float, float]:
    """Image extent of a uniform grid: each value fills its own cell (half a step beyond the ends)."""
    half_x = 0.5 * (columns[1] - columns[0]) if columns.size > 1 else 0.5
    half_y = 0.5 * (rows[1] - rows[0]) if rows.size > 1 else 0.5
    return (float(columns[0] - half_x), float(columns[-1] + half_x), float(rows[0] - half_y), float(rows[-1] + half_y))


def _fit_pixels(values: np.ndarray, ax, figure: Figure) -> np.ndarray:
    """Every ``n``-th value of an image with more values than the panel has pixels (twice over
    per axis, so a cell is never narrower than half a pixel): what nearest-neighbour drawing
    shows anyway, without resampling the whole grid at every draw."""
    width, height = ax.get_position().width, ax.get_position().height
    dpi = figure.dpi
    pixels = (height * figure.get_figheight() * dpi, width * figure.get_figwidth() * dpi)
    steps = [int(np.ceil(size / max(2.0 * p, 1.0))) if size > 2.0 * p else 1 for size, p in zip(values.shape, pixels)]
    if steps == [1, 1]:
        return values
    return values[::steps[0], ::steps[1]]


def _uniform(values: np.ndarray) -> bool:
    if values.size < 3:
        return True
    steps = np.diff(values)
    return bool(np.all(np.abs(steps - steps[0]) <= 1e-9 * max(abs(steps[0]), 1e-300)))


def _planes(values: np.ndarray, axes: list[Axis]) -> list[tuple[str, np.ndarray, list[Axis]]]:
    """2-D slices to draw: the grid itself (2-D), or the three mid-planes (3-D)."""
    if len(axes) <= 2:
        return [("", values, axes)]
    a, b, c = axes
    i, j, k = (s // 2 for s in values.shape)
    return [(f"{a.dim} = {a.values[i]:.4g}", values[i], [b, c]),
            (f"{b.dim} = {b.values[j]:.4g}", values[:, j, :], [a, c]),
            (f"{c.dim} = {c.values[k]:.4g}", values[:, :, k], [a, b])]


# the mode figure's layout, in inches (placed by hand: a layout engine would draw every
# figure once more just to measure its labels, most of the report's time on large grids)
_LEFT = 0.95     # tick labels and a y label wrapped to three lines
_BAR_GAP, _BAR, _BAR_LABELS = 0.1, 0.14, 0.8   # colour bar: gap, bar, its tick labels and units
_BAR_MIN = 1.0   # shortest colour bar (where the panel has room for it)
_LINE_RIGHT = 0.25
_BAND_TITLE, _PANEL_TITLE, _BOTTOM = 0.34, 0.26, 0.46
_FIGURE_TITLE = 0.4


def _panel_boxes(width: float, columns: int, image: bool) -> list[tuple[float, float]]:
    """(left, width) of the axes box in each column of a band, in inches."""
    cell = width / columns
    used = _LEFT + (_BAR_GAP + _BAR + _BAR_LABELS if image else _LINE_RIGHT)
    return [(c * cell + _LEFT, max(cell - used, 0.5)) for c in range(columns)]


def _axes_at(figure: Figure, left: float, bottom: float, width: float, height: float):
    w, h = figure.get_figwidth(), figure.get_figheight()
    return figure.add_axes((left / w, bottom / h, width / w, height / h))


def _aspect_box(width: float, height: float, plane_axes: list[Axis]) -> tuple[float, float]:
    """The largest box of the grid's own aspect (equal scales when both axes share units) in
    ``width`` x ``height`` inches; the whole box when the units differ."""
    if len(plane_axes) != 2 or plane_axes[0].units != plane_axes[1].units:
        return width, height
    x0, x1, y0, y1 = _extent(plane_axes[0].values, plane_axes[1].values)
    ratio = abs(y1 - y0) / max(abs(x1 - x0), 1e-300)
    if ratio * width <= height:
        return width, ratio * width
    return height / max(ratio, 1e-300), height


def mode_figure(view: StoreView, field: str, modes: list[int]) -> Figure:
    """Real part and magnitude of ``b_k mode_k`` (complex amplitude x mode, field units) of the given
    modes: the real part is the mode's share of the first fitted snapshot (twice it for a pair).

    One band per mode: 1-D and 2-D fields get the real part beside the magnitude; 3-D
    fields the three mid-planes in a row, real parts above magnitudes.
    """
    axes = field_axes(view.modes, field)
    if len(axes) > 3:
        raise NotImplementedError(f"modes of field '{field}' have {len(axes)} grid dimensions; the report draws 1-3")
    units = view.field_units(field)
    amplitude = view.complex_amplitude
    frequency = np.asarray(view.spectrum["frequency"].values, dtype=np.float64)
    growth = np.asarray(view.spectrum["growth"].values, dtype=np.float64)
    trusted = view.trusted
    three = len(axes) == 3
    height = 2.6
    if len(axes) == 2:
        ratio = np.ptp(axes[0].values) / max(np.ptp(axes[1].values), 1e-300)
        height = float(np.clip(5.0 * ratio + 1.0, 1.8, 4.2))
    elif three:
        height = 4.2
    width = 15.0 if three else 12.0
    figure = _figure(width, height * len(modes) + 0.5, layout=None)
    shape = (2, 3) if three else (1, 2)
    image = len(axes) >= 2
    boxes = _panel_boxes(width, shape[1], image)
    row_height = (height - _BAND_TITLE) / shape[0]
    data = view.modes[field]
    figure_height = figure.get_figheight()
    for n, k in enumerate(modes):
        values = np.asarray(data.isel(mode=k).values) * amplitude[k]
        state = "trusted" if trusted[k] else "untrusted"
        band_top = figure_height - _FIGURE_TITLE - n * height
        figure.text(0.01, (band_top - 0.06) / figure_height,
                    f"mode {k}  |  frequency {frequency[k]:.4g} {view.frequency_unit}  |  growth "
                    f"{growth[k]:.3g} {view.growth_unit}  |  {state}", ha="left", va="top", fontsize=10,
                    color=PALETTE[state])
        views: tuple[tuple[str, Callable[[np.ndarray], np.ndarray], bool], ...] = (
            ("real part", np.real, True), ("magnitude", np.abs, False))
        for part, (part_name, transform, diverging) in enumerate(views):
            for p, (where, plane, plane_axes) in enumerate(_planes(transform(values), axes)):
                row, column = (part, p) if three else (0, part)
                left, box_width = boxes[column]
                cell_top = band_top - _BAND_TITLE - row * row_height
                box_height = max(row_height - _PANEL_TITLE - _BOTTOM, 0.4)
                w, h = _aspect_box(box_width, box_height, plane_axes) if image else (box_width, box_height)
                bottom = cell_top - _PANEL_TITLE - h
                ax = _axes_at(figure, left, bottom, w, h)
                # a thin image keeps a colour bar long enough for its tick labels, centred beside it
                bar_height = max(h, min(box_height, _BAR_MIN))
                bar = _axes_at(figure, left + w + _BAR_GAP, bottom + 0.5 * (h - bar_height), _BAR,
                               bar_height) if image else None
                _panel(ax, figure, plane, plane_axes, diverging=diverging, units=units,
                       title=part_name + (f", {where}" if where else ""), bar_ax=bar)
    figure.text(0.01, 1 - 0.1 / figure_height, f"leading modes of {view.field_name(field)} (amplitude x mode, "
                f"{units or 'field units'}; blank: masked points)", ha="left", va="top", fontsize=11)
    return figure


def point_figure(view: StoreView, fields: list[str], modes: list[int]) -> Figure:
    """Fields of one grid point (a small state): amplitude x mode of the leading modes as bars."""
    amplitude = view.complex_amplitude
    frequency = np.asarray(view.spectrum["frequency"].values, dtype=np.float64)
    # fixed margins (three-line tick labels below, the figure title above): no layout engine
    figure, grid = _fixed(10, 3.8, 1, 2, left=0.75, right=0.05, top=0.6, bottom=0.62, wgap=0.7)
    real_ax, magnitude_ax = grid[0]
    width = 0.8 / max(1, len(fields))
    positions = np.arange(len(modes))
    for i, field in enumerate(fields):
        values = np.array([amplitude[k] * complex(np.asarray(view.modes[field].isel(mode=k).values).ravel()[0])
                           for k in modes])
        colour = PALETTE["lines"][i % len(PALETTE["lines"])]
        hatch = ("", "//", "..", "xx", "\\\\", "--")[i % 6]  # a second cue beside the colour
        for ax, part in ((real_ax, values.real), (magnitude_ax, np.abs(values))):
            ax.bar(positions + (i - (len(fields) - 1) / 2) * width, part, width, color=colour, hatch=hatch,
                   edgecolor="#1a1a1a", linewidth=0.5, label=label(field, view.field_units(field)))
    growth = np.asarray(view.spectrum["growth"].values, dtype=np.float64)
    ticks = [f"mode {k}\nf {frequency[k]:.3g}\ngrowth {growth[k]:.2g}" for k in modes]
    for ax, title in ((real_ax, "real part"), (magnitude_ax, "magnitude")):
        ax.set_xticks(positions, ticks, fontsize=8)
        ax.axhline(0.0, color=PALETTE["archive"], linewidth=0.8)
        ax.set_title(title, loc="left", fontsize=10)
        _style(ax)
    real_ax.legend(fontsize=8, framealpha=0.9)
    figure.suptitle(f"leading modes of the one-point fields (amplitude x mode, field units; f in "
                    f"{view.frequency_unit}, growth in {view.growth_unit})", x=0.01, y=0.985, ha="left", va="top",
                    fontsize=11)
    return figure


def error_figure(view: StoreView) -> Figure:
    """Projection error (what the basis misses) and reconstruction error (the model) over time."""
    time = view.time
    figure, grid = _fixed(10, 3.4, 1, 1)
    ax = grid[0, 0]
    for name, colour, style, text in (("projection_error", PALETTE["projection"], "--", "projection on the basis"),
                                      ("reconstruction_error", PALETTE["model"], "-", "model reconstruction")):
        if name in view.diagnostics:
            values = np.asarray(view.diagnostics[name].values, dtype=np.float64)
            kind = view.diagnostics[name].attrs.get("kind")
            ax.semilogy(time, np.where(values > 0, values, np.nan), color=colour, linestyle=style, linewidth=1.6,
                        label=text + (" (estimate)" if kind == "estimate" else ""))
    ax.set_xlabel(label("time", view.time_unit))
    ax.set_ylabel("relative error (physical norm)")
    ax.set_title("error per snapshot", loc="left", fontsize=11)
    ax.legend(fontsize=9, framealpha=0.9)
    _style(ax)
    return figure


@dataclass(frozen=True)
class Probe:
    """One probe point: the model, the projection on the basis and (if read) the archive there."""

    field: str
    where: str
    time: np.ndarray
    model: np.ndarray
    projection_time: np.ndarray
    projection: np.ndarray
    archive_time: np.ndarray | None
    archive: np.ndarray | None
    units: str


def probe_figure(probes: list[Probe], time_unit: str, note: str) -> Figure:
    """Forecast against the archive at the probe points (points of largest variance)."""
    figure, grid = _fixed(10, 2.3 * len(probes) + 0.6, len(probes), 1, top=0.75, hgap=0.4, sharex=True)
    axes = grid[:, 0]
    for ax, probe in zip(axes, probes):
        if probe.archive is not None and probe.archive_time is not None:
            ax.plot(probe.archive_time, probe.archive, linestyle="none", marker="o", markersize=3.2,
                    color=PALETTE["archive"], label="archive")
        ax.plot(probe.projection_time, probe.projection, color=PALETTE["projection"], linestyle="--",
                linewidth=1.2, label="projection on the basis")
        ax.plot(probe.time, probe.model, color=PALETTE["model"], linewidth=1.7,
                label="forecast from the first snapshot")
        ax.set_ylabel(label(probe.field, probe.units), fontsize=9)
        ax.set_title(f"{probe.field} at {probe.where}" if probe.where else f"{probe.field} (one point)", loc="left",
                     fontsize=9)
        _style(ax)
    axes[0].legend(fontsize=8, loc="lower right", bbox_to_anchor=(1.0, 1.0), frameon=False, ncols=3)  # above the data
    axes[-1].set_xlabel(label("time", time_unit))
    figure.suptitle("forecast at the points of largest variance" + (f" ({note})" if note else ""), x=0.01,
                    ha="left", fontsize=11)
    return figure
