"""scan_archive: quick sample vs full NaN/Inf counts, times, plan, JSON output."""

from __future__ import annotations

import json

import h5py
import numpy as np
import pytest

from snaplift.archive import open_archive, scan_archive, snapshot_times
from snaplift.errors import ArchiveError, FieldNotFoundError


@pytest.fixture()
def archive(tmp_path):
    """Invented 12-snapshot archive with NaN at snapshot 0, Inf at snapshot 3 and one
    dropped time step between snapshots 7 and 8."""
    rng = np.random.default_rng(5)
    u = rng.standard_normal((12, 4, 3))
    u[0, 0, 0] = u[0, 2, 1] = np.nan
    u[3, 1, 1], u[3, 3, 2], u[3, 0, 2] = np.inf, -np.inf, np.inf
    p = rng.standard_normal((12, 2, 5)).astype(np.float32)
    times = 0.5 * np.arange(12)
    times[8:] += 0.5
    path = tmp_path / "scan.h5"
    with h5py.File(path, "w") as f:
        f.create_dataset("u", data=u, chunks=(4, 4, 3))
        f.create_dataset("p", data=p, chunks=(3, 2, 5)).attrs["units"] = "Pa"
        f.create_dataset("time", data=times).attrs["units"] = "seconds since 2000-01-01"
    return path, u, p, times


def test_quick_scan_reads_a_sample(archive):
    path, u, p, _ = archive
    report = scan_archive(open_archive(path), sample_snapshots=3)
    values = {v.name: v for v in report.values}
    # np.linspace(0, 11, 3) -> 0, 5.5, 11; round half to even gives snapshot 6
    assert values["u"].snapshots_read == (0, 6, 11)
    assert values["u"].values_read == 3 * 12
    assert (values["u"].nan_count, values["u"].inf_count) == (2, 0)  # Inf is at snapshot 3
    sample = u[[0, 6, 11]]
    assert values["u"].minimum == np.nanmin(sample)  # numpy as the reference
    assert values["u"].maximum == np.nanmax(sample)
    assert values["p"].maximum == float(p[[0, 6, 11]].max())


def test_full_scan_counts_every_value(archive):
    path, u, *_ = archive
    report = scan_archive(open_archive(path), full=True)
    values = {v.name: v for v in report.values}
    assert values["u"].snapshots_read is None
    assert values["u"].values_read == u.size
    assert values["u"].nan_count == int(np.isnan(u).sum()) == 2
    assert values["u"].inf_count == int(np.isinf(u).sum()) == 3
    finite = u[np.isfinite(u)]
    assert (values["u"].minimum, values["u"].maximum) == (finite.min(), finite.max())
    assert any("'u' has 2 NaN and 3 Inf" in w for w in report.warnings)


def test_full_scan_without_a_fitting_plan_still_counts(archive):
    path, u, *_ = archive
    report = scan_archive(open_archive(path), full=True, memory_bytes=4096)
    assert report.plan is None and "compress.memory" in report.plan_error
    values = {v.name: v for v in report.values}
    assert (values["u"].nan_count, values["u"].inf_count, values["u"].values_read) == (2, 3, 144)


def test_report_describes_fields_times_and_plan(archive):
    path, *_ = archive
    report = scan_archive(open_archive(path))
    assert report.format == "hdf5" and report.n_snapshots == 12 and report.files == 1
    fields = {f.name: f for f in report.fields}
    assert fields["p"].stored_dtype == "float32" and fields["p"].units == "Pa"
    assert fields["u"].chunks == (4, 4, 3) and fields["u"].nbytes == 12 * 12 * 8
    assert report.time_source == "time" and report.time_unit == "seconds"
    assert report.time_span == pytest.approx(6.0)  # 0.5 * 11 + 0.5, hand-computed
    assert report.spacing is not None and not report.spacing.uniform
    assert report.spacing.worst_gap_index == 7
    assert any("snapshots 7 and 8" in w for w in report.warnings)
    assert report.plan["chunk"] == 12  # lcm(4, 3)
    assert report.size_bytes > 0
    text = json.dumps(report.to_dict())
    assert json.loads(text)["spacing"]["worst_gap_index"] == 7


def test_fixed_step_and_field_choice(archive):
    path, *_ = archive
    reader = open_archive(path)
    report = scan_archive(reader, fields=["p"], step=0.25)
    assert [f.name for f in report.fields] == ["p"]
    assert report.time_source == "step" and report.spacing.uniform
    assert report.spacing.dt == pytest.approx(0.25)
    np.testing.assert_array_equal(snapshot_times(reader, step=0.25), 0.25 * np.arange(12))
    with pytest.raises(ArchiveError, match="not both"):
        snapshot_times(reader, time="time", step=0.25)
    with pytest.raises(ArchiveError, match="12 values|shape"):
        snapshot_times(reader, time="time", n_snapshots=10)
    with pytest.raises(FieldNotFoundError, match="'w'.*u"):
        scan_archive(reader, fields=["w"])


def test_archive_without_times(tmp_path):
    np.save(tmp_path / "w.npy", np.ones((5, 3)))
    reader = open_archive(tmp_path / "w.npy")
    report = scan_archive(reader)
    assert report.time_source is None and report.spacing is None
    assert any("no snapshot times" in w for w in report.warnings)
    with pytest.raises(ArchiveError, match="no snapshot times found in .*w.npy"):
        snapshot_times(reader)
    np.testing.assert_array_equal(snapshot_times(reader, step=2.0), [0, 2, 4, 6, 8])
