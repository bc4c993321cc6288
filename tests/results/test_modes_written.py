"""The modes the modes stage writes, checked against the store's own basis and coefficients.

For any preparation (scales, weights, masks) the physical modes are the physical basis
times the modes' coefficients: ``modes/<field>[k] = sum_r basis/<field>[r] mode_coefficient[r, k]``
(linear algebra; the reference product is numpy's ``einsum`` on the stored arrays). The
modes of a conjugate pair of a real field are exact conjugates, however the modes are
grouped for forming and writing (one per group, a pair split across two groups, all at once).
"""

from __future__ import annotations

from pathlib import Path

import h5py
import numpy as np
import pytest
import yaml
import zarr

from snaplift.results import fit_output
from snaplift.workflow.runner import run_workflow

NY, NX, M = 300, 400, 30  # 120000 points: 4 modes are 7.7 MB, one chunk per mode


def _travelling_waves(path: Path) -> None:
    # two travelling waves (two conjugate pairs of DMD eigenvalues) and a decaying standing part
    y, x = np.meshgrid(np.linspace(0, 1, NY), np.linspace(0, 2, NX), indexing="ij")
    t = 0.05 * np.arange(M)
    with h5py.File(path, "w") as h5:
        h5["t"] = t
        data = h5.create_dataset("u", shape=(M, NY, NX), chunks=(1, NY, NX), dtype="f8")
        for j, tj in enumerate(t):
            data[j] = (np.cos(2 * np.pi * (x - 0.7 * tj)) * (1 + y)
                       + 0.4 * np.exp(-0.2 * tj) * np.sin(3 * np.pi * (y + 1.3 * tj))
                       + 0.1 * np.exp(-tj) * x)


@pytest.mark.parametrize("group_modes", [1, 3, None], ids=["one-per-group", "pair-split", "default"])
def test_modes_are_the_basis_times_their_coefficients(tmp_path: Path, monkeypatch: pytest.MonkeyPatch,
                                                      group_modes: int | None) -> None:
    if group_modes is not None:
        monkeypatch.setattr(fit_output, "MODES_GROUP_BYTES", 16 * NY * NX * group_modes)
    _travelling_waves(tmp_path / "waves.h5")
    (tmp_path / "run.yaml").write_text(yaml.safe_dump({
        "archive": {"path": "waves.h5", "fields": ["u"], "time": "t"},
        "prepare": {"center": True, "scale": "rms"},
        "compress": {"method": "tsqr", "rank": 8},
        "fit": {"method": "dmd", "rank": 5},
        "output": {"path": "run.zarr", "report": False}, "cluster": "threads"}))
    root = zarr.open_group(str(run_workflow(tmp_path / "run.yaml").path), mode="r")
    modes = np.asarray(root["modes/u"][...])
    basis = np.asarray(root["basis/u"][...])
    coefficient = np.asarray(root["operator/mode_coefficient"][...])
    assert modes.shape[0] >= 4 and root["modes/u"].chunks[0] == 1  # the chunk-per-mode path
    expected = np.einsum("ryx,rk->kyx", basis, coefficient)  # reference: numpy
    scale = np.max(np.abs(expected))
    np.testing.assert_allclose(modes, expected, rtol=0, atol=1e-12 * scale)
    partner = np.asarray(root["spectrum/partner"][...])
    pairs = [(k, int(p)) for k, p in enumerate(partner) if p > k]
    assert len(pairs) >= 2
    for k, p in pairs:
        np.testing.assert_array_equal(modes[p], np.conj(modes[k]))
    # peak amplitudes are per mode: equal within a pair (max |mode| |amplitude|, doubled for both)
    peak = np.asarray(root["spectrum/peak_u"][...])
    for k, p in pairs:
        assert peak[k] == pytest.approx(peak[p], rel=1e-12)


def test_probe_modes_are_the_basis_times_their_coefficients(tmp_path: Path) -> None:
    # probes (one value per snapshot, no grid) lifted by delays: each mode is one number per
    # probe, written through the same grouped path as a grid's
    t = 0.01 * np.arange(400)
    with h5py.File(tmp_path / "p.h5", "w") as h5:
        h5["t"] = t
        h5["x"] = np.sin(2 * np.pi * 3 * t) + 0.3 * np.sin(2 * np.pi * 7 * t)
        h5["y"] = np.cos(2 * np.pi * 3 * t)
    (tmp_path / "p.yaml").write_text(yaml.safe_dump({
        "archive": {"path": "p.h5", "fields": ["x", "y"], "time": "t"},
        "lift": [{"kind": "delays", "count": 10, "spacing": 1}], "compress": {"method": "tsqr", "rank": 6},
        "fit": {"method": "dmd"}, "output": {"path": "p.zarr", "report": False}, "cluster": "threads"}))
    root = zarr.open_group(str(run_workflow(tmp_path / "p.yaml").path), mode="r")
    coefficient = np.asarray(root["operator/mode_coefficient"][...])
    for name in "xy":
        modes, basis = np.asarray(root[f"modes/{name}"][...]), np.asarray(root[f"basis/{name}"][...])
        assert modes.ndim == 1 and basis.ndim == 1
        np.testing.assert_allclose(modes, basis @ coefficient, rtol=0, atol=1e-12 * np.max(np.abs(modes)))
        assert np.max(np.abs(modes)) > 0.01  # reference: numpy's product above; the values are not left empty
