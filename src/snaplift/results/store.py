"""The zarr v3 result store, written to a staging folder and renamed into place.

Layout (see README.md, "The result store")::

    RESULT.zarr/
      spectrum/     eigenvalue, rate, frequency, growth, period, amplitude   (mode,)
      operator/     matrix (mode_in, mode_out)
      modes/        one array per field: (mode, *grid) complex, NaN at masked points
      prepare/      mean_<field>, scale (field,), weights_<field>, mask_<field>
      basis/        singular_value (rank,), coefficient (rank, snapshot), <field> (rank, *grid)
      diagnostics/  reconstruction_error, projection_error, time  (snapshot,)

Every array has ``dimension_names`` and no ``_FillValue`` attribute; metadata is
consolidated once, at the final commit, and the root attribute ``snaplift_complete`` is
written last, so a store that is not complete never looks complete.
"""

from __future__ import annotations

import asyncio
import json
import os
import shutil
import uuid
import warnings
from collections import deque
from collections.abc import Callable, Sequence
from concurrent.futures import Future, ThreadPoolExecutor
from pathlib import Path
from typing import Any

import numpy as np
import zarr

from snaplift.errors import ResultStoreError
from snaplift.results.metadata import StoreMetadata, grid_dimensions

__all__ = ["BackgroundWrites", "StoreWriter", "open_result", "read_group", "grid_dimensions", "needed_layout",
           "write_leading", "COMPLETE_KEY", "FORMAT_KEY", "POSITIONS_LAYOUT", "STORE_VERSION"]

COMPLETE_KEY = "snaplift_complete"
FORMAT_KEY = "snaplift_store_version"
#: layout of the result store; change it with the layout (2: CF units and long names,
#: coordinates, spectrum/peak_<field>; 3: sketch/exact_rows, the fields kept whole, and
#: checksums/ of the blocks compress read; 4: position_x ... of fields on scattered points and
#: <probe>_position_x ... of probes with a place). Stage fingerprints include the layout a
#: store of the archive needs (:func:`needed_layout`), so a store written in an older layout
#: that lacks something the archive has is recomputed, never reused
#: (snaplift.workflow.fingerprint).
STORE_VERSION = 4
#: the first layout with point positions and probe places (a store without either is the same in 3)
POSITIONS_LAYOUT = 4


def needed_layout(metadata: StoreMetadata | None) -> int:
    """The oldest store layout that holds everything a store of this archive holds.

    A layout adds arrays only some archives have (4: point positions, probe places): a
    store of an archive without them is the same in layout 3 and 4, so its stages are
    reused after an upgrade rather than recomputed from the archive.

    Example
    -------
    >>> needed_layout(None)
    3
    """
    if metadata is not None and (metadata.positions or metadata.probe_positions):
        return POSITIONS_LAYOUT
    return POSITIONS_LAYOUT - 1
#: float and complex arrays of at least this many bytes are stored without compression: zstd
#: saved 4 % on the basis and sketch state (noise to a compressor) and cost 0.3 s to write
#: and 0.6 s to read 170 MB (measured, issue 16)
RAW_FLOAT_BYTES = 1 << 20
#: how zarr fills the arrays this writer makes: every chunk written is stored as it is
#: (zarr's default compares each chunk with the fill value first, to leave out chunks that
#: hold nothing else: a pass over every value written, for chunks a result never has)
WRITE_CONFIG: Any = {"write_empty_chunks": True}  # zarr's ArrayConfigParams


def _compressors(dtype: Any, shape: Sequence[int]) -> Any:
    """``None`` (no compression) for large float/complex arrays, else zarr's default."""
    if isinstance(dtype, np.dtype) and dtype.kind in ("f", "c") \
            and int(np.prod(shape, dtype=np.int64)) * dtype.itemsize >= RAW_FLOAT_BYTES:
        return None
    return "auto"


class StoreWriter:
    """Builds a result store in ``<path>.staging-<id>`` and commits it by rename.

    ``metadata`` (:class:`~snaplift.results.metadata.StoreMetadata`) gives every array its
    default ``units`` / ``long_name`` and the coordinates its dimensions get in its group.
    """

    metadata: StoreMetadata = StoreMetadata()

    def __init__(self, path: str | Path, *, overwrite: bool = False, workflow_fingerprint: str | None = None) -> None:
        self.path = Path(path)
        if self.path.exists():
            self._check_replaceable(overwrite, workflow_fingerprint)
        self.path.parent.mkdir(parents=True, exist_ok=True)
        self.staging = self.path.with_name(f"{self.path.name}.staging-{uuid.uuid4().hex[:8]}")
        self.root = zarr.open_group(str(self.staging), mode="w", zarr_format=3)
        self.overwrite = overwrite

    def _check_replaceable(self, overwrite: bool, fingerprint: str | None) -> None:
        try:
            attrs = dict(zarr.open_group(str(self.path), mode="r").attrs)
        except Exception:
            attrs = {}
        if not attrs.get(FORMAT_KEY):
            if overwrite:
                raise ResultStoreError(
                    f"{self.path} exists and is not a snaplift result store; refusing to replace it "
                    "even with --overwrite; choose another output.path"
                )
            raise ResultStoreError(
                f"{self.path} exists and is not a snaplift result store; choose another output.path"
            )
        same = fingerprint is not None and attrs.get("workflow_fingerprint") == fingerprint
        if not (same or overwrite):
            raise ResultStoreError(
                f"{self.path} holds results of a different workflow (fingerprint "
                f"{attrs.get('workflow_fingerprint')}); pass --overwrite to replace it or change output.path"
            )

    def array(self, group: str, name: str, data: np.ndarray, dimensions: Sequence[str],
              chunks: tuple[int, ...] | None = None, attrs: dict[str, Any] | None = None) -> zarr.Array:
        data = np.asarray(data)
        if data.ndim != len(dimensions):
            raise ValueError(f"{group}/{name}: {data.ndim}-D data with dimensions {tuple(dimensions)}")
        dtype: Any = data.dtype
        if data.dtype == object or data.dtype.kind == "U":
            # variable-length UTF-8 strings: the zarr v3 string type xarray reads
            from zarr.dtype import VariableLengthUTF8

            data, dtype = data.astype(str).astype(object), VariableLengthUTF8()
        node = self._group_node(group)
        array = node.create_array(
            name,
            shape=data.shape,
            dtype=dtype,
            chunks=chunks or tuple(max(1, s) for s in data.shape),
            dimension_names=tuple(dimensions),
            fill_value=None,
            compressors=_compressors(dtype, data.shape),
            attributes=self._attrs(group, name, dimensions, attrs),
            config=WRITE_CONFIG,
        )
        if data.size:
            write_leading(array, 0, data)
        self._coordinates(group, name, dimensions)
        return array

    def _group_node(self, group: str) -> zarr.Group:
        """``group`` of the store being written (made if need be), one handle per group: a
        look-up costs a metadata read through zarr's event loop, and a small store's thirty
        arrays made three each."""
        if not group:
            return self.root
        nodes = self.__dict__.setdefault("_group_nodes", {})
        if group not in nodes:
            nodes[group] = self.root.require_group(group)
        return nodes[group]

    def _attrs(self, group: str, name: str, dimensions: Sequence[str], attrs: dict[str, Any] | None) -> dict[str, Any]:
        return _jsonable({**self.metadata.attrs(group, name, tuple(dimensions)), **dict(attrs or {})})

    def _coordinates(self, group: str, name: str, dimensions: Sequence[str]) -> None:
        """Write the coordinate of each dimension of ``group/name`` into ``group`` once."""
        if not group:
            return
        # coordinates this writer has seen in the group: one look-up in the store each, not one
        # per array (each costs a metadata read; the 120 lifted fields of a probe made 240)
        seen = self.__dict__.setdefault("_coordinates_seen", set())
        node = None
        for dimension in dimensions:
            target = "time" if dimension == "snapshot" else dimension
            if target == name or (group, target) in seen:
                continue
            node = self._group_node(group) if node is None else node
            if target in node:
                seen.add((group, target))
                continue
            if dimension == "snapshot" and group not in ("basis", "diagnostics", "eigenfunctions"):
                continue
            coordinate = self.metadata.coordinate(dimension)
            if coordinate is not None:
                self.array(group, target, coordinate.values, (dimension,), attrs=coordinate.attrs)
                seen.add((group, target))
            for position, values in self.metadata.point_positions(dimension):  # scattered points
                if position != name and (group, position) not in seen and position not in node:
                    seen.add((group, position))
                    self.array(group, position, values.values, (dimension,), attrs=values.attrs)
        if group == "modes":
            for position, values in self.metadata.probe_position(name):  # a probe's own place
                node = self._group_node(group) if node is None else node
                if (group, position) not in seen and position not in node:
                    seen.add((group, position))
                    self.array(group, position, values.values, (), attrs=values.attrs)

    def arrays(self, group: str, items: Sequence[tuple[str, np.ndarray, Sequence[str]]]) -> None:
        """Several small arrays of one group, ``(name, data, dimensions)`` each, written together.

        One chunk each; created and filled concurrently on one event loop (zarr's public
        asynchronous API), so that many small arrays (e.g. the basis of every lifted field
        of a delay-embedded probe) cost one round trip instead of one each.
        """
        if not items:
            return
        prepared = []
        for name, data, dimensions in items:
            data = np.asarray(data)
            if data.ndim != len(dimensions):
                raise ValueError(f"{group}/{name}: {data.ndim}-D data with dimensions {tuple(dimensions)}")
            prepared.append((name, data, tuple(dimensions)))
        if group:
            self.root.require_group(group)
        path = str(self.staging)

        async def write_all() -> None:
            import zarr.api.asynchronous as zarr_async

            node = await zarr_async.open_group(store=path, path=group, mode="r+", zarr_format=3)
            arrays = await asyncio.gather(*[
                node.create_array(name, shape=data.shape, dtype=data.dtype,
                                  chunks=tuple(max(1, n) for n in data.shape), dimension_names=dimensions,
                                  fill_value=None, attributes=self._attrs(group, name, dimensions, None))
                for name, data, dimensions in prepared])
            await asyncio.gather(*[array.setitem(Ellipsis, data)
                                   for array, (_, data, _) in zip(arrays, prepared) if data.size])

        asyncio.run(write_all())
        for name, _, dimensions in prepared:
            self._coordinates(group, name, dimensions)

    def empty(self, group: str, name: str, shape: tuple[int, ...], dtype: Any, dimensions: Sequence[str],
              chunks: tuple[int, ...], attrs: dict[str, Any] | None = None) -> zarr.Array:
        """An array to be filled chunk by chunk (modes, basis fields)."""
        node = self.root.require_group(group)
        array = node.create_array(name, shape=shape, dtype=dtype, chunks=chunks,
                                  dimension_names=tuple(dimensions), fill_value=None,
                                  compressors=_compressors(np.dtype(dtype), shape),
                                  attributes=self._attrs(group, name, dimensions, attrs), config=WRITE_CONFIG)
        self._coordinates(group, name, dimensions)
        return array

    def group_attrs(self, group: str, attrs: dict[str, Any]) -> None:
        node = self.root.require_group(group) if group else self.root
        # one metadata write (``attrs.update`` writes the group's zarr.json once per key)
        node.update_attributes(_jsonable(attrs))

    def commit(self, attrs: dict[str, Any]) -> Path:
        """Write provenance, consolidate metadata once, mark complete, rename into place."""
        self.root.attrs.update(_jsonable({**attrs, FORMAT_KEY: STORE_VERSION}))
        self.root.attrs[COMPLETE_KEY] = True
        with warnings.catch_warnings():
            # consolidated metadata is not yet in the v3 spec; the README promises it (xarray uses it)
            warnings.filterwarnings("ignore", message="Consolidated metadata", category=UserWarning)
            zarr.consolidate_metadata(str(self.staging))
        old = None
        if self.path.exists():
            old = self.path.with_name(f"{self.path.name}.old-{uuid.uuid4().hex[:8]}")
            os.replace(self.path, old)
        os.replace(self.staging, self.path)
        if old is not None:
            shutil.rmtree(old, ignore_errors=True)
        return self.path

    def abort(self) -> None:
        shutil.rmtree(self.staging, ignore_errors=True)


def write_leading(array: zarr.Array, start: int, values: np.ndarray) -> None:
    """``array[start:start + len(values)] = values``, one chunk of the first axis per call.

    Where the array's chunks span every other axis whole and ``start`` is on a chunk
    boundary, each call hands zarr exactly one chunk's values, a view of ``values``: a slice
    of several chunks made zarr copy every chunk into a fresh buffer before encoding it
    (20 modes of 262144 complex values, 84 MB: 0.11-0.30 s written as groups of four
    modes, 0.03-0.07 s chunk by chunk, measured in issue 16). Otherwise one call, as zarr's
    own slicing assignment.
    """
    values = np.asarray(values)
    if values.ndim == 0 or array.ndim == 0:
        array[...] = values
        return
    stop = start + int(values.shape[0])
    step = int(array.chunks[0])
    if start % step or tuple(array.chunks[1:]) != tuple(array.shape[1:]):
        array[start:stop] = values
        return
    for c0 in range(start, stop, step):
        c1 = min(c0 + step, stop)
        array[c0:c1] = values[c0 - start:c1 - start]


class BackgroundWrites:
    """Writes run by one thread of their own while the caller forms the next values.

    ``submit(function, *args)`` first waits until fewer than ``pending`` writes are
    outstanding (each holds its values: memory stays ``pending + 1`` blocks) and raises a
    failed write's error there, in the caller. Leaving the ``with`` block waits for every
    write; after an error, writes not yet started are cancelled and the one running is
    waited for, so nothing writes into the store once the block is left.

    Example
    -------
    >>> with BackgroundWrites() as background:          # doctest: +SKIP
    ...     for k0 in range(0, n, group):
    ...         background.submit(write_leading, array, k0, form(k0))
    """

    def __init__(self, pending: int = 1) -> None:
        self.pending = max(1, int(pending))
        self._pool = ThreadPoolExecutor(max_workers=1, thread_name_prefix="snaplift-write")
        self._futures: deque[Future[Any]] = deque()

    def submit(self, function: Callable[..., Any], *args: Any) -> None:
        while len(self._futures) >= self.pending:
            self._futures.popleft().result()
        self._futures.append(self._pool.submit(function, *args))

    def __enter__(self) -> BackgroundWrites:
        return self

    def __exit__(self, kind: Any, error: Any, traceback: Any) -> None:
        try:
            while kind is None and self._futures:
                self._futures.popleft().result()
        finally:
            for future in self._futures:
                future.cancel()
            self._futures.clear()
            self._pool.shutdown(wait=True)


def _jsonable(value: Any) -> Any:
    return json.loads(json.dumps(value, default=lambda o: o.tolist() if hasattr(o, "tolist") else str(o)))


def open_result(path: str | Path) -> zarr.Group:
    """Open a complete result store read-only, or fail with what is wrong."""
    path = Path(path)
    if not path.exists():
        raise ResultStoreError(f"result store {path} does not exist; run 'snaplift run WORKFLOW' first")
    try:
        root = zarr.open_group(str(path), mode="r")
    except Exception as error:  # zarr raises several types for a folder that is not a group
        raise ResultStoreError(f"{path} is not a zarr result store ({type(error).__name__})") from None
    if not root.attrs.get(COMPLETE_KEY):
        raise ResultStoreError(f"result store {path} is incomplete (no completion record); rerun the workflow")
    return root


def store_group(root: zarr.Group, name: str) -> zarr.Group:
    """``root[name]`` as a group, or one line saying the store has an array there instead."""
    node = root[name]
    if not isinstance(node, zarr.Group):
        raise ResultStoreError(f"result store {root.store}: '{name}' is an array, expected a group")
    return node


def store_array(root: zarr.Group, name: str) -> zarr.Array:
    """``root[name]`` as an array, or one line saying the store has a group there instead."""
    node = root[name]
    if not isinstance(node, zarr.Array):
        raise ResultStoreError(f"result store {root.store}: '{name}' is a group, expected an array")
    return node


def read_group(path: str | Path, group: str) -> dict[str, np.ndarray]:
    """All arrays of one group of a complete store, in memory."""
    root = open_result(path)
    if group not in root:
        groups = ", ".join(sorted(root.group_keys()))
        raise ResultStoreError(f"result store {path} has no group '{group}'; groups: {groups}")
    node = store_group(root, group)
    return {name: np.asarray(array[...]) for name, array in node.arrays()}
