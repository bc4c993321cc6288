"""Stage fingerprints: what a second run reuses, and how the archive is classified."""

from __future__ import annotations

from pathlib import Path

import h5py
import numpy as np
import pytest
import yaml
import zarr

from snaplift.errors import ResultStoreError
from snaplift.results.store import read_group
from snaplift.workflow.runner import run_workflow

SNAPSHOTS = 48


def _archive(path: Path, m: int = SNAPSHOTS, seed: int = 0) -> None:
    # a low-rank linear system plus a little noise, stored time-major and growable
    rng = np.random.default_rng(seed)
    pairs = np.array([0.97 * np.exp(0.4j), 0.9 * np.exp(1.2j)])
    phi = rng.standard_normal((90, 2)) + 1j * rng.standard_normal((90, 2))
    x = (phi @ (pairs[:, None] ** np.arange(m)[None, :])).real.T.reshape(m, 9, 10)
    x += 1e-3 * rng.standard_normal(x.shape)
    with h5py.File(path, "w") as h5:
        h5.create_dataset("t", data=0.1 * np.arange(m), maxshape=(None,))
        h5.create_dataset("u", data=x, chunks=(1, 9, 10), maxshape=(None, 9, 10))


def _grow(path: Path, extra: int) -> None:
    rng = np.random.default_rng(99)
    with h5py.File(path, "a") as h5:
        m = h5["u"].shape[0]
        h5["u"].resize((m + extra, 9, 10))
        h5["u"][m:] = rng.standard_normal((extra, 9, 10))
        h5["t"].resize((m + extra,))
        h5["t"][m:] = 0.1 * np.arange(m, m + extra)


def _workflow(folder: Path, name: str = "w.yaml", **sections) -> Path:
    data = {"archive": {"path": "a.h5", "fields": ["u"], "time": "t"}, "output": {"path": "r.zarr"},
            "cluster": "threads", "compress": {"rank": 6, "oversample": 4}, "fit": {"rank": 4}}
    data.update(sections)
    path = folder / name
    path.write_text(yaml.safe_dump(data))
    return path


def _statuses(summary) -> dict[str, str]:
    return {name: record["status"] for name, record in summary.stages.items()}


def test_changed_fit_reuses_compress_and_reads_nothing(tmp_path: Path) -> None:
    _archive(tmp_path / "a.h5")
    first = run_workflow(_workflow(tmp_path))
    assert first.stages["compress"]["status"] == "computed"
    # 4 passes (randomized SVD, q = 1: 2 + 2q; Halko et al. 2011) over 48 x 90 float64 values,
    # which the in-memory path (a small matrix) reads from the archive once
    assert first.stages["compress"]["passes"] == 4
    assert first.stages["compress"]["bytes_read"] == SNAPSHOTS * 90 * 8
    second = run_workflow(_workflow(tmp_path, fit={"rank": 3}))
    assert _statuses(second)["compress"] == "reused"
    assert _statuses(second)["fit"] == "computed"
    assert second.bytes_read == 0  # nothing read from the archive, not even the content sample
    attrs = dict(zarr.open_group(str(second.path), mode="r").attrs)
    assert attrs["stages"]["compress"]["bytes_read"] == 0
    assert attrs["stages"]["compress"]["bytes_read_before"] == first.stages["compress"]["bytes_read"]
    assert read_group(second.path, "spectrum")["eigenvalue"].size == 3
    # the reused basis is the one computed before, to the last bit
    np.testing.assert_array_equal(read_group(first.path, "basis")["singular_value"],
                                  read_group(second.path, "basis")["singular_value"])


def test_reused_compress_gives_the_same_fit_as_a_fresh_run(tmp_path: Path) -> None:
    _archive(tmp_path / "a.h5")
    run_workflow(_workflow(tmp_path))
    reused = run_workflow(_workflow(tmp_path, fit={"rank": 3}))
    fresh = run_workflow(_workflow(tmp_path, "fresh.yaml", fit={"rank": 3}, output={"path": "fresh.zarr"}))
    assert fresh.stages["compress"]["status"] == "computed"
    # same numbers whether the compress result came from memory or from the store
    # (reference: the fresh run; the basis round trip through field units is ~1e-16)
    for group, name in (("spectrum", "eigenvalue"), ("modes", "u"), ("diagnostics", "reconstruction_error")):
        a = read_group(reused.path, group)[name]
        b = read_group(fresh.path, group)[name]
        np.testing.assert_allclose(a, b, rtol=1e-12, atol=1e-12 * np.nanmax(np.abs(b)))


def test_same_workflow_twice_reuses_everything(tmp_path: Path) -> None:
    _archive(tmp_path / "a.h5")
    run_workflow(_workflow(tmp_path))
    again = run_workflow(_workflow(tmp_path))
    assert _statuses(again) == {"scan": "computed", "compress": "reused", "fit": "reused", "modes": "reused",
                                "report": "computed"}
    assert again.archive_state == "unchanged"


def test_changed_compress_reruns_compress_and_after(tmp_path: Path) -> None:
    _archive(tmp_path / "a.h5")
    run_workflow(_workflow(tmp_path))
    changed = run_workflow(_workflow(tmp_path, compress={"rank": 5, "oversample": 4}))
    assert _statuses(changed)["compress"] == "computed"
    assert _statuses(changed)["fit"] == "computed" and _statuses(changed)["modes"] == "computed"
    assert read_group(changed.path, "basis")["singular_value"].size == 5
    # the tile budget does not change results, so it does not force a rerun
    budget = run_workflow(_workflow(tmp_path, compress={"rank": 5, "oversample": 4, "memory": "4GiB"}))
    assert _statuses(budget)["compress"] == "reused"


def test_archive_opened_for_writing_is_recomputed(tmp_path: Path) -> None:
    # issue 11: sampling cannot prove a rewritten file unchanged, so a file written to
    # without new snapshots is 'changed' (recomputed), never reused
    _archive(tmp_path / "a.h5")
    run_workflow(_workflow(tmp_path))
    with h5py.File(tmp_path / "a.h5", "a") as h5:
        h5.attrs["note"] = "opened for writing, data untouched"
    again = run_workflow(_workflow(tmp_path))
    assert again.archive_state == "changed"
    assert _statuses(again)["compress"] == "computed"


def test_untouched_archive_is_unchanged_and_reads_nothing(tmp_path: Path) -> None:
    _archive(tmp_path / "a.h5")
    run_workflow(_workflow(tmp_path))
    again = run_workflow(_workflow(tmp_path))
    assert again.archive_state == "unchanged"
    assert _statuses(again)["compress"] == "reused"
    assert again.stages["scan"]["bytes_read"] == 0


def test_changed_snapshot_in_the_sample_reruns(tmp_path: Path) -> None:
    _archive(tmp_path / "a.h5")
    run_workflow(_workflow(tmp_path))
    # grown (the append path samples old blocks) and an old sampled block changed
    _grow(tmp_path / "a.h5", 4)
    with h5py.File(tmp_path / "a.h5", "a") as h5:
        h5["u"][0] = 0.0  # the first block is always sampled
    again = run_workflow(_workflow(tmp_path))
    assert again.archive_state == "changed"
    assert "snapshots 0..0 differ" in again.stages["scan"]["classification_reason"]
    assert _statuses(again)["compress"] == "computed"


def test_grown_archive_is_classified_grown(tmp_path: Path) -> None:
    _archive(tmp_path / "a.h5")
    run_workflow(_workflow(tmp_path))
    _grow(tmp_path / "a.h5", 6)
    grown = run_workflow(_workflow(tmp_path))
    assert grown.archive_state == "grown"
    assert "6 snapshot(s) added after 48" in grown.stages["scan"]["classification_reason"]
    assert read_group(grown.path, "basis")["coefficient"].shape == (6, SNAPSHOTS + 6)
    if grown.stages["compress"]["status"] == "computed":
        assert any("no append path" in w for w in grown.warnings)


def test_store_of_another_archive_refused_unless_overwrite(tmp_path: Path) -> None:
    _archive(tmp_path / "a.h5")
    _archive(tmp_path / "b.h5", seed=1)
    run_workflow(_workflow(tmp_path))
    other = _workflow(tmp_path, "other.yaml", archive={"path": "b.h5", "fields": ["u"], "time": "t"})
    with pytest.raises(ResultStoreError, match="different workflow .*--overwrite"):
        run_workflow(other)
    replaced = run_workflow(other, overwrite=True)
    assert zarr.open_group(str(replaced.path), mode="r").attrs["archive"].endswith("b.h5")


def test_provenance_per_stage(tmp_path: Path) -> None:
    _archive(tmp_path / "a.h5")
    summary = run_workflow(_workflow(tmp_path))
    attrs = dict(zarr.open_group(str(summary.path), mode="r").attrs)
    assert "fit:" in attrs["workflow"] and len(attrs["workflow_fingerprint"]) == 16
    assert attrs["archive_fingerprint"]["files"] == 1
    assert attrs["archive_fingerprint"]["bytes"] == (tmp_path / "a.h5").stat().st_size
    assert {"numpy", "dask", "distributed", "zarr", "snaplift"} <= set(attrs["versions"])
    assert attrs["host"] and attrs["started"] < attrs["finished"]
    assert set(attrs["stages"]) == {"scan", "compress", "fit", "modes", "report"}
    for record in attrs["stages"].values():
        assert {"fingerprint", "status", "passes", "bytes_read"} <= set(record)
    assert attrs["stages"]["compress"]["passes"] == 4
    assert attrs["cluster"]["kind"] == "threads"
    assert isinstance(attrs["warnings"], list)
    assert not (tmp_path / "r.zarr.staging").exists() and not (tmp_path / "r.zarr.lease").exists()


def test_grown_archive_extends_the_sketch_reading_only_new_snapshots(tmp_path: Path) -> None:
    _archive(tmp_path / "a.h5")
    sketch = {"method": "sketch", "rank": 4, "seed": 3}
    run_workflow(_workflow(tmp_path, compress=sketch))
    _grow(tmp_path / "a.h5", 8)
    grown = run_workflow(_workflow(tmp_path, compress=sketch))
    assert grown.stages["compress"]["status"] == "appended"
    assert grown.stages["compress"]["bytes_read"] == 8 * 90 * 8  # the 8 new snapshots, once
    fresh = run_workflow(_workflow(tmp_path, "fresh.yaml", compress=sketch, output={"path": "fresh.zarr"}))
    assert fresh.stages["compress"]["status"] == "computed"
    # reference: a from-scratch sketch of all snapshots with the same seed (Tropp et al. 2019:
    # the sketches are linear in the data, so the update equals the batch result to rounding)
    for group, name in (("basis", "singular_value"), ("basis", "coefficient"), ("sketch", "range_sketch")):
        a, b = read_group(grown.path, group)[name], read_group(fresh.path, group)[name]
        np.testing.assert_allclose(a, b, rtol=1e-12, atol=1e-12 * np.abs(b).max())
