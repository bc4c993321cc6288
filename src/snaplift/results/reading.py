"""Read a result store through xarray, with its coordinates and units where it has them.

Report, forecast, export and compare read the store only through :func:`open_group`, so
that they use what the store says about itself: coordinate arrays named like the grid
dimensions (``x``, ``y`` or ``<field>_x`` on staggered grids), ``modes/frequency``,
``time`` in ``diagnostics/`` and ``basis/``, and ``units`` / ``long_name`` attributes.
Stores written before those were added have none of them; every helper here then falls
back to index positions and unlabelled units, so old and new stores read the same way.

Complex arrays (eigenvalues, modes) are read without CF masking or scaling: a complex
``_FillValue`` would otherwise be decoded through a float path. Should xarray still fail
on a group, the group is rebuilt from the zarr arrays and their ``dimension_names``.

The report reads a store with ``open_store(path, light=True)``: each group as a
:class:`Group` of numpy arrays read straight from zarr, with the same reading interface
(``group[name].values / .dims / .attrs / .shape``, ``group.attrs / .sizes / .coords /
.data_vars``). xarray (and pandas behind it) is imported only when a group is opened
through it: on a small store that import cost more than reading the whole store.
"""

from __future__ import annotations

import warnings
from dataclasses import dataclass, field
from pathlib import Path
from typing import TYPE_CHECKING, Any

import numpy as np
import zarr

from snaplift.errors import ResultStoreError
from snaplift.results.store import open_result, store_group

if TYPE_CHECKING:
    import xarray as xr

__all__ = ["Axis", "Group", "StoreView", "Variable", "field_axes", "label", "leading_modes", "open_group",
           "open_store", "point_positions", "units_of"]

#: a group of the store as :class:`StoreView` holds it: an ``xarray.Dataset`` (:func:`open_group`)
#: or a :class:`Group` (``open_store(..., light=True)``), read through the same interface
Dataset = Any


def open_group(path: str | Path, group: str) -> xr.Dataset:
    """One group of a complete store as an ``xarray.Dataset`` with values in memory.

    Example
    -------
    >>> spectrum = open_group("results/fin-duct.zarr", "spectrum")  # doctest: +SKIP
    >>> spectrum["frequency"].attrs.get("units")                    # doctest: +SKIP
    'Hz'
    """
    import xarray as xr  # here, not at the top: the report reads without it (see the module docstring)

    root = open_result(path)
    if group not in root:
        raise ResultStoreError(f"result store {path} has no group '{group}'; groups: "
                               f"{', '.join(sorted(root.group_keys()))}")
    try:
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")
            dataset = xr.open_zarr(str(path), group=group, mask_and_scale=False, decode_times=False,
                                   decode_timedelta=False, chunks=None)
        return dataset.load()
    except Exception:  # a complex or otherwise undecodable array: build the group by hand
        return _from_zarr(store_group(root, group))


def _from_zarr(node: zarr.Group) -> xr.Dataset:
    import xarray as xr

    group = read_light(node)
    coordinates = {name: xr.Variable(v.dims, v.values, v.attrs) for name, v in group.coords.items()}
    data = {name: xr.Variable(v.dims, v.values, v.attrs) for name, v in group.data_vars.items()}
    return xr.Dataset(data, coords=coordinates, attrs=group.attrs)


@dataclass(frozen=True)
class Variable:
    """One array of a :class:`Group`: values in memory, its dimension names and attributes."""

    dims: tuple[str, ...]
    values: np.ndarray
    attrs: dict[str, Any]
    encoding: dict[str, Any] = field(default_factory=dict)

    @property
    def shape(self) -> tuple[int, ...]:
        return tuple(self.values.shape)

    @property
    def ndim(self) -> int:
        return int(self.values.ndim)

    @property
    def size(self) -> int:
        return int(self.values.size)

    @property
    def dtype(self) -> np.dtype:
        return self.values.dtype

    @property
    def sizes(self) -> dict[str, int]:
        return dict(zip(self.dims, self.values.shape))

    def isel(self, **indexers: int) -> Variable:
        """The variable at integer positions along named dimensions (those dimensions dropped)."""
        index = tuple(indexers.get(dim, slice(None)) for dim in self.dims)
        dims = tuple(dim for dim in self.dims if dim not in indexers)
        return Variable(dims, np.asarray(self.values[index]), self.attrs, self.encoding)


@dataclass(frozen=True)
class Group:
    """A store group read straight from zarr (no xarray): variables by name, coordinates as
    xarray decodes them (dimension coordinates, and the names listed in a ``coordinates``
    attribute, kept in ``encoding`` as xarray keeps it), and the group's attributes."""

    variables: dict[str, Variable]
    coordinate_names: frozenset[str]
    attrs: dict[str, Any]

    def __getitem__(self, name: str) -> Variable:
        return self.variables[name]

    def __contains__(self, name: object) -> bool:
        return name in self.variables

    def get(self, name: str, default: Any = None) -> Any:
        return self.variables.get(name, default)

    @property
    def coords(self) -> dict[str, Variable]:
        return {n: v for n, v in self.variables.items() if n in self.coordinate_names}

    @property
    def data_vars(self) -> dict[str, Variable]:
        return {n: v for n, v in self.variables.items() if n not in self.coordinate_names}

    @property
    def sizes(self) -> dict[str, int]:
        sizes: dict[str, int] = {}
        for variable in self.variables.values():
            sizes.update(variable.sizes)
        return sizes


def read_light(node: zarr.Group) -> Group:
    """A group's arrays in memory as a :class:`Group` (``_FillValue`` dropped, as xarray
    reads the store with masking off)."""
    variables: dict[str, Variable] = {}
    for name, array in node.arrays():
        dims = tuple(getattr(array.metadata, "dimension_names", None) or (f"{name}_{i}" for i in range(array.ndim)))
        attrs = {k: v for k, v in dict(array.attrs).items() if k != "_FillValue"}
        encoding = {"coordinates": attrs.pop("coordinates")} if "coordinates" in attrs else {}
        variables[name] = Variable(tuple(map(str, dims)), np.asarray(array[...]), attrs, encoding)
    # CF: dimension coordinates, and the names a variable lists in its ``coordinates`` attribute
    listed = {name for v in variables.values() for name in str(v.encoding.get("coordinates", "")).split()}
    coordinates = frozenset(name for name, v in variables.items() if v.dims == (name,) or name in listed)
    return Group(variables, coordinates, dict(node.attrs))


def units_of(variable: Any, fallback: str = "") -> str:
    """The CF ``units`` of a variable, or ``fallback`` when it has none."""
    if variable is None:
        return fallback
    value = variable.attrs.get("units")
    return str(value) if value not in (None, "") else fallback


def label(name: str, units: str) -> str:
    """An axis label ``name [units]``, or ``name`` alone when the units are unknown."""
    return f"{name} [{units}]" if units else name


@dataclass(frozen=True)
class Axis:
    """One grid dimension of a field: its values (coordinates or index positions)."""

    dim: str
    values: np.ndarray
    units: str
    long_name: str
    is_index: bool

    @property
    def title(self) -> str:
        return label(self.long_name, self.units) if not self.is_index else f"{self.dim} (index)"


def field_axes(dataset: Dataset, name: str, *, skip: tuple[str, ...] = ("mode", "rank", "snapshot")) -> list[Axis]:
    """The grid axes of ``dataset[name]``: coordinates when the store has them, else indices."""
    axes = []
    variable = dataset[name]
    for dim in variable.dims:
        if dim in skip:
            continue
        size = int(variable.sizes[dim])
        if dim in dataset.coords and dataset.coords[dim].ndim == 1 and dataset.coords[dim].size == size:
            coordinate = dataset.coords[dim]
            axes.append(Axis(str(dim), np.asarray(coordinate.values, dtype=np.float64), units_of(coordinate),
                             str(coordinate.attrs.get("long_name") or dim), False))
        else:
            axes.append(Axis(str(dim), np.arange(size, dtype=np.float64), "", str(dim), True))
    return axes


def point_positions(dataset: Dataset, name: str, *,
                    skip: tuple[str, ...] = ("mode", "rank", "snapshot")) -> dict[str, Axis]:
    """The positions of the points of a field on scattered points by CF axis (``"X"``, ``"Y"``,
    ``"Z"``); empty for any other field.

    Such a field has one point dimension carrying two or three coordinates with a CF ``axis``
    of ``X`` / ``Y`` / ``Z`` (``position_x`` ... as the store writes them); its dimension
    coordinate, if any, is not a position. A probe (no grid dimension) has one to three 0-d
    such coordinates named in its ``coordinates`` attribute (``<probe>_position_x`` ...).
    """
    variable = dataset[name]
    grid = [dim for dim in variable.dims if dim not in skip]
    if len(grid) > 1:
        return {}
    if grid:
        dims: tuple[str, ...] = (grid[0],)
        candidates = [n for n, c in dataset.coords.items() if n != grid[0] and tuple(c.dims) == dims]
    else:  # a probe: the 0-d coordinates its own ``coordinates`` attribute names
        dims = ()
        listed = f"{variable.attrs.get('coordinates', '')} {variable.encoding.get('coordinates', '')}".split()
        candidates = [n for n in listed if n in dataset.coords and tuple(dataset.coords[n].dims) == dims]
    found: dict[str, Axis] = {}
    for coordinate_name in candidates:
        coordinate = dataset.coords[coordinate_name]
        axis = str(coordinate.attrs.get("axis", "")).upper()
        if axis in ("X", "Y", "Z"):
            found.setdefault(axis, Axis(str(coordinate_name),
                                        np.asarray(coordinate.values, dtype=np.float64).reshape(-1),
                                        units_of(coordinate), str(coordinate.attrs.get("long_name") or coordinate_name),
                                        False))
    return {a: found[a] for a in ("X", "Y", "Z") if a in found} if len(found) >= (2 if grid else 1) else {}


@dataclass(frozen=True)
class StoreView:
    """The groups of a result store that report, export and compare read, plus its attributes."""

    path: Path
    attrs: dict[str, Any]
    spectrum: Dataset
    modes: Dataset
    diagnostics: Dataset
    basis: Dataset | None
    prepare: Dataset | None
    operator: Dataset | None

    @property
    def fields(self) -> list[str]:
        # (mode, *grid) arrays, (mode,) for a one-point field (a probe); a per-mode array such
        # as the frequency stored beside them (named in the fields' ``coordinates``) is not a field
        modes = self.modes
        named = {c for v in modes.data_vars.values() for c in str(v.attrs.get("coordinates", "")).split()}
        named |= {c for v in modes.data_vars.values() for c in str(v.encoding.get("coordinates", "")).split()}
        return [str(name) for name in modes.data_vars
                if modes[name].dims[:1] == ("mode",) and str(name) not in named and name not in modes.coords
                and (modes[name].ndim >= 2 or str(modes[name].attrs.get("long_name", "")).startswith("mode shape"))]

    @property
    def dt(self) -> float:
        return float(self.spectrum.attrs.get("dt", 1.0))

    @property
    def time_unit(self) -> str:
        return str(self.spectrum.attrs.get("time_unit") or units_of(self.diagnostics.get("time")) or "")

    @property
    def frequency_unit(self) -> str:
        unit = self.spectrum.attrs.get("frequency_unit") or units_of(self.spectrum.get("frequency"))
        return str(unit) if unit else (f"1/{self.time_unit}" if self.time_unit else "1/time unit")

    @property
    def growth_unit(self) -> str:
        unit = self.spectrum.attrs.get("growth_unit") or units_of(self.spectrum.get("growth"))
        return str(unit) if unit else (f"1/{self.time_unit}" if self.time_unit else "1/time unit")

    @property
    def trusted(self) -> np.ndarray:
        n = self.spectrum.sizes["mode"]
        if "trusted" in self.spectrum:
            return np.asarray(self.spectrum["trusted"].values, dtype=bool)
        return np.ones(n, dtype=bool)

    @property
    def complex_amplitude(self) -> np.ndarray:
        """``b_k = amplitude_k exp(i phase_k)``: the snapshot the amplitudes are fitted to is
        ``offset + sum_k b_k mode_k`` (Jovanovic, Schmid & Nichols 2014)."""
        amplitude = np.asarray(self.spectrum["amplitude"].values, dtype=np.float64)
        phase = np.asarray(self.spectrum["phase"].values, dtype=np.float64) if "phase" in self.spectrum else 0.0
        return amplitude * np.exp(1j * phase)

    @property
    def complex_data(self) -> bool:
        """Fitted to complex archive fields (complex basis): modes have no conjugate partners."""
        return self.basis is not None and "coefficient" in self.basis and self.basis["coefficient"].dtype.kind == "c"

    @property
    def time(self) -> np.ndarray:
        return np.asarray(self.diagnostics["time"].values, dtype=np.float64)

    def field_units(self, name: str) -> str:
        return units_of(self.modes[name])

    def field_name(self, name: str) -> str:
        """The field's own long name (``modes/<field>`` is named "mode shape of <long name>")."""
        long_name = str(self.modes[name].attrs.get("long_name") or name)
        return long_name.removeprefix("mode shape of ").strip() or name

    def peak_amplitude(self, name: str) -> np.ndarray:
        """Peak amplitude of each mode in field units: ``spectrum/peak_<field>`` or
        ``|amplitude| * max |mode|`` over the grid (what the forecast multiplies)."""
        key = f"peak_{name}"
        if key in self.spectrum:
            return np.asarray(self.spectrum[key].values, dtype=np.float64)
        modes = np.abs(np.asarray(self.modes[name].values))
        flat = modes.reshape(modes.shape[0], -1)
        peak = np.zeros(flat.shape[0])
        finite = np.isfinite(flat)
        if finite.any():
            peak = np.max(np.where(finite, flat, 0.0), axis=1)
        return peak * np.abs(np.asarray(self.spectrum["amplitude"].values, dtype=np.float64))


def open_store(path: str | Path, *, light: bool = False) -> StoreView:
    """Every group report, export and compare need, read through :func:`open_group`, or with
    ``light`` as :class:`Group` objects straight from zarr (the report: no xarray import)."""
    root = open_result(path)
    for group in ("spectrum", "modes", "diagnostics"):
        if group not in root:
            raise ResultStoreError(f"result store {path} has no group '{group}'; it holds no fit "
                                   "(run the workflow to the end)")

    def read(group: str) -> Dataset:
        return read_light(store_group(root, group)) if light else open_group(path, group)

    optional = {g: read(g) if g in root else None for g in ("basis", "prepare", "operator")}
    return StoreView(Path(path), dict(root.attrs), read("spectrum"), read("modes"), read("diagnostics"), **optional)


def leading_modes(view: StoreView, count: int) -> list[int]:
    """Positions of the ``count`` leading modes (store ranking: trusted first, then amplitude),
    one of each conjugate pair (the one with frequency >= 0); every mode of complex data."""
    n = view.spectrum.sizes["mode"]
    ranking = np.asarray(view.spectrum["ranking"].values) if "ranking" in view.spectrum else np.arange(n)
    frequency = np.asarray(view.spectrum["frequency"].values, dtype=np.float64)
    order = np.argsort(ranking, kind="stable")
    if view.complex_data:  # no conjugate symmetry: a negative frequency is a wave of its own
        return [int(k) for k in order][:count]
    # a real mode without a conjugate partner (partner -1) stands alone, whatever its sign
    partner = np.asarray(view.spectrum["partner"].values) if "partner" in view.spectrum else np.zeros(n, int)
    chosen = [int(k) for k in order if frequency[k] >= 0 or partner[k] < 0]
    return chosen[:count]
