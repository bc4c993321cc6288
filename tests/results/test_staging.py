"""The staging area: torn stages cleared, reuse by hard links, commit, free-space check."""

from __future__ import annotations

from collections import namedtuple
from pathlib import Path

import numpy as np
import pytest
import zarr

from snaplift.errors import ResultStoreError
from snaplift.results import staging
from snaplift.results.staging import StagedStore, check_free_space
from snaplift.results.store import open_result


def test_free_space_check_fails_early_with_the_numbers(tmp_path: Path, monkeypatch: pytest.MonkeyPatch) -> None:
    usage = namedtuple("usage", "total used free")
    monkeypatch.setattr(staging.shutil, "disk_usage", lambda path: usage(10**12, 10**12 - 10**9, 10**9))
    check_free_space(tmp_path, 10**8, "the modes")  # 0.1 GB of 1 GB free: fine
    with pytest.raises(ResultStoreError, match=r"the modes in .*: need about 5\.32 GB .*1\.00 GB free"):
        check_free_space(tmp_path, 5 * 10**9, "the modes")


def test_torn_stage_is_cleared_and_finished_stage_kept(tmp_path: Path) -> None:
    path = tmp_path / "r.zarr"
    store = StagedStore(path, identity="one")
    store.begin("compress")
    store.writer.array("basis", "singular_value", np.arange(3.0), ("rank",))
    store.finish("compress", {"fingerprint": "f1"})
    store.begin("fit")
    store.writer.array("spectrum", "eigenvalue", np.ones(2), ("mode",))  # killed before finish()
    # a new run of the same workflow finds the area again
    again = StagedStore(path, identity="one")
    assert again.record("compress")["fingerprint"] == "f1"
    assert again.record("fit") is None
    again.begin("fit")  # restarting fit deletes what the torn attempt wrote
    assert "eigenvalue" not in again.writer.root.require_group("spectrum")
    np.testing.assert_array_equal(again.writer.root["basis/singular_value"][...], np.arange(3.0))
    again.writer.array("spectrum", "eigenvalue", np.full(2, 0.5), ("mode",))
    again.finish("fit", {"fingerprint": "f2"})
    committed = again.commit({"stages": again.stage_records()})
    assert open_result(committed).attrs["stages"]["fit"]["arrays"] == ["spectrum/eigenvalue"]
    assert not (tmp_path / "r.zarr.staging").exists()


def test_staging_of_another_workflow_is_discarded(tmp_path: Path) -> None:
    path = tmp_path / "r.zarr"
    store = StagedStore(path, identity="one")
    store.begin("scan")
    store.finish("scan", {"fingerprint": "s"})
    other = StagedStore(path, identity="two")
    assert other.discarded and other.record("scan") is None


def test_reuse_links_arrays_of_the_previous_store(tmp_path: Path) -> None:
    path = tmp_path / "r.zarr"
    first = StagedStore(path, identity="one")
    first.begin("compress")
    first.writer.array("basis", "coefficient", np.arange(12.0).reshape(3, 4), ("rank", "snapshot"))
    first.writer.group_attrs("basis", {"note": "kept"})
    first.finish("compress", {"fingerprint": "f"})
    first.commit({"stages": first.stage_records()})
    second = StagedStore(path, identity="one")
    assert second.previous_record("compress") is not None
    second.reuse("compress")
    second.finish("compress", {"fingerprint": "f"})
    chunk = next(p for p in (second.store_path / "basis" / "coefficient").rglob("*") if p.is_file()
                 and p.name != "zarr.json")
    assert chunk.stat().st_nlink == 2  # hard link, not a copy
    second.commit({"stages": second.stage_records()})
    root = zarr.open_group(str(path), mode="r")
    np.testing.assert_array_equal(root["basis/coefficient"][...], np.arange(12.0).reshape(3, 4))
    assert root["basis"].attrs["note"] == "kept"


def test_foreign_folder_is_never_replaced(tmp_path: Path) -> None:
    folder = tmp_path / "r.zarr"
    folder.mkdir()
    (folder / "precious.txt").write_text("keep")
    with pytest.raises(ResultStoreError, match="not a snaplift result store"):
        StagedStore(folder, identity="one", overwrite=True)
    assert (folder / "precious.txt").exists()
