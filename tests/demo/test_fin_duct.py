"""The invented fin-in-a-duct archive: layout, metadata, physics sanity, atomic writing."""

from __future__ import annotations

import dataclasses
import json

import h5py
import numpy as np
import pytest

import snaplift.demo.fin_duct as fin_duct
from snaplift.demo import (
    default_cache_path,
    ensure_fin_duct,
    fin_duct_geometry,
    generate_fin_duct,
    plan_fin_duct,
)
from snaplift.errors import ConfigError

FIELDS = ("u", "v", "T")


@pytest.fixture(scope="module")
def small_archive(tmp_path_factory):
    return generate_fin_duct(tmp_path_factory.mktemp("demo") / "fin-small.h5", size="small")


def _tiny_plan():
    """A few snapshots right after start-up: enough to exercise the writer in a blink."""
    return dataclasses.replace(
        plan_fin_duct("small"), size="tiny", n_snapshots=3, save_every=5,
        ramp_steps=50, transient_steps=60,
    )


def test_layout_and_dtypes(small_archive):
    plan = plan_fin_duct("small")
    n, ny, nx = plan.n_snapshots, plan.ny, plan.nx
    with h5py.File(small_archive, "r") as handle:
        for name in FIELDS:
            ds = handle[name]
            assert ds.shape == (n, ny, nx) and ds.dtype == np.float32
            assert ds.chunks == (1, ny, nx)  # time-major, one snapshot per chunk
        assert handle["t"].shape == (n,) and handle["t"].dtype == np.float64
        assert handle["x"].shape == (nx,) and handle["y"].shape == (ny,)
        assert handle["cell_area"].shape == (ny, nx) and handle["cell_area"].dtype == np.float64
        assert handle["solid"].shape == (ny, nx) and handle["solid"].dtype == np.bool_
        for name in (*FIELDS, "t", "x", "y", "cell_area", "solid"):
            assert handle[name].attrs["units"] and handle[name].attrs["long_name"]
        assert handle["t"].attrs["units"] == "s"
        assert handle["T"].attrs["units"] == "K"
        attrs = handle.attrs
        assert attrs["complete"]
        assert "invented" in attrs["source"] and "not a validated simulation" in attrs["source"]
        assert attrs["snaplift_demo_size"] == "small"
        assert attrs["reynolds_number"] == 100.0
        for key in ("title", "fin_height_m", "lattice_tau", "saving_interval_s"):
            assert key in attrs
        assert json.loads(attrs["lattice_plan"]) == dataclasses.asdict(plan)


def test_coordinates_time_and_areas(small_archive):
    with h5py.File(small_archive, "r") as handle:
        attrs = dict(handle.attrs)
        x, y, t = handle["x"][:], handle["y"][:], handle["t"][:]
        area = handle["cell_area"][:]
    dx = attrs["lattice_spacing_m"]
    np.testing.assert_allclose(np.diff(x), dx, rtol=1e-12)
    np.testing.assert_allclose(np.diff(y), dx, rtol=1e-12)
    # cell centres: half a cell inside both duct walls
    assert y[0] == pytest.approx(dx / 2) and y[-1] == pytest.approx(attrs["duct_height_m"] - dx / 2)
    np.testing.assert_allclose(np.diff(t), attrs["saving_interval_s"], rtol=1e-9)
    assert area.sum() == pytest.approx(attrs["duct_height_m"] * attrs["duct_length_m"], rel=1e-12)
    # Reynolds number from the stored SI values (definition in the file attrs)
    speed, height = attrs["inlet_mean_speed_m_s"], attrs["fin_height_m"]
    reynolds = speed * height / attrs["kinematic_viscosity_m2_s"]
    assert reynolds == pytest.approx(attrs["reynolds_number"], rel=1e-9)


def test_solid_mask_is_the_fin(small_archive):
    plan = plan_fin_duct("small")
    with h5py.File(small_archive, "r") as handle:
        solid = handle["solid"][:]
        x, y = handle["x"][:], handle["y"][:]
        attrs = dict(handle.attrs)
        fields = {name: handle[name][:] for name in FIELDS}
    np.testing.assert_array_equal(solid, fin_duct_geometry(plan)[1][1:-1])
    assert solid.sum() == plan.fin_height * plan.fin_thickness
    rows, cols = np.nonzero(solid)
    dx = attrs["lattice_spacing_m"]
    assert x[cols].min() - dx / 2 == pytest.approx(attrs["fin_leading_face_x_m"])
    assert x[cols].max() - x[cols].min() + dx == pytest.approx(attrs["fin_thickness_m"])
    assert y[rows].max() - y[rows].min() + dx == pytest.approx(attrs["fin_height_m"])
    assert y[rows].mean() == pytest.approx(attrs["fin_centre_y_m"])
    assert y[rows].mean() != pytest.approx(attrs["duct_height_m"] / 2)  # off-centre on purpose
    assert (fields["u"][:, solid] == 0).all() and (fields["v"][:, solid] == 0).all()
    np.testing.assert_allclose(fields["T"][:, solid], attrs["fin_temperature_K"], rtol=1e-6)


def test_values_are_finite_and_physically_plausible(small_archive):
    with h5py.File(small_archive, "r") as handle:
        attrs = dict(handle.attrs)
        u, T = handle["u"][:], handle["T"][:]
        solid = handle["solid"][:]
        for name in FIELDS:
            assert np.isfinite(handle[name][:]).all()
    t_in, t_fin = attrs["inlet_temperature_K"], attrs["fin_temperature_K"]
    # Maximum principle of advection-diffusion (any PDE text): fluid temperatures stay
    # between inlet and fin values; 15 % of the difference is allowed for the documented
    # lattice undershoot at this coarse grid (common practice).
    margin = 0.15 * (t_fin - t_in)
    assert T[:, ~solid].min() > t_in - margin and T[:, ~solid].max() < t_fin
    assert T[:, ~solid].mean() > t_in  # the fin heats the air
    # Continuity: the time-mean volume flux through every cross-section equals the inlet
    # flux; the lattice is weakly compressible, so allow 5 % (common practice).
    dx = attrs["lattice_spacing_m"]
    flux = u.mean(axis=0).sum(axis=0) * dx
    inlet_flux = attrs["inlet_mean_speed_m_s"] * attrs["duct_height_m"]
    np.testing.assert_allclose(flux, inlet_flux, rtol=0.05)


def test_the_fin_sheds_vortices(small_archive):
    plan = plan_fin_duct("small")
    with h5py.File(small_archive, "r") as handle:
        attrs = dict(handle.attrs)
        t = handle["t"][:]
        column = plan.fin_x + plan.fin_thickness + 3 * plan.fin_height
        probe = handle["v"][:, plan.ny // 2, column].astype(float)
    speed = attrs["inlet_mean_speed_m_s"]
    # A steady wake would leave v ~ 0 on the centre line; shedding makes it swing by a
    # good fraction of the inlet speed (threshold 0.2: common practice for "clearly unsteady").
    assert probe.std() > 0.2 * speed
    # The swing is periodic: one dominant spectral peak holding most of the energy.
    signal = probe - probe.mean()
    spectrum = np.abs(np.fft.rfft(signal * np.hanning(signal.size))) ** 2
    frequency = np.fft.rfftfreq(signal.size, t[1] - t[0])
    peak = int(np.argmax(spectrum))
    assert spectrum[max(peak - 2, 0) : peak + 3].sum() > 0.7 * spectrum.sum()
    # Strouhal numbers of bluff-body shedding are of order 0.1-0.4 (common practice).
    strouhal = frequency[peak] * attrs["fin_height_m"] / speed
    assert 0.1 < strouhal < 0.45
    # several periods are saved, each by many snapshots
    assert frequency[peak] * (t[-1] - t[0]) > 3
    assert 1.0 / (frequency[peak] * (t[1] - t[0])) > 10


def test_same_seed_same_data_other_seed_other_data(tmp_path):
    plan = _tiny_plan()
    first = generate_fin_duct(tmp_path / "a.h5", size=plan, seed=3)
    second = generate_fin_duct(tmp_path / "b.h5", size=plan, seed=3)
    third = generate_fin_duct(tmp_path / "c.h5", size=plan, seed=4)
    with h5py.File(first) as a, h5py.File(second) as b, h5py.File(third) as c:
        np.testing.assert_array_equal(a["v"][:], b["v"][:])
        assert not np.array_equal(a["v"][:], c["v"][:])
        assert a.attrs["seed"] == 3 and c.attrs["seed"] == 4


def test_file_size_matches_the_plan(tmp_path):
    plan = _tiny_plan()
    path = generate_fin_duct(tmp_path / "tiny.h5", size=plan)
    overhead = path.stat().st_size - plan.nbytes
    # coordinates, areas, mask and HDF5 metadata only
    assert 0 < overhead < 8 * plan.ny * plan.nx * 2 + 200_000


def test_byte_sizes_are_planned_to_the_requested_size():
    default = plan_fin_duct("default")
    for size, target in (("500MB", 500e6), ("2GB", 2e9), ("4GiB", 4 * 2**30)):
        plan = plan_fin_duct(size)
        assert plan.nbytes == pytest.approx(target, rel=0.01)
        assert plan.ny > default.ny and plan.n_snapshots > default.n_snapshots
        assert plan.fin_height / plan.ny == default.fin_height / default.ny
        assert plan.viscosity * 3 + 0.5 > 0.5  # a valid relaxation time
    assert plan_fin_duct(" 2 gb ").size == "2GB"
    assert plan_fin_duct("DEFAULT") == default


@pytest.mark.parametrize("size", ["huge", "12", "-5MB", "10kB", 500])
def test_bad_sizes_are_rejected(size):
    with pytest.raises(ConfigError, match="demo size"):
        plan_fin_duct(size)


@pytest.mark.parametrize(
    "change",
    [{"n_snapshots": 0}, {"ramp_steps": 5000}, {"fin_height": 40}, {"fin_x": 149},
     {"dtype": "float16"}],
    ids=["no-snapshots", "ramp-after-transient", "fin-too-tall", "fin-at-outlet", "dtype"],
)  # fmt: skip
def test_impossible_plans_are_rejected(change):
    with pytest.raises(ConfigError, match="demo plan"):
        dataclasses.replace(plan_fin_duct("small"), **change)


def test_existing_file_is_not_overwritten(tmp_path):
    target = tmp_path / "fin.h5"
    target.write_bytes(b"keep me")
    with pytest.raises(ConfigError, match="already exists"):
        generate_fin_duct(target, size=_tiny_plan())
    assert target.read_bytes() == b"keep me"
    generate_fin_duct(target, size=_tiny_plan(), overwrite=True)
    with h5py.File(target) as handle:
        assert handle.attrs["complete"]


@pytest.mark.parametrize("existing", [False, True], ids=["new", "replace"])
def test_failed_generation_leaves_no_file(tmp_path, monkeypatch, existing):
    target = tmp_path / "fin.h5"
    if existing:
        target.write_bytes(b"old archive")
    real = fin_duct._simulate

    def fail_midway(plan, seed, save, progress):
        def save_then_fail(index, *fields):
            save(index, *fields)
            if index == 1:
                raise RuntimeError("killed")

        real(plan, seed, save_then_fail, progress)

    monkeypatch.setattr(fin_duct, "_simulate", fail_midway)
    with pytest.raises(RuntimeError, match="killed"):
        generate_fin_duct(target, size=_tiny_plan(), overwrite=True)
    if existing:
        assert target.read_bytes() == b"old archive"
    else:
        assert not target.exists()
    assert sorted(p.name for p in tmp_path.iterdir()) == (["fin.h5"] if existing else [])


def test_progress_is_reported(tmp_path):
    calls = []
    plan = _tiny_plan()
    generate_fin_duct(
        tmp_path / "fin.h5", size=plan, progress=lambda done, total: calls.append((done, total))
    )
    assert calls and calls[-1] == (plan.total_steps, plan.total_steps)
    assert [done for done, _ in calls] == sorted(done for done, _ in calls)


def test_cache_path(monkeypatch, tmp_path):
    monkeypatch.setenv("SNAPLIFT_CACHE", str(tmp_path))
    assert default_cache_path() == tmp_path / "demo" / "fin-duct-default.h5"
    assert default_cache_path("2 gb", seed=7) == tmp_path / "demo" / "fin-duct-2GB-seed7.h5"
    monkeypatch.delenv("SNAPLIFT_CACHE")
    monkeypatch.setenv("XDG_CACHE_HOME", str(tmp_path / "xdg"))
    expected = tmp_path / "xdg" / "snaplift" / "demo" / "fin-duct-small.h5"
    assert default_cache_path("small") == expected


def test_ensure_reuses_a_complete_archive_and_remakes_a_broken_one(
    small_archive, monkeypatch, tmp_path
):
    monkeypatch.setenv("SNAPLIFT_CACHE", str(tmp_path))
    cached = default_cache_path("small")
    cached.parent.mkdir(parents=True)
    cached.write_bytes(small_archive.read_bytes())
    calls = []

    def fake_generate(path, **options):
        calls.append(options)
        return path

    monkeypatch.setattr(fin_duct, "generate_fin_duct", fake_generate)
    assert ensure_fin_duct("small") == cached and calls == []
    with h5py.File(cached, "r+") as handle:
        del handle.attrs["complete"]
    assert ensure_fin_duct("small") == cached and len(calls) == 1
    cached.write_bytes(b"not hdf5")
    ensure_fin_duct("small")
    assert len(calls) == 2 and calls[-1]["overwrite"] is True

