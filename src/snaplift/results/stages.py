"""What scan and compress write to the result store, and how a later stage reads compress back.

(``fit`` and ``modes`` write through :mod:`snaplift.results.fit_output`.)

The runner writes each stage's outputs as soon as the stage finishes (into the staging
store, :mod:`snaplift.results.staging`); later stages read them back from there with
:func:`load_compressed`, whether they were computed a moment ago, kept from a killed run
or hard-linked from the previous complete store. So ``fit`` and ``modes`` see the same
numbers in all three cases.

What compress leaves (README.md, "The result store"), and what ``fit``/``modes`` need of it:

- ``basis/singular_value`` (rank,), ``basis/coefficient`` (rank, snapshot) and
  ``basis/<field>`` (rank, *grid): the basis vectors in field units (scale, weights and
  mask undone; NaN at masked points). Loading redoes ``sqrt(w) / scale`` on the kept
  points, which gives back the prepared basis rows to rounding (~1e-16 relative).
- ``prepare/scale`` (field,), ``prepare/mean_<field>``, ``prepare/weights_<field>``,
  ``prepare/mask_<field>`` and the group attributes ``center`` / ``scale``.
- ``diagnostics/column_norm`` (norm of every prepared snapshot, for the energy outside
  the basis), ``diagnostics/snapshot_norm`` (weighted raw norm), ``projection_error``.
- ``sketch/<name>``: the state a compress method keeps for appending snapshots later,
  if it has any (``Compressed.sketch_state``, a mapping of arrays).
"""

from __future__ import annotations

from dataclasses import dataclass, field, replace
from typing import Any

import numpy as np

from snaplift.archive._base import Reader
from snaplift.archive.matrix import FieldRows, SnapshotMatrix
from snaplift.errors import ResultStoreError
from snaplift.linalg.randomized import LowRank
from snaplift.prepare import Preparation, to_physical
from snaplift.results.store import BackgroundWrites, StoreWriter, store_group, write_leading
from snaplift.results.stored_basis import StoredBasis, StoredFieldBasis

__all__ = ["Compressed", "basis_bytes", "load_compressed", "write_compressed", "write_scan"]


def basis_bytes(matrix: SnapshotMatrix, rank: int) -> int:
    """Bytes ``basis/<field>`` takes on disk (uncompressed upper bound)."""
    itemsize = np.dtype(matrix.dtype).itemsize
    return int(sum(rank * int(np.prod(f.grid)) * itemsize for f in matrix.fields))


def write_scan(writer: StoreWriter, time: np.ndarray, snapshot_index: np.ndarray) -> None:
    writer.array("diagnostics", "time", np.asarray(time), ("snapshot",))
    writer.array("diagnostics", "snapshot_index", np.asarray(snapshot_index), ("snapshot",))


def _unscaled(preparation: Preparation) -> Preparation:
    return replace(preparation, field_scale={f: 1.0 for f in preparation.fields})


#: an array of vectors (rank or mode x grid) up to this size is one chunk; larger ones
#: get one chunk per vector (a chunk file per value of a small field, e.g. lifted
#: probes, would cost a file write each)
ONE_CHUNK_BYTES = 4 * 2**20
#: per-field arrays up to this size are written together (:meth:`StoreWriter.arrays`)
SMALL_ARRAY_BYTES = 64 * 2**10
#: bytes written per call (basis vectors) or per chunk (the sketch state)
WRITE_GROUP_BYTES = 16 * 2**20


def _vector_chunks(values: np.ndarray | None, shape: tuple[int, ...] | None = None, itemsize: int = 8
                   ) -> tuple[int, ...]:
    shape = tuple(values.shape) if values is not None else tuple(shape or ())
    itemsize = values.dtype.itemsize if values is not None else itemsize
    if int(np.prod(shape)) * itemsize <= ONE_CHUNK_BYTES:
        return tuple(max(1, int(n)) for n in shape)
    return (1, *shape[1:])


def _row_chunks(value: np.ndarray) -> tuple[int, ...]:
    """Chunks of at most :data:`WRITE_GROUP_BYTES` along the first axis (one chunk for a small
    array): zarr encodes and writes them concurrently, so the sketch state (n x k, 170 MB for
    rank 40 on 262144 points) is written in a fraction of the time of one chunk (issue 16)."""
    shape = tuple(max(1, int(n)) for n in value.shape)
    if value.ndim == 0 or value.nbytes <= WRITE_GROUP_BYTES:
        return shape
    row = max(1, value.nbytes // shape[0])
    return (max(1, WRITE_GROUP_BYTES // row), *shape[1:])


def write_compressed(writer: StoreWriter, compressed: Compressed, compute: Any, *, scale_setting: Any) -> None:
    """Write everything ``fit`` and ``modes`` need of a compress result (module docstring)."""
    matrix, preparation, lowrank = compressed.matrix, compressed.preparation, compressed.lowrank
    dims = writer.metadata.grid_dims({f.name: f.grid for f in matrix.fields})
    writer.array("basis", "singular_value", np.asarray(lowrank.singular_value), ("rank",))
    writer.array("basis", "coefficient", np.asarray(lowrank.coefficient), ("rank", "snapshot"))
    writer.array("diagnostics", "column_norm", np.asarray(lowrank.column_norm), ("snapshot",),
                 attrs={"meaning": "norm of each prepared (weighted, scaled, centred) snapshot"})
    writer.array("diagnostics", "snapshot_norm", np.asarray(preparation.snapshot_norm), ("snapshot",),
                 attrs={"meaning": "weighted norm of each raw snapshot"})
    writer.array("diagnostics", "projection_error", lowrank.projection_error(), ("snapshot",),
                 attrs={"kind": compressed.projection_kind,
                        "norm": "relative, weighted and scaled (physical inner product)"})
    writer.array("prepare", "scale", np.array([preparation.field_scale[f] for f in preparation.fields]),
                 ("field",), attrs={"fields": list(preparation.fields), "meaning": "each field was divided by this",
                                    "units_per_field": [writer.metadata.units_of(f) for f in preparation.fields]})
    writer.array("prepare", "field", np.array(list(preparation.fields), dtype=str), ("field",))
    lifted = {rows.name: {"source": rows.archive_field, "term": rows.term, "snapshot_shift": int(rows.snapshot_shift)}
              for rows in matrix.fields if rows.lifted}
    writer.group_attrs("prepare", {"center": preparation.centered,
                                   "scale": scale_setting if isinstance(scale_setting, str) else dict(scale_setting),
                                   "lifted": lifted})
    small: list[tuple[str, np.ndarray, tuple[str, ...]]] = []  # written together: one round trip
    for rows in matrix.fields:
        # one basis vector at a time: the field's temporaries are one vector, not n x rank;
        # small fields (e.g. the lifted fields of a delay-embedded probe) are written together
        basis_rows = _basis_field_rows(lowrank.basis, rows, compute)
        dtype = np.result_type(basis_rows, float)
        shape = (basis_rows.shape[1], *rows.grid)
        if int(np.prod(shape)) * dtype.itemsize <= SMALL_ARRAY_BYTES and len(matrix.fields) > 1:
            physical = to_physical(np.asarray(basis_rows).T, rows, preparation, add_mean=False)
            small.append((rows.name, rows.expand(physical), ("rank", *dims[rows.name])))
        else:
            basis_array = writer.empty("basis", rows.name, shape, dtype, ("rank", *dims[rows.name]),
                                       chunks=_vector_chunks(None, shape, dtype.itemsize))
            whole = np.empty(shape, dtype) if basis_array.chunks[0] == shape[0] else None
            # a few vectors per write: zarr writes their chunks concurrently (one at a time
            # cost a round trip each); the temporaries stay a few vectors, not n x rank
            group = max(1, WRITE_GROUP_BYTES // max(1, dtype.itemsize * int(np.prod(shape[1:]))))
            # each group written by a thread of its own while the next is formed (one waits at most)
            with BackgroundWrites() as background:
                for v0 in range(0, basis_rows.shape[1], group):
                    v1 = min(v0 + group, basis_rows.shape[1])
                    block = whole[v0:v1] if whole is not None else np.empty((v1 - v0, *shape[1:]), dtype)
                    for vector in range(v0, v1):
                        block[vector - v0] = rows.expand(to_physical(basis_rows[:, vector], rows, preparation,
                                                                     add_mean=False))
                    if whole is None:
                        background.submit(write_leading, basis_array, v0, block)
                    del block
            if whole is not None:  # one chunk: written at once
                basis_array[...] = whole
        del basis_rows
        if rows.keep is not None:
            mask = np.ones(int(np.prod(rows.grid)), dtype=bool)
            mask[rows.keep] = False
            writer.array("prepare", f"mask_{rows.name}", mask.reshape(rows.grid), dims[rows.name])
        if rows.sqrt_weight is not None:
            writer.array("prepare", f"weights_{rows.name}", rows.expand(rows.sqrt_weight**2), dims[rows.name])
        if preparation.mean is not None:
            mean = to_physical(preparation.mean[rows.offset:rows.stop], rows, _unscaled(preparation), add_mean=False)
            writer.array("prepare", f"mean_{rows.name}", rows.expand(mean), dims[rows.name])
    writer.arrays("basis", small)
    for name, value in compressed.sketch_state.items():
        value = np.asarray(value)
        writer.array("sketch", name, value, tuple(f"{name}_{i}" for i in range(value.ndim)),
                     chunks=_row_chunks(value))


@dataclass(frozen=True)
class Compressed:
    """What compress hands on, computed or read back (:func:`load_compressed`): the same type.

    ``matrix`` describes the (lifted) snapshot matrix, ``preparation`` its weights, scales
    and mean, ``lowrank`` the factors (:class:`~snaplift.linalg.randomized.LowRank`).
    ``projection_kind`` is ``"exact"`` or ``"estimate"`` (single-pass sketch without a
    check pass); ``sketch_state`` the arrays a later append needs (``sketch`` only; the
    store's ``sketch/`` group); ``info`` widths, tiles, runner, resume facts (empty when
    read back).
    """

    matrix: SnapshotMatrix
    preparation: Preparation
    lowrank: LowRank
    passes: int
    bytes_read: int
    projection_kind: str = "exact"
    method: str = "randomized"
    sketch_state: dict[str, Any] = field(default_factory=dict)  # stored arrays (np.asarray reads one)
    info: dict[str, object] = field(default_factory=dict)


def _group(root: Any, name: str, where: str) -> Any:
    if name not in root:
        raise ResultStoreError(f"{where} has no group '{name}'; the compress stage did not finish there")
    return store_group(root, name)


#: a stored basis up to this size is loaded into memory rather than as a lazy array (the
#: many small fields of a delay-embedded probe); larger ones stay lazy, one field's rows
#: at a time, as compress.memory plans it (at 64 MiB a 200,000-point rank-40 basis was
#: loaded whole, twice with its prepared copy: 136 MiB over the budget in
#: tests/faults/test_memory_budget.py)
EAGER_BASIS_BYTES = 4 * 2**20


def load_compressed(root: Any, reader: Reader, fields: list[str], *, passes: int = 0, method: str = "randomized",
                    snapshot_block: int = 1, where: str = "result store") -> Compressed:
    """Read a compress result back from ``root`` (a staging or complete store) without the archive.

    Example
    -------
    >>> compressed = load_compressed(zarr.open_group("r.zarr"), reader, ["u"])  # doctest: +SKIP
    >>> compressed.lowrank.coefficient.shape                                      # doctest: +SKIP
    (40, 2000)
    """
    basis, prepare, diagnostics = (_group(root, g, where) for g in ("basis", "prepare", "diagnostics"))
    scale = np.asarray(prepare["scale"][...], dtype=np.float64)
    stored_fields = list(prepare["scale"].attrs.get("fields", fields))
    if stored_fields != list(fields):
        raise ResultStoreError(
            f"{where}: compress result is for fields {stored_fields}, the workflow asks for {fields}")
    rows: list[FieldRows] = []
    basis_blocks: list[Any] = []  # numpy (small basis) or StoredFieldBasis
    means: list[np.ndarray] = []
    offset = 0
    centered = bool(prepare.attrs.get("center", False))
    lifted = dict(prepare.attrs.get("lifted", {}))
    # each array opened once (a metadata read each: 120 for the lifted fields of a probe)
    members = dict(basis.arrays())
    for name in fields:
        if name not in members:
            raise ResultStoreError(f"{where}: basis/{name} is missing; the compress stage did not finish there")
    # a small basis (many lifted fields of few points, e.g. delay-embedded probes) is read
    # at once; a lazy graph over one array per lifted field costs more than the reading
    stored_bytes = sum(int(np.prod(members[name].shape)) * members[name].dtype.itemsize for name in fields)
    eager = stored_bytes <= EAGER_BASIS_BYTES
    for name, field_scale in zip(fields, scale):
        grid = tuple(int(s) for s in members[name].shape[1:])
        keep = None
        if f"mask_{name}" in prepare:
            keep = np.flatnonzero(~np.asarray(prepare[f"mask_{name}"][...], dtype=bool).ravel())
        sqrt_weight = None
        if f"weights_{name}" in prepare:
            w = np.asarray(prepare[f"weights_{name}"][...], dtype=np.float64).ravel()
            sqrt_weight = np.sqrt(w if keep is None else w[keep])
        factor = (sqrt_weight if sqrt_weight is not None else 1.0) / field_scale
        n_rows = int(np.prod(grid)) if keep is None else int(keep.size)
        if eager:
            flat = np.asarray(members[name][...]).reshape(members[name].shape[0], -1)
            kept = flat if keep is None else flat[:, keep]
            # physical = prepared * scale / sqrt(w); at w == 0 the prepared rows are zero
            basis_blocks.append(np.where(np.isfinite(kept), kept * factor, 0.0).T)
        else:  # lazy: the modes stage reads one field's rows at a time, a few vectors per read
            basis_blocks.append(StoredFieldBasis(members[name], keep, factor, n_rows))
        if centered:
            mean = np.asarray(prepare[f"mean_{name}"][...]).ravel()
            mean = mean if keep is None else mean[keep]
            means.append(np.where(np.isfinite(mean), mean * (sqrt_weight if sqrt_weight is not None else 1.0), 0.0))
        lift = lifted.get(name, {})
        rows.append(FieldRows(name, grid, keep, sqrt_weight, offset, n_rows, source=lift.get("source"),
                              term=lift.get("term", "x"), snapshot_shift=int(lift.get("snapshot_shift", 0))))
        offset += n_rows
    row_scale = np.concatenate([np.full(r.n_rows, 1.0 / s) for r, s in zip(rows, scale)])
    preparation = Preparation(tuple(fields), {f: float(s) for f, s in zip(fields, scale)}, row_scale,
                              np.concatenate(means) if centered else None,
                              np.asarray(diagnostics["snapshot_norm"][...], dtype=np.float64))
    snapshot_index = np.asarray(diagnostics["snapshot_index"][...], dtype=np.int64)
    block = max(1, int(snapshot_block))
    blocks = tuple((c0, min(c0 + block, snapshot_index.size)) for c0 in range(0, snapshot_index.size, block))
    coefficient = np.asarray(basis["coefficient"][...])
    dtype = np.dtype(np.complex128 if np.iscomplexobj(coefficient) or any(np.iscomplexobj(b) for b in basis_blocks)
                     else np.float64)
    matrix = SnapshotMatrix(reader, tuple(rows), snapshot_index, blocks, dtype)
    singular_value = np.asarray(basis["singular_value"][...], dtype=np.float64)
    # LowRank keeps vh; the stored coefficients are diag(s) vh (rows of s = 0 are zero)
    vh = np.divide(coefficient, singular_value[:, np.newaxis], out=np.zeros_like(coefficient),
                   where=singular_value[:, np.newaxis] > 0)
    kind = str(diagnostics["projection_error"].attrs.get("kind", "exact"))
    lowrank = LowRank(basis=np.concatenate(basis_blocks, axis=0) if eager else StoredBasis(basis_blocks),
                      singular_value=singular_value, vh=vh,
                      column_norm=np.asarray(diagnostics["column_norm"][...], dtype=np.float64), passes=passes,
                      projection_kind=kind)
    # the sketch state (n x k range sketch: 170 MB at rank 40 on 262144 points) only matters
    # to a later append, which reads it itself: kept as stored arrays, read when asked for
    sketch = dict(root["sketch"].arrays()) if "sketch" in root else {}
    return Compressed(matrix, preparation, lowrank, passes, 0, projection_kind=kind, method=method,
                      sketch_state=sketch)


def _basis_field_rows(basis: Any, rows: Any, compute: Any) -> np.ndarray:
    """One field's rows of the (lazy) basis, one basis vector at a time into one array.

    Computing the whole slice at once held every chunk's decoding temporaries and then
    the concatenated copy: several times the n x rank the result needs (issue 11).
    """
    part = basis[rows.offset:rows.stop]
    if isinstance(part, np.ndarray):
        return part
    if isinstance(part, StoredFieldBasis):  # read back from a store: whole chunks, no task graph
        return np.asarray(part)
    if part.nbytes <= SMALL_ARRAY_BYTES:  # a small field: one task, not one per vector
        (whole,) = compute(part)
        return np.asarray(whole)
    out = np.empty(part.shape, dtype=part.dtype, order="F")
    # a few basis vectors per task graph: each graph costs ~10 ms of scheduling, more than
    # reading one 2 MiB vector (rank 40 on 262144 points: 40 graphs took 0.6-1.7 s, 3 graphs
    # 0.3-0.7 s); a group is at most BASIS_GROUP_BYTES, so the temporaries stay small
    group = max(1, BASIS_GROUP_BYTES // max(1, part.shape[0] * part.dtype.itemsize))
    for c0 in range(0, part.shape[1], group):
        c1 = min(c0 + group, part.shape[1])
        (out[:, c0:c1],) = compute(part[:, c0:c1])
    return out


#: basis vectors computed per task graph by :func:`_basis_field_rows`, in bytes
BASIS_GROUP_BYTES = 32 * 2**20
