"""Line panels of 1-D fields: a flat mean mode reads as flat, and colours keep their meaning."""

from __future__ import annotations

import matplotlib

matplotlib.use("Agg")

import numpy as np  # noqa: E402
from matplotlib.colors import to_hex  # noqa: E402
from matplotlib.figure import Figure  # noqa: E402

from snaplift.report.figures import PALETTE, _panel  # noqa: E402
from snaplift.results.reading import Axis  # noqa: E402


def test_flat_mean_mode_and_magnitude_colour() -> None:
    x = Axis("x", np.linspace(0.0, 0.3, 24), "m", "x", False)
    # a mean mode of 300 K with round-off of 1e-10 (what the fit of tests left): the axis must not zoom
    # into the round-off (matplotlib would label it 300.0000000002), common practice for plots
    flat = 300.0 + 1e-10 * np.sin(np.arange(24))
    figure = Figure()
    real_ax, magnitude_ax = figure.subplots(1, 2)
    _panel(real_ax, figure, flat, [x], diverging=True, units="K", title="real part")
    low, high = real_ax.get_ylim()
    assert low < 300.0 < high and high - low > 1.0
    _panel(magnitude_ax, figure, np.abs(flat), [x], diverging=False, units="K", title="magnitude")
    # amber marks untrusted modes on the whole page; a magnitude line must not borrow it
    colour = to_hex(magnitude_ax.get_lines()[0].get_color())
    assert colour != to_hex(PALETTE["untrusted"])
    # a wave is drawn on its own range (the real part of a 2.5 K wave)
    wave_ax = figure.subplots(1, 1)
    _panel(wave_ax, figure, 2.5 * np.cos(2 * np.pi * x.values / 0.3), [x], diverging=True, units="K", title="real")
    low, high = wave_ax.get_ylim()
    assert -3.0 < low < -2.4 and 2.4 < high < 3.0
