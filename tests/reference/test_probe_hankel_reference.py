"""Delay-embedded DMD of two probe signals through the whole pipeline equals numpy's.

The reference is written out with numpy alone: the Hankel matrix of the two signals
(delay copies stacked under each other), each row divided by its RMS (``prepare.scale:
rms``, every lifted row being a field of one point), its SVD truncated to the rank, the
coefficients ``C = U^H A`` and the DMD of the pairs of C (Schmid 2010; Tu et al. 2014:
``A_tilde = Y X^+`` on the reduced coordinates). The workflow reads the two 1-D datasets of
an HDF5 file, lifts them with ``lift: delays`` inside the tile read and compresses the lifted
matrix with each method; its eigenvalues must equal numpy's to 1e-8.
"""

from __future__ import annotations

from pathlib import Path

import h5py
import numpy as np
import pytest
import yaml
import zarr

from snaplift.workflow.runner import run_workflow

DT = 0.05
SNAPSHOTS = 700
DELAYS = 30
RANK = 4
# two damped oscillations (rate 1/s, frequency Hz): the probes obey a linear recurrence of
# order 4, so the Hankel matrix has rank 4 exactly
MODES = [(-0.05, 0.8), (-0.02, 1.9)]


def _probes() -> tuple[np.ndarray, np.ndarray]:
    t = DT * np.arange(SNAPSHOTS)
    (s1, f1), (s2, f2) = MODES
    one = np.exp(s1 * t) * np.cos(2 * np.pi * f1 * t)
    two = np.exp(s2 * t) * np.sin(2 * np.pi * f2 * t + 0.4)
    return one + 0.5 * two, 0.7 * one - two


def _numpy_reference(x: np.ndarray, y: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Hankel SVD + DMD in numpy: rows ordered like the lifted fields (x copies, then y copies)."""
    m = SNAPSHOTS - DELAYS + 1
    rows = [signal[d:d + m] for signal in (x, y) for d in range(DELAYS)]
    hankel = np.array(rows)
    hankel = hankel / np.sqrt(np.mean(hankel**2, axis=1, keepdims=True))  # per-row RMS scale
    u, s, vh = np.linalg.svd(hankel, full_matrices=False)
    coefficient = s[:RANK, None] * vh[:RANK]
    before, after = coefficient[:, :-1], coefficient[:, 1:]
    reduced = after @ np.linalg.pinv(before)
    return np.linalg.eigvals(reduced), s[:RANK]


def _sorted(values: np.ndarray) -> np.ndarray:
    values = np.asarray(values)
    return values[np.lexsort((values.imag, values.real))]


@pytest.mark.parametrize("method", ["tsqr", "randomized", "sketch"])
@pytest.mark.parametrize("in_memory", ["auto", "never"])
def test_delay_embedded_dmd_of_probes_equals_numpy(tmp_path: Path, method: str, in_memory: str) -> None:
    x, y = _probes()
    with h5py.File(tmp_path / "probes.h5", "w") as h5:  # one value per snapshot and probe
        h5["x"], h5["y"], h5["t"] = x, y, DT * np.arange(SNAPSHOTS)
    compress = {"method": method, "rank": RANK, "in_memory": in_memory}
    if method == "sketch":
        compress["check_pass"] = True  # exact coefficients: the fit sees C = U^H A
    workflow = {"archive": {"path": "probes.h5", "fields": ["x", "y"], "time": "t"},
                "lift": [{"kind": "delays", "count": DELAYS}], "compress": compress,
                "fit": {"method": "dmd", "rank": RANK, "holdout": 0.0}, "output": {"path": "r.zarr"},
                "cluster": {"kind": "threads", "workers": 2}}
    path = tmp_path / "w.yaml"
    path.write_text(yaml.safe_dump(workflow))
    run_workflow(path)
    store = zarr.open_group(str(tmp_path / "r.zarr"), mode="r")
    found = np.asarray(store["spectrum/eigenvalue"][...])
    expected, singular_values = _numpy_reference(x, y)
    # numpy as the reference (the Hankel SVD and DMD written out above)
    np.testing.assert_allclose(_sorted(found), _sorted(expected), atol=1e-8, rtol=0)
    # eigenvalues of exact recurrence data do not see a wrong row shift or scale; the
    # singular values of the scaled Hankel matrix do (numpy's SVD as the reference)
    np.testing.assert_allclose(store["basis/singular_value"][...], singular_values, rtol=1e-8)
    # and both equal the eigenvalues the signals were made of (analytic: exp((s +- 2 pi i f) dt))
    analytic = np.array([np.exp((s + sign * 2j * np.pi * f) * DT) for s, f in MODES for sign in (1, -1)])
    np.testing.assert_allclose(_sorted(found), _sorted(analytic), atol=1e-8, rtol=0)
    stages = zarr.open_group(str(tmp_path / "r.zarr"), mode="r").attrs["stages"]
    assert stages["compress"]["bytes_read"] > 0
