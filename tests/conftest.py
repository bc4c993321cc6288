"""Shared fixtures: the run's report switched off for speed, and an analytic archive of growing
and decaying travelling waves, and stores fitted to it.

``u(t, y, x) = sum_k A_k exp(g_k t) cos(kappa_k x - omega_k t + phase_k)`` on a periodic
grid (constant in y), with the same waves on a 1-D field ``p(t, x)`` (other grid: a
staggered store) and a 3-D field ``w(t, z, y, x)``. Each wave is two orthogonal spatial
shapes (cos and sin of one wavenumber, orthogonal to every other wavenumber on a uniform
periodic grid), so the data have rank 6 and DMD on it is exact: eigenvalues
``exp((g_k +- i omega_k) dt)`` (Schmid 2010; Tu et al. 2014). The waves' energies are well
apart, so the rank-4 truncation holds exactly the two strongest waves.
"""

from __future__ import annotations

from pathlib import Path

import h5py
import numpy as np
import pytest
import yaml

DT = 0.1
N_SNAPSHOTS = 100
FITTED = 60
WAVES = (  # amplitude, growth g [1/s], angular frequency omega [rad/s], wavenumber index, phase
    (1.0, 0.05, 2.0, 1, 0.3),
    (0.5, -0.1, 3.1, 2, 1.1),
    (0.03, -0.3, 4.7, 3, 2.0),
)
NX = 32


def wave_values(t: np.ndarray, x: np.ndarray) -> np.ndarray:
    """``(snapshot, x)``: the sum of the waves at times ``t``."""
    length = NX * 1.0
    out = np.zeros((t.size, x.size))
    for amplitude, growth, omega, index, phase in WAVES:
        kappa = 2 * np.pi * index / length
        out += amplitude * np.exp(growth * t)[:, None] * np.cos(kappa * x[None, :] - omega * t[:, None] + phase)
    return out


def write_wave_archive(folder: Path) -> Path:
    t = DT * np.arange(N_SNAPSHOTS)
    x = np.arange(NX, dtype=np.float64)
    line = wave_values(t, x)
    path = folder / "waves.h5"
    with h5py.File(path, "w") as h5:
        h5["t"] = t
        h5.create_dataset("u", data=np.repeat(line[:, None, :], 6, axis=1), chunks=(1, 6, NX))
        h5.create_dataset("p", data=0.5 * line, chunks=(1, NX))
        h5.create_dataset("w", data=np.broadcast_to(2.0 * line[:, None, None, :], (N_SNAPSHOTS, 3, 4, NX)).copy(),
                          chunks=(1, 3, 4, NX))
    return path


def run_wave_workflow(folder: Path, name: str, fit_rank: int) -> Path:
    from snaplift.workflow.runner import run_workflow

    workflow = {"archive": {"path": "waves.h5", "fields": ["u", "p", "w"], "time": "t",
                            "snapshots": {"start": 0, "stop": FITTED}},
                "compress": {"method": "tsqr", "rank": 6},
                "fit": {"method": "dmd", "rank": fit_rank},
                "output": {"path": f"{name}.zarr"}, "cluster": "threads"}
    (folder / f"{name}.yaml").write_text(yaml.safe_dump(workflow))
    return run_workflow(folder / f"{name}.yaml").path


@pytest.fixture(autouse=True)
def _no_run_report(request: pytest.FixtureRequest, monkeypatch: pytest.MonkeyPatch) -> None:
    """Workflow runs in tests skip drawing RESULT.report/ (a few seconds of matplotlib each);
    the report stage is tested where it is the subject: tests/report and the wave stores
    (session-scoped, built before this fixture patches anything). Runs in subprocesses draw it."""
    if request.node.get_closest_marker("run_report") is None and "tests/report" not in str(request.node.path):
        from snaplift.workflow import runner

        monkeypatch.setattr(runner, "_write_report", lambda path, say, helper=None: None)


@pytest.fixture(scope="session")
def wave_stores(tmp_path_factory: pytest.TempPathFactory) -> dict[str, Path]:
    """The wave archive and two stores fitted to its first 60 snapshots: fit rank 6 and 4."""
    folder = tmp_path_factory.mktemp("waves")
    archive = write_wave_archive(folder)
    return {"archive": archive, "rank6": run_wave_workflow(folder, "rank6", 6),
            "rank4": run_wave_workflow(folder, "rank4", 4)}
