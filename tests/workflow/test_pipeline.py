"""End to end: archive on disk -> workflow -> result store, against exact solutions."""

from __future__ import annotations

from pathlib import Path

import h5py
import numpy as np
import pytest
import xarray as xr
import yaml

from snaplift.errors import ArchiveError, FieldNotFoundError, TimeSpacingError
from snaplift.results.store import read_group
from snaplift.workflow.runner import run_workflow


def _write_archive(path: Path, fields: dict[str, np.ndarray], t: np.ndarray, **extra: np.ndarray) -> None:
    with h5py.File(path, "w") as h5:
        h5["t"] = t
        for name, values in fields.items():
            h5.create_dataset(name, data=values, chunks=(1, *values.shape[1:]))
        for name, values in extra.items():
            h5[name] = values


def _workflow(folder: Path, **sections) -> Path:
    data = {"archive": {"path": "a.h5", "fields": ["u"], "time": "t"},
            "output": {"path": "r.zarr"}, "cluster": "threads"}
    for key, value in sections.items():
        base = data.get(key)
        data[key] = {**base, **value} if isinstance(value, dict) and isinstance(base, dict) else value
    path = folder / "w.yaml"
    path.write_text(yaml.safe_dump(data))
    return path


def _linear_system_snapshots(n_grid: tuple[int, int], m: int, eigenvalues: np.ndarray, seed: int = 0):
    """x_j = Re(sum_k phi_k b_k lambda_k^j) with conjugate pairs: data of a linear system."""
    rng = np.random.default_rng(seed)
    n = int(np.prod(n_grid))
    phi = rng.standard_normal((n, eigenvalues.size)) + 1j * rng.standard_normal((n, eigenvalues.size))
    powers = eigenvalues[:, None] ** np.arange(m)[None, :]
    x = (phi @ powers).real
    return x.T.reshape(m, *n_grid)


def test_linear_system_eigenvalues_recovered(tmp_path: Path) -> None:
    # a real linear system with eigenvalue pairs r exp(+-i w); DMD on data of a linear system
    # recovers its eigenvalues exactly (Tu et al. 2014, J. Comput. Dyn.)
    pairs = np.array([0.98 * np.exp(0.3j), 0.9 * np.exp(1.1j), 0.95 * np.exp(0.05j)])
    eigenvalues = np.concatenate([pairs, pairs.conj()])
    u = _linear_system_snapshots((12, 10), 80, eigenvalues)
    _write_archive(tmp_path / "a.h5", {"u": u}, 0.1 * np.arange(80))
    summary = run_workflow(_workflow(tmp_path, compress={"rank": 6, "oversample": 6}, fit={"rank": 6}))
    found = read_group(summary.path, "spectrum")["eigenvalue"]
    for value in eigenvalues:
        assert np.min(np.abs(found - value)) < 1e-10
    assert summary.passes == 4  # randomized SVD, q = 1: 2 + 2q passes (Halko et al. 2011)


def test_centred_linear_system_with_affine_term(tmp_path: Path) -> None:
    # a constant offset plus a linear system: centring with the affine term keeps the
    # eigenvalues exact (Hirsh, Harris, Kutz, Brunton 2020)
    pairs = np.array([0.97 * np.exp(0.4j), 0.92 * np.exp(0.9j)])
    eigenvalues = np.concatenate([pairs, pairs.conj()])
    u = _linear_system_snapshots((8, 9), 60, eigenvalues, seed=3) + 5.0
    _write_archive(tmp_path / "a.h5", {"u": u}, 0.1 * np.arange(60))
    path = _workflow(tmp_path, prepare={"center": True}, compress={"rank": 4, "oversample": 4})
    summary = run_workflow(path)
    found = read_group(summary.path, "spectrum")["eigenvalue"]
    for value in eigenvalues:
        assert np.min(np.abs(found - value)) < 1e-8
    mean = read_group(summary.path, "prepare")["mean_u"]
    np.testing.assert_allclose(mean, u.mean(axis=0), rtol=1e-12)  # reference: numpy mean


def test_heat_equation_eigenvalues(tmp_path: Path) -> None:
    # u_t = nu u_xx on [0, L], u(0) = u(L) = 0: separation of variables gives modes
    # sin(k pi x / L) decaying as exp(-nu (k pi / L)^2 t) (e.g. Haberman, Applied PDEs, ch. 2)
    nu, length, dt, m = 0.01, 1.0, 0.5, 50
    x = np.linspace(0, length, 101)[1:-1]
    ks = np.array([1, 2, 3])
    t = dt * np.arange(m)
    u = sum(a * np.sin(k * np.pi * x)[None, :] * np.exp(-nu * (k * np.pi / length) ** 2 * t)[:, None]
            for a, k in zip([1.0, 0.5, 0.25], ks))
    _write_archive(tmp_path / "a.h5", {"u": u[:, :, None]}, t)
    summary = run_workflow(_workflow(tmp_path, compress={"rank": 3, "oversample": 5}, prepare={"scale": "none"}))
    found = np.sort(read_group(summary.path, "spectrum")["eigenvalue"].real)
    expected = np.sort(np.exp(-nu * (ks * np.pi / length) ** 2 * dt))
    np.testing.assert_allclose(found, expected, rtol=1e-8)


def test_modes_reproduce_snapshots_on_the_grid(tmp_path: Path) -> None:
    # physical modes (weights, scales, mask undone) times amplitudes reproduce each snapshot:
    # x_j = sum_k mode_k b_k lambda_k^j (Schmid 2010; amplitudes per Jovanovic et al. 2014)
    pairs = np.array([0.99 * np.exp(0.5j), 0.93 * np.exp(1.3j)])
    eigenvalues = np.concatenate([pairs, pairs.conj()])
    u = _linear_system_snapshots((6, 7), 40, eigenvalues, seed=5)
    temperature = 300.0 + 20.0 * _linear_system_snapshots((6, 7), 40, eigenvalues, seed=6)
    solid = np.zeros((6, 7), bool)
    solid[2:4, 1:3] = True
    area = np.random.default_rng(1).uniform(0.5, 2.0, (6, 7))
    _write_archive(tmp_path / "a.h5", {"u": u, "T": temperature}, 0.2 * np.arange(40), cell_area=area, solid=solid)
    path = _workflow(tmp_path, archive={"fields": ["u", "T"], "weights": "cell_area", "mask": "solid"},
                     prepare={"center": True}, compress={"rank": 4, "oversample": 4})
    summary = run_workflow(path)
    spectrum = read_group(summary.path, "spectrum")
    modes = read_group(summary.path, "modes")
    prepare = read_group(summary.path, "prepare")
    amplitude = spectrum["amplitude"] * np.exp(1j * spectrum["phase"])
    for name, data in (("u", u), ("T", temperature)):
        assert np.isnan(modes[name][:, solid]).all()
        for j in (0, 17, 39):
            model = prepare[f"fixed_point_{name}"] + np.einsum(
                "k,kyx->yx", amplitude * spectrum["eigenvalue"] ** j, modes[name]).real
            np.testing.assert_allclose(model[~solid], data[j][~solid], rtol=1e-8, atol=1e-8 * np.abs(data).max())
    diagnostics = read_group(summary.path, "diagnostics")
    # relative to the centred snapshot norm, which is small for some snapshots
    assert diagnostics["reconstruction_error"].max() < 1e-6


def test_store_opens_with_xarray(tmp_path: Path) -> None:
    u = _linear_system_snapshots((5, 4), 30, np.array([0.9 * np.exp(0.7j), 0.9 * np.exp(-0.7j)]))
    _write_archive(tmp_path / "a.h5", {"u": u}, 0.1 * np.arange(30))
    summary = run_workflow(_workflow(tmp_path, compress={"rank": 2, "oversample": 2}))
    for group in ("spectrum", "modes", "basis", "diagnostics", "prepare", "operator"):
        dataset = xr.open_zarr(summary.path, group=group)  # reference reader: xarray
        assert dataset.data_vars
    assert xr.open_zarr(summary.path, group="modes")["u"].dims == ("mode", "y", "x")


def test_threads_and_processes_agree(tmp_path: Path) -> None:
    pairs = np.array([0.98 * np.exp(0.3j), 0.9 * np.exp(1.1j)])
    u = _linear_system_snapshots((10, 10), 50, np.concatenate([pairs, pairs.conj()]), seed=2)
    _write_archive(tmp_path / "a.h5", {"u": u}, 0.1 * np.arange(50))
    threads = run_workflow(_workflow(tmp_path, compress={"rank": 4, "oversample": 4}))
    path = _workflow(tmp_path, compress={"rank": 4, "oversample": 4}, cluster={"kind": "local", "workers": 2},
                     output={"path": "r2.zarr"})
    local = run_workflow(path)
    a = read_group(threads.path, "basis")["singular_value"]
    b = read_group(local.path, "basis")["singular_value"]
    np.testing.assert_allclose(a, b, rtol=1e-12)
    np.testing.assert_allclose(read_group(threads.path, "spectrum")["eigenvalue"],
                               read_group(local.path, "spectrum")["eigenvalue"], rtol=1e-10)


def test_bad_inputs_fail_clearly_and_write_nothing(tmp_path: Path) -> None:
    u = _linear_system_snapshots((4, 4), 20, np.array([0.9, 0.8]))
    t = 0.1 * np.arange(20)
    t[7] += 0.05
    _write_archive(tmp_path / "a.h5", {"u": u}, t)
    with pytest.raises(TimeSpacingError, match="worst gap .* between snapshots [67] and [78]"):
        run_workflow(_workflow(tmp_path, compress={"rank": 2}))
    with pytest.raises(FieldNotFoundError, match="archive field 'p' not found .* fields present: u"):
        run_workflow(_workflow(tmp_path, archive={"fields": ["p"]}, compress={"rank": 2}))
    assert not (tmp_path / "r.zarr").exists()
    assert not [p for p in tmp_path.iterdir() if "staging" in p.name]


def test_non_finite_value_names_snapshot_and_point(tmp_path: Path) -> None:
    u = _linear_system_snapshots((4, 5), 20, np.array([0.9, 0.8]))
    u[11, 2, 3] = np.nan
    _write_archive(tmp_path / "a.h5", {"u": u}, 0.1 * np.arange(20))
    with pytest.raises(ArchiveError, match=r"field 'u' has 1 non-finite .* snapshot 11, grid index \(2, 3\)"):
        run_workflow(_workflow(tmp_path, compress={"rank": 2}))
    assert not (tmp_path / "r.zarr").exists()


def test_residuals_mark_true_eigenvalues_trusted(tmp_path: Path) -> None:
    # data of a linear system: its eigenpairs are exact on held-out pairs, so their
    # residual ||(Y - lambda X) g|| / ||X g|| vanishes (Colbrook & Townsend 2024, CPAM);
    # the extra modes a too-large rank adds fit only rounding and are not trusted
    pairs = np.array([0.98 * np.exp(0.3j), 0.9 * np.exp(1.1j)])
    eigenvalues = np.concatenate([pairs, pairs.conj()])
    rng = np.random.default_rng(7)
    u = _linear_system_snapshots((9, 8), 80, eigenvalues) + 1e-6 * rng.standard_normal((80, 9, 8))
    _write_archive(tmp_path / "a.h5", {"u": u}, 0.1 * np.arange(80))
    summary = run_workflow(_workflow(tmp_path, compress={"rank": 8, "oversample": 4},
                                     fit={"holdout": 0.25, "debias": "total-least-squares"}))
    spectrum = read_group(summary.path, "spectrum")
    for value in eigenvalues:
        closest = np.argmin(np.abs(spectrum["eigenvalue"] - value))
        assert abs(spectrum["eigenvalue"][closest] - value) < 1e-4
        assert spectrum["trusted"][closest] and spectrum["residual"][closest] < 1e-3
    assert (~spectrum["trusted"]).sum() >= 2  # the noise modes
    assert spectrum["trusted"].dtype == bool


def test_rank_by_energy_and_optimal_threshold(tmp_path: Path) -> None:
    # four modes carry all the energy: both the energy rule and the Gavish-Donoho optimal
    # hard threshold (Gavish & Donoho 2014) keep exactly four on noisy data
    pairs = np.array([0.99 * np.exp(0.4j), 0.95 * np.exp(1.2j)])
    rng = np.random.default_rng(3)
    u = _linear_system_snapshots((10, 10), 60, np.concatenate([pairs, pairs.conj()])) \
        + 1e-8 * rng.standard_normal((60, 10, 10))
    _write_archive(tmp_path / "a.h5", {"u": u}, 0.1 * np.arange(60))
    for rank in ({"energy": 0.999999}, "optimal"):
        summary = run_workflow(_workflow(tmp_path, compress={"rank": 10, "oversample": 4}, fit={"rank": rank},
                                         output={"path": f"r-{len(str(rank))}.zarr"}))
        assert read_group(summary.path, "spectrum")["eigenvalue"].size == 4


def test_zarr_archive_and_a_list_of_runs(tmp_path: Path) -> None:
    # the same linear system from a zarr v3 store, then as two runs (zarr + HDF5): DMD
    # recovers the eigenvalues exactly in both (Tu et al. 2014)
    import zarr

    pairs = np.array([0.97 * np.exp(0.25j), 0.9 * np.exp(0.7j)])
    eigenvalues = np.concatenate([pairs, pairs.conj()])
    u = _linear_system_snapshots((6, 5), 60, eigenvalues, seed=2)
    group = zarr.open_group(str(tmp_path / "a.zarr"), mode="w", zarr_format=3)
    group.create_array("u", data=u, chunks=(4, 6, 5))
    group.create_array("t", data=0.1 * np.arange(60))
    summary = run_workflow(_workflow(tmp_path, archive={"path": "a.zarr"}, compress={"rank": 4, "oversample": 4}))
    found = read_group(summary.path, "spectrum")["eigenvalue"]
    assert all(np.min(np.abs(found - value)) < 1e-10 for value in eigenvalues)

    second = _linear_system_snapshots((6, 5), 140, eigenvalues, seed=2)[100:]  # same system, later start
    _write_archive(tmp_path / "b.h5", {"u": second}, 0.1 * np.arange(40))
    summary = run_workflow(_workflow(tmp_path, archive={"path": ["a.zarr", "b.h5"]}, output={"path": "runs.zarr"},
                                     compress={"rank": 4, "oversample": 4}))
    found = read_group(summary.path, "spectrum")["eigenvalue"]
    assert all(np.min(np.abs(found - value)) < 1e-10 for value in eigenvalues)
    assert read_group(summary.path, "runs")["run_length"].tolist() == [60, 40]
