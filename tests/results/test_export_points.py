"""snaplift export to XDMF of stores without a rectilinear grid: fields on scattered points
(Polyvertex at the positions the store keeps) and probes (refused in one line, nothing written).

The XDMF file is checked against the XDMF 3 data model ("XDMF Model and Format", xdmf.org:
element and attribute names, topology / geometry / attribute types, DataItem dimensions) with
an XML parser, and its heavy data is read back with h5py and compared with numpy to the
archive (positions) and to the store read straight with zarr (mode values).
"""

from __future__ import annotations

import subprocess
import sys
import xml.etree.ElementTree as ET
from pathlib import Path

import h5py
import numpy as np
import pytest
import xarray as xr
import yaml
import zarr
from typer.testing import CliRunner

from snaplift.cli import app
from snaplift.errors import ResultStoreError
from snaplift.results import export
from snaplift.results.export import FRAMES, export_xdmf
from snaplift.workflow.runner import run_workflow

runner = CliRunner()

# XDMF 3 model (xdmf.org, "XDMF Model and Format"): the values each attribute may take
TOPOLOGY_TYPES = {"Polyvertex", "Polyline", "Polygon", "Triangle", "Quadrilateral", "Tetrahedron", "Pyramid",
                  "Wedge", "Hexahedron", "Edge_3", "Triangle_6", "Quadrilateral_8", "Tetrahedron_10",
                  "Pyramid_13", "Wedge_15", "Hexahedron_20", "Mixed", "2DSMesh", "2DRectMesh", "2DCoRectMesh",
                  "3DSMesh", "3DRectMesh", "3DCoRectMesh"}
GEOMETRY_COMPONENTS = {"XYZ": 3, "XY": 2}
ATTRIBUTE_TYPES = {"Scalar", "Vector", "Tensor", "Tensor6", "Matrix"}
CENTERS = {"Node", "Cell", "Grid", "Face", "Edge"}
NUMBER_TYPES = {"Float": "f", "Int": "i", "UInt": "u", "Char": "i", "UChar": "u"}


def _points_archive(path: Path, n: int = 40, order: str = "pz px py", axis: bool = True) -> dict[str, np.ndarray]:
    """A temperature field on n scattered points in a duct behind a heated fin (invented data):
    a travelling wave T = 300 + 2 cos(2 pi f t - k x) exp(-y) + 0.5 z, f = 0.7 Hz."""
    rng = np.random.default_rng(3)
    t = 0.05 * np.arange(200)
    positions = {"px": rng.uniform(0.0, 0.5, n), "py": rng.uniform(0.0, 0.1, n), "pz": rng.uniform(0.0, 0.05, n)}
    used = order.split()
    with h5py.File(path, "w") as h5:
        h5["time"] = t
        h5["time"].attrs["units"] = "s"
        for name in used:
            h5[name] = positions[name]
            h5[name].attrs["units"] = "m"
            if axis:
                h5[name].attrs["axis"] = name[1].upper()
        z = positions["pz"] if "pz" in used else 0.0
        h5["T"] = (300.0 + 2.0 * np.cos(2 * np.pi * 0.7 * t[:, None] - 12.0 * positions["px"][None, :])
                   * np.exp(-positions["py"][None, :]) + 0.5 * z)
        h5["T"].attrs["units"] = "K"
        h5["T"].attrs["coordinates"] = order
    return {name: positions[name] for name in used}


def _run(folder: Path, archive: str, fields: list[str], **extra: object) -> Path:
    workflow = {"archive": {"path": archive, "fields": fields, **extra}, "compress": {"method": "tsqr", "rank": 4},
                "output": {"path": f"{Path(archive).stem}.zarr", "report": False}, "cluster": "threads"}
    (folder / f"{Path(archive).stem}.yaml").write_text(yaml.safe_dump(workflow))
    return run_workflow(folder / f"{Path(archive).stem}.yaml").path


def _check_xdmf_model(xdmf: Path) -> dict[str, ET.Element]:
    """Parse ``xdmf``, check it against the XDMF 3 model and its heavy data; the top grids by name."""
    root = ET.parse(xdmf).getroot()
    assert root.tag == "Xdmf" and root.get("Version") == "3.0"
    domains = root.findall("Domain")
    assert len(domains) == 1
    for grid in root.iter("Grid"):
        assert grid.get("GridType", "Uniform") in {"Uniform", "Collection", "Tree", "Subset"}
        if grid.get("GridType") == "Collection":
            assert grid.get("CollectionType") in {"Spatial", "Temporal"}
            continue
        nodes = _check_uniform(xdmf, grid)
        for attribute in grid.findall("Attribute"):
            assert attribute.get("AttributeType") in ATTRIBUTE_TYPES and attribute.get("Center") in CENTERS
            values = _read(xdmf, attribute.find("DataItem"))
            if attribute.get("Center") == "Node" and attribute.get("AttributeType") == "Scalar":
                assert values.size == nodes  # one value per node
    return {g.get("Name"): g for g in domains[0].findall("Grid")}


def _check_uniform(xdmf: Path, grid: ET.Element) -> int:
    """Topology and geometry of one uniform grid agree with each other; the number of nodes."""
    topology, geometry = grid.find("Topology"), grid.find("Geometry")
    kind = topology.get("TopologyType")
    assert kind in TOPOLOGY_TYPES
    if kind in ("2DRectMesh", "3DRectMesh"):
        shape = tuple(int(v) for v in topology.get("Dimensions").split())
        vectors = [_read(xdmf, item) for item in geometry.findall("DataItem")]
        assert geometry.get("GeometryType") == ("VXVY" if kind == "2DRectMesh" else "VXVYVZ")
        assert tuple(v.size for v in vectors[::-1]) == shape  # VX runs along the last dimension
        return int(np.prod(shape))
    assert kind == "Polyvertex"
    count = int(topology.get("NumberOfElements"))
    assert int(topology.get("NodesPerElement")) == 1
    connectivity = _read(xdmf, topology.find("DataItem"))
    components = GEOMETRY_COMPONENTS[geometry.get("GeometryType")]
    (item,) = geometry.findall("DataItem")
    points = _read(xdmf, item)
    assert points.shape == (points.shape[0], components) and connectivity.size == count
    assert connectivity.min() >= 0 and connectivity.max() < points.shape[0]
    return int(points.shape[0])


def _read(xdmf: Path, item: ET.Element) -> np.ndarray:
    """The heavy data of a DataItem: the file and path exist, with the stated Dimensions and type."""
    assert item.get("Format") == "HDF"
    file_name, path = item.text.strip().split(":", 1)
    with h5py.File(xdmf.parent / file_name, "r") as h5:
        assert path in h5, path
        values = np.asarray(h5[path])
    assert values.shape == tuple(int(v) for v in item.get("Dimensions").split())
    assert values.dtype.kind == NUMBER_TYPES[item.get("NumberType", "Float")]
    assert values.dtype.itemsize == int(item.get("Precision", "4"))
    return values


def test_scattered_points_are_polyvertex_at_their_positions(tmp_path: Path) -> None:
    # listed z, x, y; their CF axis attributes order them x, y, z
    positions = _points_archive(tmp_path / "points.h5")
    store = _run(tmp_path, "points.h5", ["T"], time="time")
    # the store keeps each point's position, as xarray shows it
    modes = xr.open_zarr(store, group="modes")
    for letter, name in zip("xyz", ("px", "py", "pz")):
        coordinate = modes.coords[f"position_{letter}"]
        np.testing.assert_array_equal(coordinate.values, positions[name])  # the archive's values, exactly
        assert coordinate.dims == modes["T"].dims[1:] and coordinate.attrs["units"] == "m"
    xdmf, heavy = export_xdmf(store, tmp_path / "out" / "points.xdmf", leading=2)
    grids = _check_xdmf_model(xdmf)
    grid = grids["T"]
    assert grid.find("Topology").get("TopologyType") == "Polyvertex"
    assert grid.find("Geometry").get("GeometryType") == "XYZ"
    xyz = _read(xdmf, grid.find("Geometry/DataItem"))
    # positions read back with h5py equal the archive's datasets (numpy), in x, y, z order
    with h5py.File(tmp_path / "points.h5", "r") as h5:
        np.testing.assert_array_equal(xyz, np.stack([h5["px"][...], h5["py"][...], h5["pz"][...]], axis=1))
    # mode values equal b_k mode_k from the store read straight with zarr (Jovanovic, Schmid &
    # Nichols 2014: b_k = |b_k| exp(i phase_k), the mode's share of the first fitted snapshot)
    root = zarr.open_group(str(store), mode="r")
    stored = np.asarray(root["modes/T"][...])
    amplitude = np.asarray(root["spectrum/amplitude"][...]) * np.exp(1j * np.asarray(root["spectrum/phase"][...]))
    attributes = {a.get("Name"): _read(xdmf, a.find("DataItem")) for a in grid.findall("Attribute")}
    assert len(attributes) == 4 * stored.shape[0]
    for k in range(stored.shape[0]):
        shape = amplitude[k] * stored[k]
        np.testing.assert_allclose(attributes[f"mode{k}_real"], shape.real, rtol=0, atol=1e-14)
        np.testing.assert_allclose(attributes[f"mode{k}_imag"], shape.imag, rtol=0, atol=1e-14)
        np.testing.assert_allclose(attributes[f"mode{k}_magnitude"] * np.exp(1j * attributes[f"mode{k}_phase"]),
                                   shape, atol=1e-12)  # polar form gives the complex value back
    with h5py.File(heavy, "r") as h5:
        assert h5["T/mode_0/real"].attrs["units"] == "K" and h5["T/mode_0/phase"].attrs["units"] == "rad"
        assert h5["T/coordinates/XYZ"].attrs["units"] == "m"  # the archive's unit of px, py, pz
    # the animation: one period of the leading mode (0.7 Hz, the archive's wave) on the same points
    series = grids["T_animation"]
    assert series.get("CollectionType") == "Temporal"
    steps = series.findall("Grid")
    times = np.array([float(s.find("Time").get("Value")) for s in steps])
    assert len(steps) == FRAMES and steps[3].find("Topology").get("TopologyType") == "Polyvertex"
    np.testing.assert_allclose(times[1] * FRAMES, 1 / 0.7, rtol=1e-6)  # one period of the analytic wave
    frequency = np.asarray(root["spectrum/frequency"][...])
    ranking = np.argsort(np.asarray(root["spectrum/ranking"][...]), kind="stable")
    leading = [k for k in ranking if frequency[k] >= 0][:2]
    partner = np.asarray(root["spectrum/partner"][...])
    expected = sum((2 if partner[k] >= 0 else 1) * np.real(amplitude[k] * stored[k]
                                                           * np.exp(2j * np.pi * frequency[k] * times[5]))
                   for k in leading)
    np.testing.assert_allclose(_read(xdmf, steps[5].find("Attribute/DataItem")), expected, atol=1e-12)


def test_two_positions_are_an_xy_geometry_and_listed_order_without_axis(tmp_path: Path) -> None:
    # no CF axis attributes: the positions are taken in the order the coordinates attribute lists them
    positions = _points_archive(tmp_path / "flat.h5", order="px py", axis=False)
    store = _run(tmp_path, "flat.h5", ["T"], time="time")
    result = runner.invoke(app, ["export", str(store), "--out", str(tmp_path / "flat.modes.xdmf")])
    assert result.exit_code == 0, result.output
    grid = _check_xdmf_model(tmp_path / "flat.modes.xdmf")["T"]
    assert grid.find("Geometry").get("GeometryType") == "XY"
    np.testing.assert_array_equal(_read(tmp_path / "flat.modes.xdmf", grid.find("Geometry/DataItem")),
                                  np.stack([positions["px"], positions["py"]], axis=1))


def test_one_unordered_coordinate_is_points_along_x(tmp_path: Path) -> None:
    # one listed coordinate, not in order: the store keeps it as the axis coordinate, and a
    # rectilinear mesh would need it in order (XDMF 3 model: VX is a monotonic vector)
    positions = _points_archive(tmp_path / "line.h5", order="px", axis=False)
    store = _run(tmp_path, "line.h5", ["T"], time="time")
    xdmf, _ = export_xdmf(store, tmp_path / "line.modes.xdmf")
    grid = _check_xdmf_model(xdmf)["T"]
    assert grid.find("Topology").get("TopologyType") == "Polyvertex"
    xy = _read(xdmf, grid.find("Geometry/DataItem"))
    np.testing.assert_array_equal(xy, np.stack([positions["px"], np.zeros(positions["px"].size)], axis=1))


def _probe_store(folder: Path, places: dict[str, dict[str, tuple[float, str]]] | None = None) -> Path:
    # two sensor signals of the duct (invented): x = cos(2 pi 0.7 t), y = sin(2 pi 0.7 t + 0.4);
    # ``places``: per probe, its scalar position datasets (value, CF axis or "") in listed order
    t = 0.05 * np.arange(300)
    with h5py.File(folder / "probes.h5", "w") as h5:
        h5["x"] = np.cos(2 * np.pi * 0.7 * t)
        h5["y"] = np.sin(2 * np.pi * 0.7 * t + 0.4)
        for probe, datasets in (places or {}).items():
            h5[probe].attrs["coordinates"] = " ".join(datasets)
            for name, (value, axis) in datasets.items():
                h5[name] = value
                h5[name].attrs["units"] = "m"
                if axis:
                    h5[name].attrs["axis"] = axis
    workflow = {"archive": {"path": "probes.h5", "fields": ["x", "y"], "step": 0.05},
                "lift": [{"kind": "delays", "count": 4}], "compress": {"method": "tsqr", "rank": 2},
                "output": {"path": "probes.zarr", "report": False}, "cluster": "threads"}
    (folder / "probes.yaml").write_text(yaml.safe_dump(workflow))
    return run_workflow(folder / "probes.yaml").path


def test_probes_without_positions_are_refused_in_one_line(tmp_path: Path) -> None:
    store = _probe_store(tmp_path)
    out = tmp_path / "out"
    with pytest.raises(ResultStoreError, match=r"field 'x' is a probe .* --format netcdf"):
        export_xdmf(store, out / "probes.xdmf")
    assert not out.exists() or not any(out.iterdir())  # nothing written, not even a temporary file
    result = runner.invoke(app, ["export", str(store), "--out", str(out / "probes.xdmf")])
    assert result.exit_code == 2 and "probes.zarr" in result.output and "Traceback" not in result.output
    # what the message tells the user to do works
    netcdf = runner.invoke(app, ["export", str(store), "--format", "netcdf", "--out", str(out / "probes.nc")])
    assert netcdf.exit_code == 0, netcdf.output
    with xr.open_dataset(out / "probes.nc") as dataset:
        np.testing.assert_array_equal(dataset["x_real"].values + 1j * dataset["x_imag"].values,
                                      zarr.open_group(str(store), mode="r")["modes/x"][...])
    # once as a real process: one line on stderr naming the store, the field and what to do
    process = subprocess.run([sys.executable, "-m", "snaplift.cli", "export", str(store)],
                             capture_output=True, text=True, timeout=120, check=False, cwd=tmp_path)
    assert process.returncode == 2 and process.stderr.count("\n") == 1
    assert all(part in process.stderr for part in ("probes.zarr", "'x'", "position", "--format netcdf"))
    assert not list(tmp_path.glob("*probes.modes*"))  # no .xdmf, .h5 or temporary file beside the store


def test_probes_with_positions_are_points_there(tmp_path: Path) -> None:
    # CF scalar coordinates (CF 1.x sections 5.7 and 9: one time series at one station); probe x
    # lists its north position first but declares it axis Y, so its east position (no axis) is x
    places = {"x": {"x_north": (0.02, "Y"), "x_east": (0.1, "")},
              "y": {"y_east": (0.3, ""), "y_north": (0.01, ""), "y_up": (0.005, "")}}
    store = _probe_store(tmp_path, places)
    modes = xr.open_zarr(store, group="modes")
    assert float(modes.coords["x_position_x"]) == 0.1 and float(modes.coords["x_position_y"]) == 0.02
    xdmf, _ = export_xdmf(store, tmp_path / "probes.modes.xdmf")
    grids = _check_xdmf_model(xdmf)
    expected = {"x": ("XY", [[0.1, 0.02]]), "y": ("XYZ", [[0.3, 0.01, 0.005]])}  # the archive's values
    root = zarr.open_group(str(store), mode="r")
    amplitude = np.asarray(root["spectrum/amplitude"][...]) * np.exp(1j * np.asarray(root["spectrum/phase"][...]))
    for probe, (kind, where) in expected.items():
        grid = grids[probe]
        assert grid.find("Topology").get("TopologyType") == "Polyvertex"
        assert grid.find("Geometry").get("GeometryType") == kind
        np.testing.assert_array_equal(_read(xdmf, grid.find("Geometry/DataItem")), where)
        real = _read(xdmf, grid.find("Attribute[@Name='mode0_real']/DataItem"))
        # b_0 mode_0 at the probe (Jovanovic, Schmid & Nichols 2014), read straight from the store
        np.testing.assert_allclose(real, [np.real(amplitude[0] * root[f"modes/{probe}"][0])], atol=1e-14)
    assert len(grids["x_animation"].findall("Grid")) == FRAMES


def test_netcdf_lists_each_probes_position_on_its_own_variables_only(tmp_path: Path) -> None:
    # CF 1.10 sections 5 and 5.7: a variable's ``coordinates`` attribute names its auxiliary
    # (here scalar) coordinate variables; a probe's place belongs to that probe's variables,
    # not to the other probe's nor to the spectrum's
    places = {"x": {"x_east": (0.1, "X"), "x_north": (0.02, "Y")}, "y": {"y_east": (0.3, "X")}}
    store = _probe_store(tmp_path, places)
    path = export.export_netcdf(store, tmp_path / "probes.nc")
    with xr.open_dataset(path, decode_coords=False) as raw:
        listed = {name: set(str(raw[name].attrs.get("coordinates", "")).split()) for name in raw.data_vars}
        assert {"x_position_x", "x_position_y"} <= listed["x_real"] and listed["x_real"] == listed["x_imag"]
        assert not listed["x_real"] & {"y_position_x"}
        assert "y_position_x" in listed["y_real"] and not listed["y_real"] & {"x_position_x", "x_position_y"}
        assert not listed["amplitude"] & {"x_position_x", "x_position_y", "y_position_x"}
        assert "coordinates" not in raw.attrs  # every coordinate is some variable's
    with xr.open_dataset(path) as dataset:  # and xarray still reads the positions back, as the archive gave them
        assert float(dataset["x_position_x"]) == 0.1 and float(dataset["y_position_x"]) == 0.3


def test_one_probe_without_a_position_refuses_the_export(tmp_path: Path) -> None:
    store = _probe_store(tmp_path, {"x": {"x_east": (0.1, ""), "x_north": (0.02, "")}})
    with pytest.raises(ResultStoreError, match=r"field 'y' is a probe .* no position"):
        export_xdmf(store, tmp_path / "out" / "probes.xdmf")
    assert not (tmp_path / "out").exists()


def test_a_failure_while_writing_leaves_no_file(tmp_path: Path, monkeypatch: pytest.MonkeyPatch) -> None:
    _points_archive(tmp_path / "points.h5")
    store = _run(tmp_path, "points.h5", ["T"], time="time")
    out = tmp_path / "out"
    out.mkdir()

    def broken(*args: object) -> None:
        raise OSError("disk full")  # after the mode attributes of the first field are written

    monkeypatch.setattr(export, "_animation", broken)
    with pytest.raises(OSError, match="disk full"):
        export_xdmf(store, out / "points.xdmf")
    assert list(out.iterdir()) == []


def test_grid_export_follows_the_same_model(wave_stores: dict[str, Path], tmp_path: Path) -> None:
    # the rectilinear meshes (1-D as one row, 2-D, 3-D) pass the same XDMF 3 model checks
    xdmf, _ = export_xdmf(wave_stores["rank4"], tmp_path / "grid.xdmf", leading=2)
    grids = _check_xdmf_model(xdmf)
    assert {grids[name].find("Topology").get("TopologyType") for name in ("u", "p", "w")} == {"2DRectMesh",
                                                                                            "3DRectMesh"}


def test_netcdf_points_by_cf_standard_name(tmp_path: Path) -> None:
    # a netCDF-4 archive written by xarray: T(time, node) with auxiliary coordinates on node;
    # CF standard names (longitude, latitude, depth) say which is x, y and z
    rng = np.random.default_rng(5)
    t, n = 0.05 * np.arange(120), 25
    where = {"lat": rng.uniform(0, 1, n), "depth": rng.uniform(0, 1, n), "lon": rng.uniform(0, 1, n)}
    names = {"lat": "latitude", "depth": "depth", "lon": "longitude"}
    temperature = 300 + np.cos(2 * np.pi * 0.7 * t[:, None] - 4 * where["lon"][None, :])
    dataset = xr.Dataset(
        {"T": (("time", "node"), temperature, {"units": "K"})},
        coords={"time": ("time", t, {"units": "s"}),
                **{k: ("node", v, {"standard_name": names[k], "units": "m"}) for k, v in where.items()}})
    dataset.to_netcdf(tmp_path / "nodes.nc")
    store = _run(tmp_path, "nodes.nc", ["T"])
    xdmf, _ = export_xdmf(store, tmp_path / "nodes.modes.xdmf")
    grid = _check_xdmf_model(xdmf)["T"]
    assert grid.find("Geometry").get("GeometryType") == "XYZ"
    np.testing.assert_array_equal(_read(xdmf, grid.find("Geometry/DataItem")),
                                  np.stack([where["lon"], where["lat"], where["depth"]], axis=1))
