"""What every array of the result store says about itself: CF ``units`` and ``long_name``,
the coordinates of its dimensions.

The runner builds one :class:`StoreMetadata` after the scan (field units and names from
the archive, the grid coordinates, the snapshot times and their unit) and hands it to the
store writer; every array written then gets ``units`` and ``long_name`` from
:meth:`StoreMetadata.attrs` unless the caller gives its own, and every group that holds
an array on a grid dimension, or on ``snapshot``, gets that dimension's coordinate
(:meth:`StoreMetadata.coordinate`), so that ``xarray.open_zarr(store, group=...)``
shows physical axes.

Fields on scattered points (one grid dimension, the archive listing two or three 1-D
auxiliary coordinates of that length in the field's ``coordinates`` attribute) keep the
position of every point: ``position_x`` / ``position_y`` / ``position_z`` (``<field>_position_x``
on a field's own dimension) on the point dimension, each with ``axis`` ``X`` / ``Y`` / ``Z``
and named in the ``coordinates`` attribute of every array on that dimension
(:attr:`StoreMetadata.positions`); ``snaplift export`` draws such fields as points. A
probe (a field with no grid) whose archive names scalar coordinates in its ``coordinates``
attribute (CF 1.x sections 5.7 and 9: a single time series at one station) keeps them as
0-d ``<probe>_position_x`` ... in the same way (:attr:`StoreMetadata.probe_positions`).

Conventions (CF 1.x): ``units`` strings in UDUNITS form (``"m s-1"``, ``"K"``, ``"Hz"``,
``"1"`` for dimensionless); ``standard_name`` only where CF defines one (``time``);
non-dimension coordinates are named in a ``coordinates`` attribute (CF section 5).
"""

from __future__ import annotations

from collections.abc import Hashable, Mapping
from dataclasses import dataclass, field
from typing import Any

import numpy as np

__all__ = ["Coordinate", "StoreMetadata", "grid_dimensions", "lifted_units", "power_units"]

#: groups whose arrays on the ``snapshot`` dimension get the ``time`` coordinate
SNAPSHOT_GROUPS = ("basis", "diagnostics", "eigenfunctions")


def grid_dimensions(grids: dict[str, tuple[int, ...]],
                    keys: Mapping[str, Hashable] | None = None) -> dict[str, tuple[str, ...]]:
    """Dimension names for each field's grid; fields on one grid share names.

    One common grid gets ``x`` / ``y, x`` / ``z, y, x``; fields on different (staggered)
    grids get names prefixed by the field (``u_x``), so xarray sees no conflicting sizes.
    ``keys`` tells grids of one shape apart (e.g. the coordinates they are on): fields
    share names only when both their shapes and their keys agree.
    """
    signature = {f: (g, None if keys is None else keys.get(f)) for f, g in grids.items()}
    common = len(set(signature.values())) == 1
    names: dict[str, tuple[str, ...]] = {}
    for name, grid in grids.items():
        base = ("z", "y", "x")[3 - len(grid):] if len(grid) <= 3 else tuple(f"axis{i}" for i in range(len(grid)))
        names[name] = base if common else tuple(f"{name}_{b}" for b in base)
    return names


def power_units(units: str | None, power: int) -> str | None:
    """``"K"``, 2 -> ``"K2"``; ``"m s-1"``, 2 -> ``"(m s-1)2"`` (UDUNITS powers); None stays unknown."""
    if units is None:
        return None
    if units in ("", "1"):
        return "1"
    simple = units.replace("_", "").isalpha()
    return f"{units}{power}" if simple else f"({units}){power}"


def lifted_units(units: str | None, term: str) -> str | None:
    """Units of a pointwise term of a field in ``units`` (``lift: pointwise``)."""
    if term in ("x", "abs"):
        return units
    if term == "square":
        return power_units(units, 2)
    if term == "cube":
        return power_units(units, 3)
    return "1"  # sin, cos: of a number


@dataclass(frozen=True)
class Coordinate:
    """A 1-D coordinate: its values and CF attributes (``units``, ``long_name`` ...)."""

    values: np.ndarray
    attrs: dict[str, Any]


@dataclass(frozen=True)
class StoreMetadata:
    """Field units and names, grid coordinates and the time axis of one result store.

    ``dims`` gives each (lifted) field's grid dimension names, ``coordinates`` the
    coordinate of each such name that the archive has one for; ``time`` the snapshot
    times of the columns in the archive's own values with ``time_attrs`` (its ``units``
    ...); ``time_unit`` is the unit as found, ``seconds_per_unit`` its factor to seconds
    (None: unknown or not convertible; frequencies are then per time unit).
    """

    field_units: dict[str, str | None] = field(default_factory=dict)
    field_names: dict[str, str] = field(default_factory=dict)
    dims: dict[str, tuple[str, ...]] = field(default_factory=dict)
    coordinates: dict[str, Coordinate] = field(default_factory=dict)
    time: np.ndarray | None = None
    time_attrs: dict[str, Any] = field(default_factory=dict)
    time_unit: str | None = None
    seconds_per_unit: float | None = None
    extra_units: dict[str, str] = field(default_factory=dict)
    #: per point dimension, the names (in ``coordinates``) of its position coordinates, x first
    positions: dict[str, tuple[str, ...]] = field(default_factory=dict)
    #: per probe (field with no grid), the names (in ``coordinates``) of its 0-d position coordinates
    probe_positions: dict[str, tuple[str, ...]] = field(default_factory=dict)

    # -- units of derived quantities -------------------------------------------------
    @property
    def _per(self) -> str:
        # "months since 2000-01-01" counts months: frequencies are per month
        return self.time_unit.split(" since ")[0].strip() if self.time_unit else "(time unit)"

    @property
    def frequency_unit(self) -> str:
        return "Hz" if self.seconds_per_unit is not None else f"1/{self._per}"

    @property
    def growth_unit(self) -> str:
        return "1/s" if self.seconds_per_unit is not None else f"1/{self._per}"

    @property
    def period_unit(self) -> str:
        return "s" if self.seconds_per_unit is not None else self._per

    def units_of(self, name: str) -> str | None:
        """A field's units; None when the archive and the workflow give none (unknown)."""
        if name in self.field_units:
            return self.field_units[name]
        return "1"

    def long_name_of(self, name: str) -> str:
        return self.field_names.get(name) or name

    def grid_dims(self, grids: dict[str, tuple[int, ...]]) -> dict[str, tuple[str, ...]]:
        """``dims`` when they describe these grids, else :func:`grid_dimensions`."""
        if all(len(self.dims.get(f, ())) == len(g) for f, g in grids.items()):
            return {f: self.dims[f] for f in grids}
        return grid_dimensions(grids)

    # -- attributes of each array ----------------------------------------------------
    def attrs(self, group: str, name: str, dimensions: tuple[str, ...]) -> dict[str, Any]:
        """Default CF attributes of ``group/name`` (``units``, ``long_name``, ``coordinates``)."""
        if dimensions == (name,) and name != "time":
            coordinate = self.coordinate(name)
            if coordinate is not None:  # a grid coordinate: the archive's attributes, nothing invented
                return dict(coordinate.attrs)
        if len(dimensions) == 1 and name in self.positions.get(dimensions[0], ()):
            return dict(self.coordinates[name].attrs)
        if not dimensions and any(name in names for names in self.probe_positions.values()):
            return dict(self.coordinates[name].attrs)
        units, long_name = self._describe(group, name)
        # an unknown unit is left out (CF): "1" would claim the field is dimensionless
        out: dict[str, Any] = {"long_name": long_name} if units is None else {"units": units, "long_name": long_name}
        if group in SNAPSHOT_GROUPS and "snapshot" in dimensions and name != "time" and self.time is not None:
            out["coordinates"] = "time"
        if group == "modes" and "mode" in dimensions and name != "frequency":
            out["coordinates"] = "frequency"
        listed = [p for d in dimensions for p in self.positions.get(d, ()) if p != name]
        listed += list(self.probe_positions.get(name, ()) if group == "modes" else ())
        if listed:  # CF section 5: auxiliary coordinates named on every array that has the dimension
            out["coordinates"] = " ".join(filter(None, (out.get("coordinates", ""), *listed)))
        if name == "time" and group in SNAPSHOT_GROUPS:
            coordinate = self.coordinate("snapshot")
            out.update(coordinate.attrs if coordinate is not None else {})
        return out

    def _describe(self, group: str, name: str) -> tuple[str | None, str]:
        per_mode = {
            "eigenvalue": ("1", "discrete-time eigenvalue (advance over one time step)"),
            "rate": (self.growth_unit, "continuous-time rate log(eigenvalue) / dt"),
            "frequency": (self.frequency_unit, "frequency of the mode"),
            "growth": (self.growth_unit, "growth rate of the mode (negative: decay)"),
            "period": (self.period_unit, "period of the mode (1 / |frequency|)"),
            "amplitude": ("1", "optimal amplitude of the mode in the prepared (weighted, scaled) data"),
            "phase": ("rad", "phase of the optimal amplitude"),
            "residual": ("1", "relative residual of the eigenpair on held-out snapshot pairs"),
            "trusted": ("1", "residual below the trust threshold"),
            "partner": ("1", "position of the complex-conjugate partner in this table (-1: none)"),
            "ranking": ("1", "rank of importance (0 = most important)"),
            "near_nyquist": ("1", "frequency within 10 % of the Nyquist frequency"),
        }
        if group == "spectrum":
            if name.startswith("peak_"):
                field_name = name[len("peak_"):]
                return (self.units_of(field_name),
                        f"peak amplitude of {self.long_name_of(field_name)} at the first snapshot of the fit "
                        "(conjugate pair together)")
            return per_mode.get(name, ("1", name.replace("_", " ")))
        if group == "modes":
            if name == "frequency":
                return per_mode["frequency"]
            return self.units_of(name), f"mode shape of {self.long_name_of(name)}"
        if group == "basis":
            if name == "singular_value":
                return "1", "singular value of the prepared (weighted, scaled) snapshot matrix"
            if name == "coefficient":
                return "1", "coefficients of the snapshots in the basis (prepared data)"
            if name == "time":
                return self._time_units(), "time of the snapshot"
            return self.units_of(name), f"basis vectors of {self.long_name_of(name)}"
        if group == "prepare":
            for prefix, what in (("mean_", "temporal mean of"), ("fixed_point_", "fixed point of the affine model of")):
                if name.startswith(prefix):
                    return self.units_of(name[len(prefix):]), f"{what} {self.long_name_of(name[len(prefix):])}"
            if name.startswith("weights_"):
                return self.extra_units.get(name, "1"), f"point weights of {name[len('weights_'):]}"
            if name.startswith("mask_"):
                return "1", f"excluded points of {name[len('mask_'):]} (true = excluded)"
            if name == "scale":
                units = {self.units_of(f) for f in self.field_units} or {"1"}  # one unknown: None
                return (units.pop() if len(units) == 1 else "1"), "factor each field was divided by (its own units)"
            if name == "field":
                return "1", "field name"
        if group in ("diagnostics", "eigenfunctions") and name == "time":
            return self._time_units(), "time of the snapshot"
        known = {
            ("diagnostics", "snapshot_index"): ("1", "index of the snapshot in the archive"),
            ("diagnostics", "projection_error"): ("1", "relative error of the snapshot's projection on the basis"),
            ("diagnostics", "reconstruction_error"): ("1", "relative error of the model's reconstruction"),
            ("diagnostics", "column_norm"): ("1", "norm of the prepared (weighted, scaled) snapshot"),
            ("diagnostics", "snapshot_norm"): ("1", "weighted norm of the raw snapshot (mixed field units)"),
            ("operator", "matrix"): ("1", "reduced linear operator (c_next = matrix @ c)"),
            ("operator", "mode_coefficient"): ("1", "modes in the coordinates of the basis"),
            ("operator", "fixed_point_coefficient"): ("1", "fixed point of the affine model in basis coordinates"),
            ("runs", "run_start"): ("1", "first snapshot (column) of each run"),
            ("runs", "run_length"): ("1", "snapshots in each run"),
            ("runs", "amplitude"): ("1", "optimal amplitude of each mode in each run (prepared data)"),
            ("eigenfunctions", "value"): ("1", "Koopman eigenfunction values on the snapshots"),
        }
        if (group, name) in known:
            return known[(group, name)]
        if group == "sketch":
            return "1", f"sketch state for appends: {name.replace('_', ' ')}"
        return "1", name.replace("_", " ")

    def _time_units(self) -> str | None:
        units = self.time_attrs.get("units") or self.time_unit
        return None if not units else str(units)  # unknown: no units (not "1", dimensionless)

    # -- coordinates ----------------------------------------------------------------------
    def coordinate(self, dimension: str) -> Coordinate | None:
        """The coordinate array to write for ``dimension`` (grid dims and ``snapshot``), or None."""
        if dimension == "snapshot":
            if self.time is None:
                return None
            attrs = {"long_name": "time of the snapshot", **self.time_attrs}
            units = self._time_units()
            if units is not None:
                attrs["units"] = units
            return Coordinate(np.asarray(self.time), attrs)
        return self.coordinates.get(dimension)

    def point_positions(self, dimension: str) -> list[tuple[str, Coordinate]]:
        """The position coordinates of a point dimension, ``(name, coordinate)``, x first."""
        return [(name, self.coordinates[name]) for name in self.positions.get(dimension, ())]

    def probe_position(self, name: str) -> list[tuple[str, Coordinate]]:
        """The 0-d position coordinates of the probe ``name``, ``(name, coordinate)``, x first."""
        return [(position, self.coordinates[position]) for position in self.probe_positions.get(name, ())]
