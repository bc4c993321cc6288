"""The spectrum table: units from the store and the hint about delays."""

from __future__ import annotations

from pathlib import Path

import h5py
import numpy as np
import yaml

from snaplift.report.table import delay_hint, render_spectrum
from snaplift.workflow.runner import run_workflow


def _store(folder: Path, values: np.ndarray, rank: int = 8) -> Path:
    with h5py.File(folder / "a.h5", "w") as h5:
        h5["t"] = 0.5 * np.arange(values.shape[0])
        h5["t"].attrs["units"] = "min"
        h5.create_dataset("u", data=values)
        h5["u"].attrs["units"] = "m s-1"
    path = folder / "w.yaml"
    path.write_text(yaml.safe_dump({"archive": {"path": "a.h5", "fields": ["u"], "time": "t"},
                                    "compress": {"rank": rank, "oversample": 4},
                                    "fit": {"rank": rank}, "output": {"path": "r.zarr"}}))
    return run_workflow(path).path


def test_noise_gets_the_delay_hint_and_a_clean_wave_none(tmp_path: Path) -> None:
    rng = np.random.default_rng(3)
    (tmp_path / "noise").mkdir()
    noisy = _store(tmp_path / "noise", rng.standard_normal((60, 4, 5)))
    hint = delay_hint(noisy)
    # white noise has no linear dynamics: most eigenvalues fail the one-step residual
    assert hint is not None and "untrusted" in hint and "{kind: delays, count: 4}" in hint
    (tmp_path / "wave").mkdir()
    t = 30.0 * np.arange(60)[:, None, None]  # seconds (0.5 min steps)
    x = np.linspace(0, 1, 5)[None, None, :] + np.zeros((1, 4, 1))
    wave = np.cos(2 * np.pi * (x - t / 600.0))  # a travelling wave of period 10 min
    clean = _store(tmp_path / "wave", wave, rank=2)
    assert delay_hint(clean) is None
    # minutes convert: 1/600 Hz (period 600 s), shown in Hz and s
    from rich.console import Console

    console = Console(width=200, record=True)
    console.print(render_spectrum(clean))
    text = console.export_text()
    assert "frequency [Hz]" in text and "period [s]" in text and "peak u [m s-1]" in text
    assert "600" in text and "0.001667" in text
