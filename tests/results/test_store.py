"""Result store: zarr v3, dimension names, no _FillValue, atomic commit, xarray-readable."""

from __future__ import annotations

import json
from pathlib import Path

import numpy as np
import pytest
import xarray as xr
import zarr

from snaplift.errors import ResultStoreError
from snaplift.results.store import StoreWriter, grid_dimensions, open_result, read_group


def _write(path: Path, fingerprint: str = "abc", **kwargs) -> Path:
    writer = StoreWriter(path, workflow_fingerprint=fingerprint, **kwargs)
    writer.array("spectrum", "eigenvalue", np.array([0.9 + 0.1j, 0.9 - 0.1j]), ("mode",))
    writer.array("spectrum", "amplitude", np.array([2.0, 2.0]), ("mode",))
    modes = writer.empty("modes", "u", (2, 3, 4), np.complex128, ("mode", "y", "x"), chunks=(1, 3, 4))
    modes[0] = np.full((3, 4), 1 + 2j)
    modes[1] = np.full((3, 4), np.nan + 0j)
    return writer.commit({"workflow_fingerprint": fingerprint})


def test_layout_and_metadata(tmp_path: Path) -> None:
    path = _write(tmp_path / "r.zarr")
    root = zarr.open_group(str(path), mode="r")
    assert root.metadata.zarr_format == 3
    meta = json.loads((path / "spectrum" / "eigenvalue" / "zarr.json").read_text())
    assert meta["dimension_names"] == ["mode"]
    assert "_FillValue" not in meta.get("attributes", {})
    assert np.iscomplexobj(root["modes/u"][...])  # complex arrays are native
    assert json.loads((path / "zarr.json").read_text()).get("consolidated_metadata") is not None


def test_xarray_reads_groups(tmp_path: Path) -> None:
    path = _write(tmp_path / "r.zarr")
    spectrum = xr.open_zarr(path, group="spectrum")  # reference reader: xarray
    np.testing.assert_allclose(spectrum["eigenvalue"].values, [0.9 + 0.1j, 0.9 - 0.1j])
    modes = xr.open_zarr(path, group="modes")
    assert modes["u"].dims == ("mode", "y", "x")
    assert np.isnan(modes["u"].values[1]).all()


def test_uncommitted_store_is_not_visible(tmp_path: Path) -> None:
    path = tmp_path / "r.zarr"
    writer = StoreWriter(path, workflow_fingerprint="abc")
    writer.array("spectrum", "amplitude", np.ones(2), ("mode",))
    assert not path.exists()
    writer.abort()
    assert not path.exists() and not list(tmp_path.iterdir())
    with pytest.raises(ResultStoreError, match="does not exist"):
        open_result(path)


def test_other_workflow_refused_unless_overwrite(tmp_path: Path) -> None:
    path = _write(tmp_path / "r.zarr", "one")
    with pytest.raises(ResultStoreError, match="different workflow"):
        StoreWriter(path, workflow_fingerprint="two")
    _write(path, "two", overwrite=True)
    assert open_result(path).attrs["workflow_fingerprint"] == "two"


def test_foreign_folder_never_replaced(tmp_path: Path) -> None:
    folder = tmp_path / "r.zarr"
    folder.mkdir()
    (folder / "precious.txt").write_text("keep")
    with pytest.raises(ResultStoreError, match="not a snaplift result store"):
        StoreWriter(folder, overwrite=True)
    assert (folder / "precious.txt").exists()


def test_read_group_names_missing_group(tmp_path: Path) -> None:
    path = _write(tmp_path / "r.zarr")
    assert set(read_group(path, "spectrum")) == {"eigenvalue", "amplitude"}
    with pytest.raises(ResultStoreError, match="no group 'operator'"):
        read_group(path, "operator")


def test_grid_dimension_names() -> None:
    assert grid_dimensions({"u": (3, 4), "v": (3, 4)}) == {"u": ("y", "x"), "v": ("y", "x")}
    staggered = grid_dimensions({"u": (3, 5), "p": (3, 4)})
    assert staggered == {"u": ("u_y", "u_x"), "p": ("p_y", "p_x")}
