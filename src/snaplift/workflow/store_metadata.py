"""The result store's metadata from the archive: field units and names, grid coordinates,
snapshot times and their unit (:class:`snaplift.results.metadata.StoreMetadata`).

Coordinates of each grid axis come from ``archive.coords`` (``{x: xc, y: yc}``: a key is
a store dimension name, ``x`` / ``y`` / ``z`` for every field whose axis it names, or a
field's own ``u_x``), else from the archive (netCDF / zarr dimension coordinates, CF
``coordinates``; :attr:`snaplift.archive._base.FieldInfo.coordinates`). Only metadata and
the small 1-D coordinate and time datasets are read.

A field on scattered points (one grid axis, its ``coordinates`` attribute listing two or
three 1-D numeric datasets of the axis length: CF 1.x section 5 auxiliary coordinates)
keeps every point's position (:func:`point_positions`): the store writes them as
``position_x`` ... on the point dimension (``<field>_position_x`` on a field's own), and
the point axis itself gets no coordinate (its values are not ordered along any axis).
A probe (no grid axis) whose ``coordinates`` attribute lists one to three numeric scalars
(CF 1.x sections 5.7 and 9: one time series at one station) keeps them as 0-d
``<probe>_position_x`` ... beside its modes and basis vectors.
"""

from __future__ import annotations

from typing import Any

import numpy as np

from snaplift.archive._base import ArchiveInfo
from snaplift.errors import ConfigError
from snaplift.results.metadata import Coordinate, StoreMetadata, grid_dimensions, lifted_units

__all__ = ["point_positions", "store_metadata"]


def _lifted(workflow: Any) -> list[tuple[str, str, str]]:
    """(name, archive field, pointwise term) of every field of the snapshot matrix."""
    lift = workflow.field_lift
    fields = list(workflow.archive.fields)
    if lift is None:
        return [(f, f, "x") for f in fields]
    return [(f.name, f.source, f.term) for f in lift.lifted(fields)]


def _axis_names(grid: tuple[int, ...]) -> tuple[str, ...]:
    return ("z", "y", "x")[3 - len(grid):] if len(grid) <= 3 else tuple(f"axis{i}" for i in range(len(grid)))


def store_metadata(workflow: Any, reader: Any, info: ArchiveInfo, time: np.ndarray, time_unit: Any) -> StoreMetadata:
    """Units, names, coordinates and times for the result store of ``workflow``.

    ``time`` is the snapshot time of each column in the archive's values, ``time_unit`` the
    :class:`~snaplift.archive._cf.TimeUnit` found (None: none).

    Raises
    ------
    ConfigError
        An ``archive.coords`` entry that names a missing dataset, one that is not 1-D of the
        axis length, or a key that matches no grid dimension.
    """
    section = workflow.archive
    given = dict(section.coords or {})
    lifted = _lifted(workflow)
    grids = {name: info.fields[source].grid for name, source, _ in lifted}
    sources: dict[str, tuple[str | None, ...]] = {}
    used: set[str] = set()
    for name, source, _ in lifted:
        found = list(info.fields[source].coordinates or (None,) * len(grids[name]))
        for axis, base in enumerate(_axis_names(grids[name])):
            for key in (f"{name}_{base}", f"{source}_{base}", base):
                if key in given:
                    found[axis] = given[key]
                    used.add(key)
                    break
        sources[name] = tuple(found)
    positions = {name: point_positions(info, source, section.time) for name, source, _ in lifted}
    for name, source, _ in lifted:
        if positions[name] and grids[name] and not {f"{name}_x", f"{source}_x", "x"} & used:
            sources[name] = (None,)  # scattered points: the point axis is an index, not an x axis
    unused = sorted(set(given) - used)
    if unused:
        shown = sorted({d for name in grids for d in (*_axis_names(grids[name]),
                                                       *(f"{name}_{b}" for b in _axis_names(grids[name])))})
        raise ConfigError(f"archive.coords key '{unused[0]}' names no grid dimension of the fields "
                          f"{list(section.fields)}; use one of: {', '.join(shown)}")
    dims = grid_dimensions(grids, {name: (*sources[name], *(v for _, v in positions[name])) for name in grids})
    coordinates: dict[str, Coordinate] = {}
    for name, variables in sources.items():
        for axis, variable in enumerate(variables):
            dimension = dims[name][axis]
            if variable is None or dimension in coordinates:
                continue
            coordinates[dimension] = _coordinate(reader, info, variable, grids[name][axis], dimension, name)
    point_names: dict[str, tuple[str, ...]] = {}
    for name, found_positions in positions.items():
        points = dims[name][0] if found_positions and grids[name] else None
        if points is None or points in point_names:
            continue
        prefix = points[:-1]  # "x" -> "", "T_x" -> "T_"
        stored = []
        for letter, variable in found_positions:
            coordinate = _coordinate(reader, info, variable, grids[name][0], points, name)
            coordinates[f"{prefix}position_{letter}"] = Coordinate(
                coordinate.values, {**coordinate.attrs, "axis": letter.upper()})
            stored.append(f"{prefix}position_{letter}")
        point_names[points] = tuple(stored)
    probe_names: dict[str, tuple[str, ...]] = {}
    lift = workflow.field_lift
    delayed = set() if lift is None else {f.name for f in lift.lifted(list(section.fields)) if f.block}
    for name, source, _ in lifted:
        if info.fields[source].grid or not positions[name] or name in delayed:  # delayed copies: no modes
            continue
        stored = []
        for letter, variable in positions[name]:
            attrs = info.variables[variable].attrs
            value = np.asarray(reader.read_variable(variable), dtype=np.float64).reshape(())
            coordinates[f"{name}_position_{letter}"] = Coordinate(value, {
                "long_name": str(attrs.get("long_name") or attrs.get("standard_name") or variable),
                "archive_variable": variable, "axis": letter.upper(),
                **({"units": str(attrs["units"])} if attrs.get("units") else {})})
            stored.append(f"{name}_position_{letter}")
        probe_names[name] = tuple(stored)
    units = {name: _field_units(section, info, source, reader.path) for name, source, _ in lifted}
    field_units = {name: lifted_units(units[name], term) for name, _, term in lifted}
    field_names = {}
    for name, source, _ in lifted:
        base = str(info.fields[source].attrs.get("long_name") or source)
        field_names[name] = base if name == source else f"{base} ({name})"
    extra = {}
    for key, dataset in _weights(section, [n for n, _, _ in lifted], [s for _, s, _ in lifted]).items():
        weights_info = info.variables.get(dataset)
        if weights_info is not None and weights_info.attrs.get("units"):
            extra[key] = str(weights_info.attrs["units"])
    return StoreMetadata(field_units=field_units, field_names=field_names, dims=dims, coordinates=coordinates,
                         time=np.asarray(time), time_attrs=_time_attrs(section, info, time_unit),
                         time_unit=None if time_unit is None else time_unit.name,
                         seconds_per_unit=None if time_unit is None else time_unit.seconds, extra_units=extra,
                         positions=point_names, probe_positions=probe_names)


#: CF ``axis`` values and the ``standard_name`` stems that say which position a coordinate is
_AXIS_ORDER = ("X", "Y", "Z")
_STANDARD_AXIS = {"projection_x_coordinate": "X", "longitude": "X", "grid_longitude": "X",
                  "projection_y_coordinate": "Y", "latitude": "Y", "grid_latitude": "Y",
                  "height": "Z", "altitude": "Z", "depth": "Z"}


def point_positions(info: ArchiveInfo, source: str, time: str | None = None) -> tuple[tuple[str, str], ...]:
    """The archive datasets holding the positions of the points of a field on scattered points,
    or of a probe, as ``(axis, dataset)`` pairs, axis ``"x"``, ``"y"`` or ``"z"`` in that order.

    A field on scattered points has one grid axis of ``n`` points and its ``coordinates``
    attribute lists two or three 1-D numeric datasets of length ``n``; a probe (no grid axis)
    lists one to three numeric scalars (shape ``()`` or ``(1,)``). The time dataset is left
    out. A dataset whose CF ``axis`` (else ``standard_name``) says which position it is takes
    that axis; the others take the free axes in the order listed. Anything else (a grid, a
    single coordinate of scattered points, more than three) gives ``()``.
    """
    field = info.fields[source]
    listed = field.attrs.get("coordinates")
    if len(field.grid) > 1 or not isinstance(listed, str):
        return ()
    time = time or info.attrs.get("time_variable")
    shapes = {field.grid, (1,)} if not field.grid else {field.grid}
    found = [name for name in dict.fromkeys(listed.split()) if name != time and name in info.variables
             and info.variables[name].shape in shapes and np.dtype(info.variables[name].dtype).kind in "iuf"]
    if len(found) not in ((1, 2, 3) if not field.grid else (2, 3)):
        return ()
    letters: dict[str, str] = {}
    for name in found:
        attrs = info.variables[name].attrs
        letter = str(attrs.get("axis") or _STANDARD_AXIS.get(str(attrs.get("standard_name")), "")).upper()
        if letter in _AXIS_ORDER and letter not in letters:
            letters[letter] = name
    rest = [name for name in found if name not in letters.values()]
    for letter in _AXIS_ORDER:
        if letter not in letters and rest:
            letters[letter] = rest.pop(0)
    return tuple((letter.lower(), letters[letter]) for letter in _AXIS_ORDER if letter in letters)


def _field_units(section: Any, info: ArchiveInfo, source: str, path: Any) -> str | None:
    """The archive's ``units`` of a field, else ``archive.units``; None when neither gives one
    (unknown, which is not dimensionless: the store then writes no ``units``)."""
    found = info.fields[source].attrs.get("units")
    given = (section.units or {}).get(source)
    if found is not None and str(found).strip():
        if given is not None and given.strip() != str(found).strip():
            raise ConfigError(f"archive.units gives field '{source}' the unit {given!r} but {path} declares "
                              f"{str(found)!r}; remove the entry (the archive's unit is used)")
        return str(found).strip()
    return given


def _weights(section: Any, names: list[str], sources: list[str]) -> dict[str, str]:
    weights = section.weights
    if weights is None:
        return {}
    if isinstance(weights, str):
        return {f"weights_{n}": weights for n in names}
    return {f"weights_{n}": weights[s] for n, s in zip(names, sources) if s in weights}


def _coordinate(reader: Any, info: ArchiveInfo, variable: str, length: int, dimension: str, field: str) -> Coordinate:
    if variable not in info.variables:
        present = ", ".join(sorted(v for v, i in info.variables.items() if len(i.shape) == 1)) or "(none)"
        raise ConfigError(f"coordinate dataset '{variable}' for dimension '{dimension}' of field '{field}' not found "
                          f"in {reader.path}; 1-D datasets present: {present}")
    values = np.asarray(reader.read_variable(variable))
    if values.shape != (length,) or values.dtype.kind not in "iuf":
        raise ConfigError(f"coordinate dataset '{variable}' in {reader.path} has shape {values.shape} and dtype "
                          f"{values.dtype}; dimension '{dimension}' of field '{field}' needs ({length},) numbers")
    attrs = info.variables[variable].attrs
    # a coordinate whose unit the archive does not give gets no ``units`` (CF): "1" would
    # claim it is dimensionless
    out: dict[str, Any] = {"long_name": str(attrs.get("long_name") or attrs.get("standard_name") or variable),
                           "archive_variable": variable}
    if attrs.get("units"):
        out["units"] = str(attrs["units"])
    if attrs.get("standard_name"):
        out["standard_name"] = str(attrs["standard_name"])
    if attrs.get("axis"):
        out["axis"] = str(attrs["axis"])
    return Coordinate(values.astype(np.float64) if values.dtype.kind == "f" else values, out)


def _time_attrs(section: Any, info: ArchiveInfo, unit: Any) -> dict[str, Any]:
    """CF attributes of the stored times: the archive's own ``units`` (and calendar)."""
    out: dict[str, Any] = {"standard_name": "time"}
    name = None if section.step is not None else (section.time or info.attrs.get("time_variable"))
    variable = info.variables.get(name) if name else None
    attrs = variable.attrs if variable is not None else {}
    units = attrs.get("units")
    if not units and attrs.get("time_unit") and attrs.get("time_origin"):
        units = f"{attrs['time_unit']} since {attrs['time_origin']}"  # native datetime64 values
    if not units and unit is not None:
        units = unit.name
    if units:  # no unit known: none written (CF), not "1", which would say dimensionless
        out["units"] = str(units)
    out["long_name"] = str(attrs.get("long_name") or ("time (archive.step)" if section.step is not None else "time"))
    if attrs.get("calendar"):
        out["calendar"] = str(attrs["calendar"])
    return out
