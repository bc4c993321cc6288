"""Forecasts from a result store against the exact future of the systems that made the data."""

from __future__ import annotations

from pathlib import Path

import h5py
import numpy as np
import pytest
import yaml

from snaplift.errors import ResultStoreError
from snaplift.results.forecast import forecast_fields
from snaplift.results.reading import leading_modes, open_store
from snaplift.workflow.runner import run_workflow


def _run(folder: Path, fields: dict[str, np.ndarray], t: np.ndarray, settings: dict) -> Path:
    with h5py.File(folder / "a.h5", "w") as h5:
        h5["t"] = t
        for name, values in fields.items():
            h5.create_dataset(name, data=values, chunks=(1, *values.shape[1:]))
    data = {"archive": {"path": "a.h5", "fields": list(fields), "time": "t"}, "output": {"path": "r.zarr"},
            "cluster": "threads", **settings}
    (folder / "w.yaml").write_text(yaml.safe_dump(data))
    return run_workflow(folder / "w.yaml").path


def test_dmd_forecast_of_a_centred_linear_system(tmp_path: Path) -> None:
    # x_j = c + Re(sum_k phi_k lambda_k^j): an affine DMD fit (Hirsh et al. 2020) continues
    # the data exactly; the forecast from snapshot 20 must equal the stored future snapshots
    rng = np.random.default_rng(0)
    pairs = np.array([0.99 * np.exp(0.3j), 0.95 * np.exp(0.8j)])
    eigenvalues = np.concatenate([pairs, pairs.conj()])
    phi = rng.standard_normal((6 * 7, 4)) + 1j * rng.standard_normal((6 * 7, 4))
    u = (phi @ eigenvalues[:, None] ** np.arange(80)).real.T.reshape(80, 6, 7) + 3.0
    store = _run(tmp_path, {"u": u}, 0.1 * np.arange(80),
                 {"prepare": {"center": True}, "compress": {"rank": 4, "oversample": 4}})
    out = forecast_fields(store, 20, 40)
    np.testing.assert_allclose(out["u"], u[20:61], rtol=0, atol=1e-8 * np.abs(u).max())
    np.testing.assert_allclose(out["time"], 0.1 * np.arange(20, 61), rtol=1e-12)


def test_edmd_forecast_on_the_slow_manifold(tmp_path: Path) -> None:
    # x1' = mu x1, x2' = lam (x2 - x1^2) (Brunton et al. 2016): the Koopman mode expansion on
    # the degree-2 monomials is exact, so the forecast follows the closed-form solution
    mu, lam, dt = -0.05, -1.0, 0.1
    t = dt * np.arange(100)
    b = lam / (lam - 2 * mu)
    x1 = 0.9 * np.exp(mu * t)
    x2 = (0.2 - b * 0.81) * np.exp(lam * t) + b * x1**2
    store = _run(tmp_path, {"x1": x1[:, None], "x2": x2[:, None]}, t,
                 {"prepare": {"scale": "none"}, "compress": {"rank": 2, "oversample": 0, "method": "tsqr"},
                  "lift": [{"kind": "monomials", "degree": 2, "on": "state"}], "fit": {"method": "edmd"}})
    out = forecast_fields(store, 10, 50)
    np.testing.assert_allclose(out["x1"][:, 0], x1[10:61], atol=1e-8)
    np.testing.assert_allclose(out["x2"][:, 0], x2[10:61], atol=1e-8)


def test_forecast_rejects_a_bad_start(tmp_path: Path) -> None:
    u = np.random.default_rng(1).standard_normal((20, 5))
    store = _run(tmp_path, {"u": u}, 0.1 * np.arange(20), {"compress": {"rank": 2, "oversample": 2}})
    with pytest.raises(ResultStoreError, match="snapshot must be a column index in -20..19"):
        forecast_fields(store, 20, 3)
    with pytest.raises(ResultStoreError, match="no modes of field 'p'"):
        forecast_fields(store, 0, 3, fields=["p"])


def test_forecast_of_a_complex_archive_keeps_the_phase(tmp_path: Path) -> None:
    # complex travelling waves z = sum_k exp((g_k + 2 pi i f_k) t) exp(i kappa_k x) (analytic):
    # DMD of rank 2 is exact, and the forecast must be the complex field, not its real part
    t = 0.05 * np.arange(60)
    x = np.linspace(0.0, 0.3, 16, endpoint=False)
    kappa = 2 * np.pi / 0.3

    def waves(times: np.ndarray) -> np.ndarray:
        return (np.exp((0.1 + 2j * np.pi * 2.0) * times)[:, None] * np.exp(-1j * kappa * x)[None, :]
                + 0.5 * np.exp((-0.3 - 2j * np.pi * 3.5) * times)[:, None] * np.exp(2j * kappa * x)[None, :])

    store = _run(tmp_path, {"z": waves(t)}, t, {"compress": {"method": "tsqr", "rank": 2}, "fit": {"rank": 2}})
    out = forecast_fields(store, -1, 30)
    assert np.iscomplexobj(out["z"])
    np.testing.assert_allclose(out["z"], waves(t[-1] + 0.05 * np.arange(31)), rtol=0, atol=1e-8)
    # no conjugate pairs in complex data: the -3.5 Hz wave is a leading mode of its own (report, export)
    view = open_store(store)
    assert view.complex_data
    chosen = leading_modes(view, 4)
    frequency = view.spectrum["frequency"].values[chosen]
    np.testing.assert_allclose(sorted(frequency), [-3.5, 2.0], rtol=1e-9)  # the archive's two waves
