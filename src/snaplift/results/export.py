"""``snaplift export``: the modes in formats other tools read.

- XDMF 3 + HDF5 (the XDMF data model, an open standard read by common open-source
  visualisation programs): per field one grid carrying, per mode, the real part,
  imaginary part, magnitude and phase of ``b_k x mode_k`` in field units (``b_k`` the
  complex amplitude, ``amplitude exp(i phase)``, so the real part is the mode's share of
  the first fitted snapshot), and a temporal collection: one period of the leading
  oscillating mode, drawn by the leading ``K`` modes (one of each conjugate pair) as
  ``sum_k c_k Re(b_k mode_k exp(2 pi i f_k t))`` with ``c_k = 2`` for a conjugate pair and
  1 otherwise, without growth or decay (a neutral picture of the shapes in motion; the
  forecast has the growth). The grid is

  - a structured mesh (``2DRectMesh`` / ``3DRectMesh`` with its coordinate vectors, or the
    index positions where the store has no coordinates; a 1-D field is a one-row 2-D mesh);
  - for a field on scattered points (the store keeps each point's position,
    ``position_x`` ...; see :mod:`snaplift.results.metadata`), a ``Polyvertex`` topology
    of one vertex per point on an ``XY`` or ``XYZ`` geometry of those positions; so is a
    1-D field whose coordinate is not in order (points along x), and a probe whose store
    keeps its place (``<probe>_position_x`` ...: one vertex);
  - none for a probe without a place: the export is refused in one line before anything
    is written, naming the store, the field and ``--format netcdf``.
- netCDF-4 following the CF conventions: complex values split into ``<name>_real`` and
  ``<name>_imag`` variables, coordinates, ``units`` and ``long_name`` kept, flags as
  integers with ``flag_values`` / ``flag_meanings``, written with the netCDF4 library.

Files are written under a temporary name and renamed into place; an existing file is
replaced only if snaplift wrote it.
"""

from __future__ import annotations

import os
import uuid
import xml.etree.ElementTree as ET
from dataclasses import dataclass
from dataclasses import field as dataclass_field
from pathlib import Path

import h5py
import numpy as np
import xarray as xr

from snaplift.errors import ResultStoreError
from snaplift.results.reading import StoreView, field_axes, leading_modes, open_store, point_positions

__all__ = ["EXPORT_KEY", "export_netcdf", "export_xdmf", "default_export_path"]

EXPORT_KEY = "snaplift_export"
FRAMES = 24


def default_export_path(store: str | Path, format: str) -> Path:
    store = Path(store)
    stem = store.name[:-5] if store.name.endswith(".zarr") else store.name
    return store.with_name(f"{stem}.modes.{'xdmf' if format == 'xdmf' else 'nc'}")


def _refuse_foreign(path: Path) -> None:
    if not path.exists():
        return
    ours = False
    try:
        if path.suffix == ".h5":
            with h5py.File(path, "r") as h5:
                ours = bool(h5.attrs.get(EXPORT_KEY, False))
        elif path.suffix == ".xdmf":
            ours = EXPORT_KEY in path.read_text(errors="replace")[:4096]
        else:
            with xr.open_dataset(path) as existing:
                ours = bool(existing.attrs.get(EXPORT_KEY, 0))
    except Exception:
        ours = False
    if not ours:
        raise ResultStoreError(f"{path} exists and was not written by snaplift export; choose another --out")


def _temporary(path: Path) -> Path:
    return path.with_name(f".{path.name}.{uuid.uuid4().hex[:8]}.tmp")


def _animation(view: StoreView, field: str, chosen: list[int]) -> tuple[np.ndarray, np.ndarray] | None:
    """Frames (frame, *grid) and their times over one period of the leading oscillating mode."""
    frequency = np.asarray(view.spectrum["frequency"].values, dtype=np.float64)
    oscillating = [k for k in chosen if frequency[k] > 0]
    if not oscillating:
        return None
    period = 1.0 / frequency[oscillating[0]]
    times = period * np.arange(FRAMES) / FRAMES
    partner = np.asarray(view.spectrum["partner"].values) if "partner" in view.spectrum else np.full(frequency.size, -1)
    amplitude = view.complex_amplitude
    modes = np.asarray(view.modes[field].values)
    frames = np.zeros((FRAMES, *modes.shape[1:]))
    for k in chosen:
        weight = 2.0 if partner[k] >= 0 else 1.0
        shape = amplitude[k] * modes[k]
        for i, t in enumerate(times):
            frames[i] += weight * np.real(shape * np.exp(2j * np.pi * frequency[k] * t))
    return frames, times


@dataclass(frozen=True)
class _Mesh:
    """Where a field's values lie, in XDMF terms: the topology, the geometry's heavy data
    (``coordinates/<name>`` in the field's group) and the shape of each attribute."""

    topology: dict[str, str]
    geometry_type: str
    geometry: list[tuple[str, np.ndarray]]
    shape: tuple[int, ...]
    #: Polyvertex: the vertex of each element (``topology/connectivity``)
    connectivity: np.ndarray | None = None
    #: attributes of the geometry's heavy data (the positions' store names and units)
    geometry_attrs: dict[str, str] = dataclass_field(default_factory=dict)


def _mesh(view: StoreView, field: str) -> _Mesh:
    """The XDMF mesh of ``field``; raises a one-line error for a field it cannot draw."""
    positions = point_positions(view.modes, field)
    if positions:
        n = int(next(iter(positions.values())).values.size)
        letters = ("X", "Y") if set(positions) == {"X", "Y"} else ("X", "Y", "Z")
        xyz = np.stack([positions[a].values if a in positions else np.zeros(n) for a in letters], axis=1)
        units = {positions[a].units for a in positions}
        attrs = {"columns": " ".join(positions[a].dim if a in positions else "(zero)" for a in letters)}
        if len(units) == 1 and "" not in units:
            attrs["units"] = units.pop()
        return _Mesh({"TopologyType": "Polyvertex", "NumberOfElements": str(n), "NodesPerElement": "1"},
                     "".join(letters), [("".join(letters), xyz)], (n,), np.arange(n, dtype=np.int64), attrs)
    axes = field_axes(view.modes, field)
    grid = tuple(a.values.size for a in axes)
    steps = np.diff(axes[0].values) if len(axes) == 1 else np.zeros(0)
    if steps.size and not (np.all(steps > 0) or np.all(steps < 0)):  # points along x, not in order: not a mesh
        n = grid[0]
        attrs = {"columns": f"{axes[0].dim} (zero)", **({"units": axes[0].units} if axes[0].units else {})}
        return _Mesh({"TopologyType": "Polyvertex", "NumberOfElements": str(n), "NodesPerElement": "1"}, "XY",
                     [("XY", np.stack([axes[0].values, np.zeros(n)], axis=1))], (n,), np.arange(n, dtype=np.int64),
                     attrs)
    if len(axes) == 1:
        vectors = [("VX", axes[0].values), ("VY", np.zeros(1))]
        return _Mesh({"TopologyType": "2DRectMesh", "Dimensions": f"1 {grid[0]}"}, "VXVY", vectors, (1, grid[0]))
    if len(axes) == 2:
        vectors = [("VX", axes[1].values), ("VY", axes[0].values)]
        return _Mesh({"TopologyType": "2DRectMesh", "Dimensions": " ".join(map(str, grid))}, "VXVY", vectors, grid)
    if len(axes) == 3:
        vectors = [("VX", axes[2].values), ("VY", axes[1].values), ("VZ", axes[0].values)]
        return _Mesh({"TopologyType": "3DRectMesh", "Dimensions": " ".join(map(str, grid))}, "VXVYVZ", vectors, grid)
    if not axes:
        raise ResultStoreError(
            f"result store {view.path}: field '{field}' is a probe (one value per snapshot) and the store keeps no "
            "position for it, which XDMF needs to place it; export with --format netcdf instead, or give the probe "
            "a place: a CF 'coordinates' attribute on its archive dataset naming scalar x, y (z) datasets, and run "
            "the workflow again")
    raise NotImplementedError(f"result store {view.path}: field '{field}' has {len(axes)} grid dimensions and XDMF "
                              "export handles 1-3; export with --format netcdf instead")


def _place(parent: ET.Element, mesh: _Mesh, h5name: str, field: str) -> None:
    """The Topology and Geometry of ``mesh`` under the grid element ``parent``."""
    topology = ET.SubElement(parent, "Topology", mesh.topology)
    if mesh.connectivity is not None:
        _item(topology, h5name, f"/{field}/topology/connectivity", mesh.connectivity.shape, number_type="Int")
    geometry = ET.SubElement(parent, "Geometry", GeometryType=mesh.geometry_type)
    for name, values in mesh.geometry:
        _item(geometry, h5name, f"/{field}/coordinates/{name}", values.shape)


def _item(parent: ET.Element, h5name: str, path: str, shape: tuple[int, ...], number_type: str = "Float") -> None:
    item = ET.SubElement(parent, "DataItem", Dimensions=" ".join(map(str, shape)), NumberType=number_type,
                         Precision="8", Format="HDF")
    item.text = f"{h5name}:{path}"


def export_xdmf(store: str | Path, out: str | Path | None = None, *, leading: int = 4) -> tuple[Path, Path]:
    """Write ``out`` (.xdmf) and its HDF5 heavy data next to it (same stem, .h5).

    Example
    -------
    >>> xdmf, h5 = export_xdmf("results/fin-duct.zarr")  # doctest: +SKIP
    """
    view = open_store(store)
    meshes = {field: _mesh(view, field) for field in view.fields}  # every field drawable, before writing
    xdmf = Path(out) if out is not None else default_export_path(store, "xdmf")
    heavy = xdmf.with_suffix(".h5")
    _refuse_foreign(xdmf)
    _refuse_foreign(heavy)
    amplitude = view.complex_amplitude
    frequency = np.asarray(view.spectrum["frequency"].values, dtype=np.float64)
    chosen = leading_modes(view, leading)
    root = ET.Element("Xdmf", Version="3.0")
    domain = ET.SubElement(root, "Domain")
    ET.SubElement(domain, "Information", Name=EXPORT_KEY, Value=str(Path(store).resolve()))
    xdmf.parent.mkdir(parents=True, exist_ok=True)
    heavy_tmp, xdmf_tmp = _temporary(heavy), _temporary(xdmf)
    try:
        with h5py.File(heavy_tmp, "w") as h5:
            h5.attrs[EXPORT_KEY] = True
            h5.attrs["source"] = str(Path(store).resolve())
            h5.attrs["caution"] = ("A data-driven surrogate is valid only near the data it was fitted on; "
                                   "see the report of the result store.")
            h5["spectrum/frequency"] = frequency
            h5["spectrum/growth"] = np.asarray(view.spectrum["growth"].values, dtype=np.float64)
            h5["spectrum/amplitude"] = np.abs(amplitude)
            h5["spectrum/phase"] = np.angle(amplitude)
            h5["spectrum/trusted"] = view.trusted.astype(np.int8)
            for field, mesh in meshes.items():
                shape = mesh.shape
                for name, values in mesh.geometry:
                    h5[f"{field}/coordinates/{name}"] = np.asarray(values, dtype=np.float64)
                    h5[f"{field}/coordinates/{name}"].attrs.update(mesh.geometry_attrs)
                if mesh.connectivity is not None:
                    h5[f"{field}/topology/connectivity"] = mesh.connectivity
                grid = ET.SubElement(domain, "Grid", Name=field, GridType="Uniform")
                _place(grid, mesh, heavy.name, field)
                units = view.field_units(field)
                modes = np.asarray(view.modes[field].values)
                for k in range(modes.shape[0]):
                    shape_k = amplitude[k] * modes[k]
                    for part, values in (("real", shape_k.real), ("imag", shape_k.imag),
                                         ("magnitude", np.abs(shape_k)), ("phase", np.angle(shape_k))):
                        path = f"/{field}/mode_{k}/{part}"
                        h5.create_dataset(path, data=np.asarray(values, dtype=np.float64).reshape(shape))
                        h5[path].attrs["units"] = "rad" if part == "phase" else units
                        attribute = ET.SubElement(grid, "Attribute", Name=f"mode{k}_{part}", AttributeType="Scalar",
                                                  Center="Node")
                        _item(attribute, heavy.name, path, shape)
                animation = _animation(view, field, chosen)
                if animation is None:
                    continue
                frames, times = animation
                series = ET.SubElement(domain, "Grid", Name=f"{field}_animation", GridType="Collection",
                                       CollectionType="Temporal")
                for i, t in enumerate(times):
                    path = f"/{field}/animation/frame_{i}"
                    h5.create_dataset(path, data=frames[i].reshape(shape))
                    h5[path].attrs["time"] = t
                    step = ET.SubElement(series, "Grid", Name=f"{field}_{i}", GridType="Uniform")
                    ET.SubElement(step, "Time", Value=f"{t:.17g}")
                    _place(step, mesh, heavy.name, field)
                    attribute = ET.SubElement(step, "Attribute", Name=field, AttributeType="Scalar", Center="Node")
                    _item(attribute, heavy.name, path, shape)
                h5[f"{field}/animation"].attrs["modes"] = np.asarray(chosen, dtype=np.int64)
        ET.indent(root)
        xdmf_tmp.write_text('<?xml version="1.0" ?>\n<!DOCTYPE Xdmf SYSTEM "Xdmf.dtd" []>\n'
                            + ET.tostring(root, encoding="unicode") + "\n")
        os.replace(heavy_tmp, heavy)
        os.replace(xdmf_tmp, xdmf)
    finally:
        for leftover in (heavy_tmp, xdmf_tmp):
            leftover.unlink(missing_ok=True)
    return xdmf, heavy


def _split(name: str, variable: xr.DataArray) -> dict[str, xr.DataArray]:
    attrs = {k: v for k, v in variable.attrs.items() if k in ("units", "long_name", "standard_name")}
    if np.iscomplexobj(variable.values):
        long_name = str(attrs.pop("long_name", name))
        return {f"{name}_real": xr.DataArray(variable.values.real, dims=variable.dims,
                                             attrs={**attrs, "long_name": f"real part of {long_name}"}),
                f"{name}_imag": xr.DataArray(variable.values.imag, dims=variable.dims,
                                             attrs={**attrs, "long_name": f"imaginary part of {long_name}"})}
    if variable.dtype == bool:
        return {name: xr.DataArray(variable.values.astype(np.int8), dims=variable.dims,
                                   attrs={**attrs, "flag_values": np.array([0, 1], dtype=np.int8),
                                          "flag_meanings": f"not_{name} {name}"})}
    return {name: xr.DataArray(variable.values, dims=variable.dims, attrs=attrs)}


def _own_coordinates(variables: dict[str, xr.DataArray], coords: dict[str, xr.Variable],
                     named: dict[str, set[str]]) -> None:
    """Each variable's CF ``coordinates`` attribute: the coordinates on its dimensions, and of
    the 0-d ones (a probe's position, CF 1.10 section 5.7) only those its source names.

    Left to xarray, every 0-d coordinate goes into every variable's list (its dimensions,
    none, are a subset of any), so each probe's position was attached to every field and
    spectrum variable of the file.
    """
    for key, value in variables.items():
        listed = sorted(name for name, coordinate in coords.items()
                        if name not in value.dims and set(coordinate.dims) <= set(value.dims)
                        and (coordinate.dims or name in named.get(key, set())))
        value.encoding["coordinates"] = " ".join(listed) if listed else None


def export_netcdf(store: str | Path, out: str | Path | None = None) -> Path:
    """Write modes, spectrum and diagnostics to one CF netCDF-4 file.

    Example
    -------
    >>> path = export_netcdf("results/fin-duct.zarr")          # doctest: +SKIP
    >>> xr.open_dataset(path)["T_real"].dims                  # doctest: +SKIP
    ('mode', 'y', 'x')
    """
    view = open_store(store)
    path = Path(out) if out is not None else default_export_path(store, "netcdf")
    _refuse_foreign(path)
    variables: dict[str, xr.DataArray] = {}
    coords: dict[str, xr.Variable] = {}
    #: the coordinates each variable's source names itself (a probe's 0-d position)
    named: dict[str, set[str]] = {}
    for group, dataset in (("modes", view.modes), ("spectrum", view.spectrum), ("diagnostics", view.diagnostics)):
        names = view.fields if group == "modes" else [str(n) for n in dataset.data_vars]
        for name in names:
            source = dataset[name]
            own = set(f"{source.attrs.get('coordinates', '')} {source.encoding.get('coordinates', '')}".split())
            for key, value in _split(name, source).items():
                if key in variables:
                    key = f"{group}_{key}"
                variables[key] = value
                named[key] = own
        for coordinate_name, coordinate in dataset.coords.items():
            if str(coordinate_name) not in coords and not np.iscomplexobj(coordinate.values):
                coords[str(coordinate_name)] = coordinate.variable.to_base_variable()
    if view.prepare is not None:
        for name in map(str, view.prepare.data_vars):
            if name.startswith(("mean_", "fixed_point_")):
                variables.update(_split(name, view.prepare[name]))
    # a per-mode coordinate of modes/ (frequency) is the spectrum's variable of the same name
    coords = {name: value for name, value in coords.items() if name not in variables}
    coords.setdefault("mode", xr.Variable(("mode",), np.arange(view.spectrum.sizes["mode"]),
                                          {"long_name": "mode (sorted by amplitude, conjugate pairs adjacent)"}))
    _own_coordinates(variables, coords, named)
    dataset = xr.Dataset(variables, coords=coords, attrs={
        "Conventions": "CF-1.10", "title": f"modes and spectrum of {Path(store).name}",
        "source": f"snaplift result store {Path(store).resolve()}", "institution": "",
        "history": f"snaplift export --format netcdf ({view.attrs.get('finished', '')})",
        "comment": "complex values are split into <name>_real and <name>_imag; modes are in field units "
                   "(x_j = offset + sum_k mode_k amplitude_k eigenvalue_k^j)",
        "caution": "A data-driven surrogate is valid only near the data it was fitted on.",
        EXPORT_KEY: 1})
    path.parent.mkdir(parents=True, exist_ok=True)
    temporary = _temporary(path)
    try:
        dataset.to_netcdf(temporary, engine="netcdf4", format="NETCDF4")
        os.replace(temporary, path)
    finally:
        temporary.unlink(missing_ok=True)
    return path
