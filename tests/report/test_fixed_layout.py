"""Figures placed at fixed margins (no layout engine): every label stays on the canvas and off the
other panels, as measured by matplotlib's own renderer (the reference for where text lands)."""

from __future__ import annotations

from pathlib import Path

import numpy as np
from matplotlib.figure import Figure

from snaplift.report.figures import (
    eigenvalue_figure,
    energy_figure,
    error_figure,
    mode_figure,
    spectrum_figure,
)
from snaplift.results.reading import leading_modes, open_store


def _overlap(a, b) -> bool:
    return min(a.x1, b.x1) - max(a.x0, b.x0) > 1 and min(a.y1, b.y1) - max(a.y0, b.y0) > 1


def _inside(box, canvas) -> bool:  # 1 px of anti-aliasing allowed
    return box.x0 >= canvas.x0 - 1 and box.x1 <= canvas.x1 + 1 and box.y0 >= canvas.y0 - 1 and box.y1 <= canvas.y1 + 1


def _check(figure: Figure, name: str) -> None:
    assert figure.get_layout_engine() is None, name  # drawn once, not measured by a second draw
    figure.canvas.draw()
    renderer = figure.canvas.get_renderer()
    canvas = figure.bbox
    panels = [(ax, ax.get_window_extent(renderer)) for ax in figure.axes]
    bars = [image.colorbar.ax for ax in figure.axes for image in ax.images if image.colorbar is not None]
    for ax, _ in panels:
        # title, axis labels and the tick labels drawn (matplotlib's own measure of them)
        assert _inside(ax.get_tightbbox(renderer), canvas), (name, ax.get_title())
        labels = [ax.xaxis.get_tightbbox(renderer), ax.yaxis.get_tightbbox(renderer),
                  ax.title.get_window_extent(renderer)]
        for other, area in panels:
            if other is ax or other in bars or ax in bars:
                continue  # a colour bar sits beside its own image by design
            # a label of one panel drawn over the plotting area of another is unreadable
            for box in labels:
                if box is not None and box.width > 0:
                    assert not _overlap(box, area), (name, ax.get_title(), other.get_title())
    for text in figure.texts:  # titles of the figure and of each mode's band
        if text.get_visible() and text.get_text().strip():
            box = text.get_window_extent(renderer)
            assert _inside(box, canvas), (name, text.get_text())
            assert not any(_overlap(box, area) for _, area in panels), (name, text.get_text())
    # no two panels (images, colour bars, line plots) on top of each other
    for i, (_, a) in enumerate(panels):
        for _, b in panels[i + 1:]:
            assert not _overlap(a, b), name


def test_labels_stay_on_the_canvas_and_off_other_panels(wave_stores: dict[str, Path]) -> None:
    # 1-D (p), 2-D (u) and 3-D (w, three mid-planes) fields, and the line figures
    view = open_store(wave_stores["rank6"])
    chosen = leading_modes(view, 4)
    for field in view.fields:
        _check(mode_figure(view, field, chosen), f"modes_{field}")
    for name, figure in (("energy", energy_figure(view)), ("eigenvalues", eigenvalue_figure(view)),
                         ("spectrum", spectrum_figure(view, view.fields)), ("errors", error_figure(view))):
        assert figure is not None
        _check(figure, name)


def test_colour_bar_spans_the_image_it_belongs_to(wave_stores: dict[str, Path]) -> None:
    # each image has its bar to its right, at least as tall as the image (common practice)
    view = open_store(wave_stores["rank6"])
    figure = mode_figure(view, "u", leading_modes(view, 2))
    figure.canvas.draw()
    images = [ax for ax in figure.axes if ax.images]
    bars = [ax.images[0].colorbar.ax for ax in images]
    assert len(images) == 4 and all(bar in figure.axes for bar in bars)
    for image, bar in zip(images, bars):
        a, b = image.get_position(), bar.get_position()
        assert b.x0 > a.x1 and b.x0 - a.x1 < 0.05
        assert b.height >= a.height - 1e-9
        assert np.isclose(b.y0 + b.height / 2, a.y0 + a.height / 2)


def test_large_grid_thinned_to_the_pixels_drawn() -> None:
    # a 3000 x 3000 grid in a 4-inch panel at 100 dpi: at most twice the panel's pixels per axis are
    # handed to the image (nearest-neighbour drawing shows no more; common practice), over the grid's
    # full extent (cell edges half a step beyond the first and last coordinates)
    from snaplift.report.figures import _figure, _panel
    from snaplift.results.reading import Axis

    x = Axis("x", np.linspace(0.0, 3.0, 3000), "m", "x", False)
    y = Axis("y", np.linspace(0.0, 3.0, 3000), "m", "y", False)
    values = np.add.outer(np.arange(3000.0), np.arange(3000.0))
    figure = _figure(6, 6, layout=None)
    ax = figure.add_axes((0.1, 0.1, 4 / 6, 4 / 6))
    bar = figure.add_axes((0.85, 0.1, 0.03, 4 / 6))
    _panel(ax, figure, values, [y, x], diverging=False, units="K", title="magnitude", bar_ax=bar)
    shown = ax.images[0].get_array()
    assert 400 <= shown.shape[0] <= 800 and 400 <= shown.shape[1] <= 800
    step = 3.0 / 2999
    np.testing.assert_allclose(ax.images[0].get_extent(), (-step / 2, 3 + step / 2, -step / 2, 3 + step / 2))
    # the colour scale still spans the whole field (0 .. 5998), not only the values kept
    assert ax.images[0].norm.vmax == 5998.0
