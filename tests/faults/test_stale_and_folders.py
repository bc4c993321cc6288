"""Issue 11, items 1 and 4: no stale reuse after a rewrite in place; user folders never deleted."""

from __future__ import annotations

import json
import os

import h5py
import numpy as np
import zarr

from snaplift.results.store import read_group


def _singular_values(path) -> np.ndarray:
    return read_group(path, "basis")["singular_value"]


def test_a_snapshot_rewritten_in_place_is_recomputed(faults) -> None:
    archive = faults.hdf5()
    workflow = faults.workflow()
    assert faults.cli("run", workflow, "-q").code == 0
    with h5py.File(archive, "a") as h5:  # the edit: same size, new modification time
        h5["u"][7] = 3 * h5["u"][7] + 1
    again = faults.cli("run", workflow)
    assert again.code == 0, again.stderr
    assert "archive changed" in again.stdout
    attrs = dict(zarr.open_group(str(faults.folder / "r.zarr"), mode="r").attrs)
    assert "a.h5 was rewritten in place" in attrs["stages"]["scan"]["classification_reason"]
    assert attrs["stages"]["compress"]["status"] == "computed"
    fresh = faults.workflow("fresh.yaml", output="fresh.zarr")
    assert faults.cli("run", fresh, "-q").code == 0
    # reference: a run from scratch on the edited archive (same seed, same plan)
    np.testing.assert_allclose(_singular_values(faults.folder / "r.zarr"),
                               _singular_values(faults.folder / "fresh.zarr"), rtol=1e-12)


def test_overwrite_always_recomputes(faults) -> None:
    faults.hdf5()
    workflow = faults.workflow()
    assert faults.cli("run", workflow, "-q").code == 0
    again = faults.cli("run", workflow, "--overwrite")
    assert again.code == 0, again.stderr
    attrs = dict(zarr.open_group(str(faults.folder / "r.zarr"), mode="r").attrs)
    assert {name: r["status"] for name, r in attrs["stages"].items()} == {
        "scan": "computed", "compress": "computed", "fit": "computed", "modes": "computed", "report": "computed"}


def test_a_grown_archive_says_which_old_blocks_were_verified(faults) -> None:
    archive = faults.hdf5()
    workflow = faults.workflow(compress={"method": "sketch", "rank": 4})
    assert faults.cli("run", workflow, "-q").code == 0
    extra = faults.data(30)[24:]
    with h5py.File(archive, "a") as h5:
        h5["u"].resize((30, *extra.shape[1:]))
        h5["u"][24:] = extra
        h5["t"].resize((30,))
        h5["t"][24:] = 0.1 * np.arange(24, 30)
    grown = faults.cli("run", workflow)
    assert grown.code == 0, grown.stderr
    text = " ".join(grown.stdout.split())  # rich wraps lines
    assert "only the sampled blocks" in text and "--overwrite" in text
    attrs = dict(zarr.open_group(str(faults.folder / "r.zarr"), mode="r").attrs)
    scan = attrs["stages"]["scan"]
    assert scan["classification"] == "grown" and scan["verified_blocks"][0] == [0, 1]
    assert attrs["stages"]["compress"]["status"] == "appended"
    assert any("only the sampled blocks" in w for w in attrs["warnings"])


def test_a_user_folder_named_like_the_staging_area_is_left_alone(faults) -> None:
    archive = faults.hdf5()
    workflow = faults.workflow()
    staging = faults.folder / "r.zarr.staging"
    staging.mkdir()
    (staging / "thesis.tex").write_text("my work")
    before = faults.hashes(archive, staging)
    outcome = faults.cli("run", workflow)
    faults.one_line_error(outcome, str(staging), "not made by snaplift")
    assert faults.hashes(archive, staging) == before
    faults.no_complete_store(faults.folder / "r.zarr")


def test_a_user_folder_named_like_the_old_store_is_left_alone(faults) -> None:
    archive = faults.hdf5()
    workflow = faults.workflow()
    assert faults.cli("run", workflow, "-q").code == 0
    old = faults.folder / "r.zarr.old"
    old.mkdir()
    (old / "notes.txt").write_text("keep me")
    before = faults.hashes(archive, old)
    outcome = faults.cli("run", workflow, "--overwrite")
    faults.one_line_error(outcome, str(old), "not made by snaplift")
    assert faults.hashes(archive, old) == before
    # the previous good store is intact
    assert zarr.open_group(str(faults.folder / "r.zarr"), mode="r").attrs["snaplift_complete"]


def test_staging_area_carries_the_marker(faults) -> None:
    faults.hdf5()
    workflow = faults.workflow()
    env = {**os.environ, "SNAPLIFT_FAULT": "compress:1"}  # killed inside compress: the staging area stays
    import subprocess
    import sys

    subprocess.run([sys.executable, "-m", "snaplift.cli", "run", str(workflow)], env=env, cwd=faults.folder,
                   capture_output=True, timeout=300)
    marker = json.loads((faults.folder / "r.zarr.staging" / "identity.json").read_text())
    assert marker["made_by"] == "snaplift" and marker["identity"]
    # and the next run resumes from it (it is snaplift's, so it is used, not refused)
    assert faults.cli("run", workflow, "-q").code == 0
    assert not (faults.folder / "r.zarr.staging").exists()
