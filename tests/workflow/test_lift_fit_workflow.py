"""lift: and fit.method through the workflow file, against exact solutions.

Each archive holds data of a system whose spectrum is known in closed form; the workflow
must recover it through the whole pipeline (scan, lifted tile reads, compress, fit, store).
"""

from __future__ import annotations

from pathlib import Path

import h5py
import numpy as np
import pytest
import yaml

from snaplift.errors import ConfigError
from snaplift.results.store import read_group
from snaplift.workflow.runner import run_workflow


def _write(path: Path, fields: dict[str, np.ndarray], t: np.ndarray | None = None, **extra: np.ndarray) -> None:
    with h5py.File(path, "w") as h5:
        if t is not None:
            h5["t"] = t
        for name, values in fields.items():
            h5.create_dataset(name, data=values, chunks=(1, *values.shape[1:]))
        for name, values in extra.items():
            h5[name] = values


def _run(folder: Path, data: dict) -> Path:
    base = {"output": {"path": "r.zarr"}, "cluster": "threads"}
    path = folder / "w.yaml"
    path.write_text(yaml.safe_dump({**base, **data}))
    return run_workflow(path).path


def _continuous(store: Path) -> np.ndarray:
    spectrum = read_group(store, "spectrum")
    return np.asarray(spectrum["rate"])


def _has(values: np.ndarray, target: complex, tol: float) -> bool:
    return bool(np.min(np.abs(values - target)) <= tol * max(1.0, abs(target)))


# -- raw-field lifting -------------------------------------------------------------------


def test_delays_recover_two_frequencies_of_one_probe(tmp_path: Path) -> None:
    # one probe, two incommensurate frequencies: a rank-1 snapshot matrix cannot hold the
    # four eigenvalues exp(+-2 pi i f dt); with delays (Hankel stacking) it can
    # (Takens 1981 embedding; a sum of 2 sinusoids is a linear system of order 4, from memory)
    dt, f1, f2 = 0.05, 1.0, np.sqrt(2.0)
    t = dt * np.arange(400)
    probe = np.cos(2 * np.pi * f1 * t) + 0.5 * np.sin(2 * np.pi * f2 * t)
    _write(tmp_path / "a.h5", {"p": probe[:, None]}, t)
    archive = {"path": "a.h5", "fields": ["p"], "time": "t"}
    plain = _run(tmp_path, {"archive": archive, "compress": {"rank": 1, "oversample": 0}, "prepare": {"scale": "none"}})
    assert read_group(plain, "spectrum")["frequency"].size == 1  # one real eigenvalue: no oscillation at all
    (tmp_path / "r.zarr").rename(tmp_path / "plain.zarr")
    lifted = _run(tmp_path, {"archive": archive, "lift": [{"kind": "delays", "count": 8}],
                             "compress": {"rank": 4, "oversample": 4, "method": "tsqr"}, "prepare": {"scale": "none"}})
    frequency = np.abs(read_group(lifted, "spectrum")["frequency"])
    assert _has(frequency, f1, 1e-8) and _has(frequency, f2, 1e-8)
    stored = read_group(lifted, "modes")
    assert "p" in stored and "p_delay1" not in stored  # modes of the field at the window start only
    assert read_group(lifted, "diagnostics")["time"].size == 400 - 7  # windows of 8 fit 393 times


def test_pointwise_square_adds_the_doubled_rate(tmp_path: Path) -> None:
    # u(x, t) = exp(mu t) phi(x): u^2 = exp(2 mu t) phi^2, so DMD of [u; u^2] has the
    # continuous-time eigenvalues mu and 2 mu exactly (by construction)
    mu, dt = -0.3, 0.1
    t = dt * np.arange(60)
    x = np.linspace(0, 1, 30)
    u = np.exp(mu * t)[:, None] * np.sin(np.pi * x)[None, :] + 0.0
    _write(tmp_path / "a.h5", {"u": u}, t)
    store = _run(tmp_path, {"archive": {"path": "a.h5", "fields": ["u"], "time": "t"},
                            "lift": [{"kind": "pointwise", "terms": ["x", "square"]}],
                            "compress": {"rank": 2, "oversample": 2}})
    rate = _continuous(store)
    assert _has(rate, mu, 1e-8) and _has(rate, 2 * mu, 1e-8)
    modes = read_group(store, "modes")
    assert set(modes) >= {"u", "u_square"}
    scales = read_group(store, "prepare")["scale"]
    assert scales.size == 2  # u and u_square have their own RMS scales


def test_pointwise_read_matches_numpy(tmp_path: Path, monkeypatch: pytest.MonkeyPatch) -> None:
    # the fused tile read of pointwise terms equals numpy applied to the stored values
    from snaplift.archive import open_archive
    from snaplift.archive.matrix import build_snapshot_matrix, read_snapshot_block
    from snaplift.lifting import FieldLift

    rng = np.random.default_rng(4)
    u = rng.standard_normal((12, 5, 4))
    w = rng.uniform(0.5, 2.0, (5, 4))
    _write(tmp_path / "a.h5", {"u": u}, None, w=w)
    reader = open_archive(str(tmp_path / "a.h5"))
    lift = FieldLift(terms=("x", "cube", "abs", "cos"), delays=3, spacing=2)
    matrix = build_snapshot_matrix(reader, ["u"], snapshots=np.arange(12), snapshot_block=4, weights="w",
                                   lift=lift, run_lengths=np.array([7, 5]))
    flat, sw = u.reshape(12, -1), np.sqrt(w.ravel())
    starts = np.array([0, 1, 2, 7])  # windows of span 4 inside runs [0..6] and [7..11]
    functions = {"x": lambda v: v, "cube": lambda v: v**3, "abs": np.abs, "cos": np.cos}
    assert matrix.shape == (3 * 4 * 20, 4)
    import snaplift.archive.matrix as module

    reads = []
    original = module._raw_points
    monkeypatch.setattr(module, "_raw_points", lambda *a: reads.append(a[2:]) or original(*a))
    for rows in matrix.fields:
        block = read_snapshot_block(reader, rows, matrix.snapshot_index)
        expected = functions[rows.term](flat[starts + rows.snapshot_shift]) * sw  # numpy reference
        np.testing.assert_allclose(block, expected, rtol=1e-14, atol=1e-14)
    assert reads == [(0, 20, 0, 12)]  # one raw read (snapshots 0..7 + window 4) for all 12 lifted fields


# -- runs ----------------------------------------------------------------------------------


def _linear_runs(starts: list[np.ndarray], matrix: np.ndarray, m: int) -> list[np.ndarray]:
    out = []
    for x in starts:
        states = [x]
        for _ in range(m - 1):
            states.append(matrix @ states[-1])
        out.append(np.array(states))
    return out


def test_run_dataset_keeps_pairs_inside_runs(tmp_path: Path) -> None:
    # two runs of x' = A x from different starts, stored back to back: with the run labels
    # DMD is exact (no pair joins run 1's last snapshot to run 2's first); per-run
    # amplitudes are the least-squares amplitudes of each run (Jovanovic et al. 2014)
    rng = np.random.default_rng(1)
    q, _ = np.linalg.qr(rng.standard_normal((3, 3)))
    a = q @ np.diag([0.95, 0.8, -0.6]) @ q.T
    lift_map = rng.standard_normal((40, 3))
    runs = _linear_runs([rng.standard_normal(3), rng.standard_normal(3)], a, 30)
    u = np.concatenate([(lift_map @ r.T).T for r in runs])
    labels = np.repeat([3, 9], 30)
    t = np.concatenate([0.1 * np.arange(30), 0.1 * np.arange(30)])  # each run restarts its clock
    _write(tmp_path / "a.h5", {"u": u}, t, run=labels)
    store = _run(tmp_path, {"archive": {"path": "a.h5", "fields": ["u"], "time": "t", "runs": "run"},
                            "compress": {"rank": 3, "oversample": 3, "method": "tsqr"}, "fit": {"holdout": 0.2}})
    eigenvalue = read_group(store, "spectrum")["eigenvalue"]
    for value in (0.95, 0.8, -0.6):
        assert _has(eigenvalue, value, 1e-10)
    assert np.all(read_group(store, "spectrum")["residual"] < 1e-8)
    table = read_group(store, "runs")
    assert table["run_length"].tolist() == [30, 30] and table["amplitude"].shape == (2, 3)


# -- EDMD ----------------------------------------------------------------------------------


def _slow_manifold(x0: np.ndarray, mu: float, lam: float, t: np.ndarray) -> np.ndarray:
    # exact solution of x1' = mu x1, x2' = lam (x2 - x1^2)
    b = lam / (lam - 2 * mu)
    x1 = x0[0] * np.exp(mu * t)
    x2 = (x0[1] - b * x0[0] ** 2) * np.exp(lam * t) + b * x1**2
    return np.stack([x1, x2], axis=1)


def test_edmd_on_state_from_many_short_runs(tmp_path: Path) -> None:
    # Brunton, Brunton, Proctor & Kutz (2016, PLoS ONE): with monomials of degree 2 the
    # system has continuous eigenvalues 0, mu, lambda, 2 mu on an invariant subspace;
    # many short trajectories in separate files, each a run
    mu, lam, dt = -0.05, -1.0, 0.1
    rng = np.random.default_rng(2)
    t = dt * np.arange(12)
    paths = []
    for k in range(10):
        states = _slow_manifold(rng.uniform(-1, 1, 2), mu, lam, t)
        name = f"run{k}.h5"
        _write(tmp_path / name, {"x1": states[:, :1], "x2": states[:, 1:]}, t)
        paths.append(name)
    store = _run(tmp_path, {"archive": {"path": paths, "fields": ["x1", "x2"], "time": "t"},
                            "prepare": {"scale": "none"}, "compress": {"rank": 2, "oversample": 0, "method": "tsqr"},
                            "lift": [{"kind": "monomials", "degree": 2, "on": "state"}],
                            "fit": {"method": "edmd"}})
    spectrum = read_group(store, "spectrum")
    rate = spectrum["rate"]
    for value in (0.0, mu, lam, 2 * mu):
        k = int(np.argmin(np.abs(rate - value)))
        assert abs(rate[k] - value) < 1e-6
        assert spectrum["residual"][k] < 1e-8 and spectrum["trusted"][k]
    assert not np.all(spectrum["trusted"])  # x1 x2 and x2^2 do not close: spurious, untrusted
    trusted = spectrum["trusted"].astype(bool)
    assert spectrum["ranking"][trusted].max() < spectrum["ranking"][~trusted].min()  # trusted modes rank first
    values = read_group(store, "eigenfunctions")["value"]
    assert values.shape == (rate.size, 120)
    assert read_group(store, "runs")["run_length"].tolist() == [12] * 10
    modes = read_group(store, "modes")
    assert modes["x1"].shape == (rate.size, 1)  # the field is stored (snapshot, 1): one point


def test_edmd_on_coefficients_of_a_field(tmp_path: Path) -> None:
    # the same system carried by a field u(x, t) = x1(t) a(x) + x2(t) b(x): its two
    # coefficients are a linear image of (x1, x2), and monomials of degree 2 of them span
    # the same space, so the eigenvalues mu, lambda, 2 mu are exact (Williams et al. 2015:
    # EDMD is invariant under an invertible linear change of the dictionary)
    mu, lam, dt = -0.05, -1.0, 0.1
    t = dt * np.arange(200)
    states = _slow_manifold(np.array([0.8, -0.3]), mu, lam, t)
    x = np.linspace(0, 1, 50)
    u = states[:, :1] * np.sin(np.pi * x)[None, :] + states[:, 1:] * np.sin(2 * np.pi * x)[None, :]
    _write(tmp_path / "a.h5", {"u": u}, t)
    store = _run(tmp_path, {"archive": {"path": "a.h5", "fields": ["u"], "time": "t"},
                            "compress": {"rank": 2, "oversample": 2, "method": "tsqr"},
                            "lift": [{"kind": "monomials", "degree": 2}], "fit": {"method": "edmd"}})
    rate = _continuous(store)
    for value in (mu, lam, 2 * mu):
        assert _has(rate, value, 1e-6)
    import zarr

    lift = dict(zarr.open_group(str(store), mode="r")["operator"].attrs)["lift"]
    assert lift["terms"] == 6 and lift["way_back"] == "identity"  # C(2 + 2, 2) = 6 monomials
    assert lift["state_projection_error"] < 1e-12
    assert read_group(store, "modes")["u"].shape == (rate.size, 50)


@pytest.mark.slow  # ~18 s: builds the lifted matrix up to the budget
def test_edmd_lifted_matrix_over_budget_fails_with_numbers(tmp_path: Path) -> None:
    # degree 8 on 20 coefficients is C(28, 8) = 3108105 terms (binomial count, handbook formula):
    # 3108105 x 59 samples x 16 bytes = 2.9 GB, above a 2 GiB budget that does hold the
    # process and the compress tiles (compress.memory bounds the whole process tree)
    rng = np.random.default_rng(0)
    _write(tmp_path / "a.h5", {"u": rng.standard_normal((60, 40))}, 0.1 * np.arange(60))
    with pytest.raises(ConfigError, match=r"3108105 terms .* above the memory budget.*lower the monomial degree"):
        _run(tmp_path, {"archive": {"path": "a.h5", "fields": ["u"], "time": "t"},
                        "compress": {"rank": 20, "oversample": 5, "memory": "2GiB"},
                        "lift": [{"kind": "monomials", "degree": 8}], "fit": {"method": "edmd"}})


# -- optimized DMD -------------------------------------------------------------------------


def test_optimized_on_uneven_times(tmp_path: Path) -> None:
    # damped oscillation u = Re(phi exp(omega t)) sampled at uneven times: DMD refuses the
    # archive (no fixed step); optimized DMD (Askham & Kutz 2018) recovers omega
    omega = -0.2 + 2j * np.pi * 0.7
    rng = np.random.default_rng(5)
    t = np.sort(rng.uniform(0, 10, 80))
    x = np.linspace(0, 1, 25)
    phi = np.exp(1j * np.pi * x) * (1 + x)
    u = (phi[None, :] * np.exp(omega * t)[:, None]).real
    _write(tmp_path / "a.h5", {"u": u}, t)
    store = _run(tmp_path, {"archive": {"path": "a.h5", "fields": ["u"], "time": "t"},
                            "compress": {"rank": 2, "oversample": 2, "method": "tsqr"},
                            "prepare": {"scale": "none"}, "fit": {"method": "optimized"}})
    rate = _continuous(store)
    assert _has(rate, omega, 1e-8) and _has(rate, omega.conjugate(), 1e-8)


# -- schema --------------------------------------------------------------------------------


@pytest.mark.parametrize(("lift", "fit", "message"), [
    ([{"kind": "monomials", "degree": 2}], {}, r"lift\[0\] \(monomials\).*needs fit.method: edmd"),
    ([], {"method": "edmd"}, r"edmd needs a dictionary in lift"),
    ([{"kind": "delays", "count": 2}, {"kind": "delays", "count": 3}], {}, r"only one 'delays' entry"),
    ([{"kind": "pointwise", "terms": ["x", "tan"]}], {}, r"lift.0.pointwise.terms.1"),
    ([{"kind": "expressions", "formulas": {"e": "x0 +* 2"}}], {"method": "edmd"}, r"column|position"),
    ([{"kind": "monomials", "degree": 2, "on": "state"}, {"kind": "rbf", "on": "coefficients"}],
     {"method": "edmd"}, r"same 'on'"),
    ([{"kind": "fourier", "harmonics": 2}], {"method": "edmd", "debias": "total-least-squares"},
     r"debias applies to method 'dmd'"),
    ([{"kind": "wavelets"}], {}, r"lift.0.*kind|discriminator|wavelets"),
])
def test_schema_rejects_bad_lift(lift: list, fit: dict, message: str) -> None:
    from snaplift.workflow.schema import parse_workflow

    with pytest.raises(ConfigError, match=message):
        parse_workflow({"archive": {"path": "a.h5", "fields": ["u"]}, "lift": lift, "fit": fit})


def test_unquoted_on_key_in_yaml() -> None:
    # YAML 1.1 reads an unquoted `on` as true (PyYAML, yaml.org/type/bool.html); the lift
    # entry must still mean `on: state`
    from snaplift.workflow.schema import parse_workflow

    text = """
archive: {path: a.h5, fields: [x1, x2]}
lift:
  - kind: monomials
    degree: 2
    on: state
fit: {method: edmd}
"""
    workflow = parse_workflow(yaml.safe_load(text))
    assert workflow.state_source == "state"


def test_pendulum_through_the_workflow(tmp_path: Path) -> None:
    # theta'' = -sin(theta) released at 160 degrees; exact period 4 K(k), k = sin(theta0 / 2)
    # (Abramowitz & Stegun 17.3 / DLMF 22.19; scipy.special.ellipk takes m = k^2). EDMD with
    # cubic monomials of the raw state gets it within 0.5 %, the fundamental being the
    # first oscillating mode of the store's own ranking (trusted first, then amplitude)
    import scipy.integrate
    import scipy.special

    theta0, dt = np.deg2rad(160.0), 0.1
    t = dt * np.arange(1200)
    solution = scipy.integrate.solve_ivp(lambda _, s: [s[1], -np.sin(s[0])], (0.0, t[-1]), [theta0, 0.0],
                                         t_eval=t, method="DOP853", rtol=1e-12, atol=1e-12)
    period = 4.0 * scipy.special.ellipk(np.sin(theta0 / 2) ** 2)
    _write(tmp_path / "a.h5", {"theta": solution.y[0], "omega": solution.y[1]}, t)
    store = _run(tmp_path, {"archive": {"path": "a.h5", "fields": ["theta", "omega"], "time": "t"},
                            "prepare": {"scale": "none"}, "compress": {"rank": 2, "oversample": 0, "method": "tsqr"},
                            "lift": [{"kind": "monomials", "degree": 3, "on": "state"}], "fit": {"method": "edmd"}})
    spectrum = read_group(store, "spectrum")
    candidates = np.flatnonzero(spectrum["frequency"] > 0)
    fundamental = candidates[np.argmin(spectrum["ranking"][candidates])]
    assert spectrum["trusted"][fundamental]
    assert abs(spectrum["period"][fundamental] - period) / period < 5e-3


def test_edmd_rank_may_exceed_the_coefficients() -> None:
    # the truncation of the lifted data: degree 2 of 6 coefficients is C(8, 2) = 28 terms
    from snaplift.workflow.schema import parse_workflow

    data = {"archive": {"path": "a.h5", "fields": ["u"]}, "compress": {"rank": 6},
            "lift": [{"kind": "monomials", "degree": 2}], "fit": {"method": "edmd", "rank": 20}}
    assert parse_workflow(data).fit.rank == 20
    data["fit"] = {"method": "edmd", "coefficients": 8}
    with pytest.raises(ConfigError, match=r"fit.coefficients \(8\) cannot exceed compress.rank \(6\)"):
        parse_workflow(data)


def test_lifted_fields_read_the_archive_once(tmp_path: Path) -> None:
    # four pointwise terms and two delay copies make 8 lifted fields of one archive field;
    # a single-pass sketch still reads each stored byte once, plus the delay window of one
    # snapshot per column block (here 7 blocks of ~9 snapshots: +11 %), not 8 times
    rng = np.random.default_rng(3)
    u = rng.standard_normal((64, 40))
    _write(tmp_path / "a.h5", {"u": u}, 0.1 * np.arange(64))
    path = tmp_path / "w.yaml"
    path.write_text(yaml.safe_dump({
        "archive": {"path": "a.h5", "fields": ["u"], "time": "t"}, "output": {"path": "r.zarr"}, "cluster": "threads",
        "lift": [{"kind": "pointwise", "terms": ["x", "square", "abs", "cos"]}, {"kind": "delays", "count": 2}],
        "compress": {"method": "sketch", "rank": 4}}))
    summary = run_workflow(path)
    record = summary.stages["compress"]
    assert record["passes"] == 1
    assert u.nbytes <= record["bytes_read"] <= 1.15 * u.nbytes
