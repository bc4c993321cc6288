"""plan_tiles: whole stored chunks read once, every snapshot once, memory respected."""

from __future__ import annotations

import json
import math

import numpy as np
import pytest

from snaplift.archive import ArchiveInfo, FieldInfo, plan_tiles
from snaplift.errors import ArchiveError, FieldNotFoundError

MIB = 2**20


def _field(name, shape, chunks, dtype="f8"):
    stored = np.dtype(dtype)
    out = np.dtype(np.complex128 if stored.kind == "c" else np.float64)
    return FieldInfo(name, shape, stored, out, chunks, {}, int(np.prod(shape)) * stored.itemsize)


def _info(*fields):
    return ArchiveInfo("invented.h5", "hdf5", {f.name: f for f in fields}, {}, 0)


INFO = _info(
    _field("u", (100, 50, 40), (8, 25, 40)),
    _field("p", (100, 30, 20), (6, 30, 20), dtype="f4"),
)


def _need(points, block, width=50, itemsize=8):
    """The memory model documented in snaplift.archive.plan, written out by hand."""
    return points * block * itemsize + itemsize * width * (2 * points + 2 * block)


def test_blocks_are_whole_multiples_of_every_chunk_and_cover_once():
    plan = plan_tiles(INFO, ["u", "p"], memory_bytes=64 * MIB)
    assert plan.chunk == math.lcm(8, 6) == 24
    starts = [s for s, _ in plan.snapshot_blocks]
    assert all(s % 8 == 0 and s % 6 == 0 for s in starts)
    covered = np.concatenate([np.arange(s, e) for s, e in plan.snapshot_blocks])
    np.testing.assert_array_equal(covered, np.arange(100))  # every snapshot exactly once
    for f, chunk in (("u", 8), ("p", 6)):
        for c0 in range(0, 100, chunk):
            c1 = min(c0 + chunk, 100)
            holding = [b for b in plan.snapshot_blocks if b[0] <= c0 and c1 <= b[1]]
            cutting = [b for b in plan.snapshot_blocks if b[0] < c1 and c0 < b[1]]
            assert len(holding) == 1 and cutting == holding, (f, c0)


def test_block_is_the_largest_that_fits():
    # budget for exactly 3 units of 24 snapshots of u (2000 points) per worker
    budget = _need(2000, 72)
    plan = plan_tiles(INFO, ["u", "p"], memory_bytes=2 * budget)
    assert plan.block == 72
    assert plan.peak_bytes_estimate <= plan.memory_bytes
    assert _need(2000, 96) > budget  # one more unit would not fit
    assert plan.tile_bytes == 2000 * 72 * 8
    assert plan.tile_shape == (2000, 72)


def test_more_workers_shrink_the_block():
    one = plan_tiles(INFO, ["u", "p"], memory_bytes=4 * _need(2000, 72))
    two = plan_tiles(INFO, ["u", "p"], memory_bytes=4 * _need(2000, 72), workers=2)
    assert (one.block, two.block) == (100, 72)
    assert two.peak_bytes_estimate <= two.memory_bytes


def test_whole_archive_in_one_block_when_it_fits():
    plan = plan_tiles(INFO, ["u"], memory_bytes=2**34)
    assert plan.snapshot_blocks == ((0, 100),)
    assert plan.n_tiles == 1
    assert plan.bytes_to_read == 100 * 2000 * 8


def test_tiles_and_describe():
    plan = plan_tiles(INFO, ["u", "p"], memory_bytes=8 * MIB)
    tiles = list(plan.tiles())
    assert len(tiles) == plan.n_tiles == 2 * len(plan.snapshot_blocks)
    assert tiles[0].field == "u" and tiles[1].field == "p"
    assert tiles[1].points == slice(0, 600)
    summary = plan.describe()
    json.dumps(summary)
    assert summary["bytes_to_read"] == 100 * 2000 * 8 + 100 * 600 * 4
    assert plan.point_blocks == (((0, 2000),), ((0, 600),))


def test_complex_fields_count_sixteen_bytes():
    info = _info(_field("q", (40, 10, 10), (4, 10, 10), dtype="c8"))
    plan = plan_tiles(info, ["q"], memory_bytes=2 * _need(100, 8, itemsize=16))
    assert plan.block == 8
    assert plan.tile_bytes == 100 * 8 * 16


def test_contiguous_whole_chunk_must_fit():
    # chunks None: the stored chunk is the whole length (FieldInfo.snapshot_chunk)
    info = _info(_field("w", (30, 10, 10), None))
    plan = plan_tiles(info, ["w"], memory_bytes=2 * _need(100, 30))
    assert plan.snapshot_blocks == ((0, 30),)
    with pytest.raises(ArchiveError, match="30 snapshots"):
        plan_tiles(info, ["w"], memory_bytes=2 * _need(100, 29))


def test_memory_error_gives_numbers_and_the_fix():
    with pytest.raises(ArchiveError) as caught:
        plan_tiles(INFO, ["u", "p"], memory_bytes=1 * MIB, workers=2)
    message = str(caught.value)
    assert "field 'u'" in message and "24 snapshots" in message
    assert "compress.memory" in message and "MiB" in message and "2 workers" in message
    required = int(message.split("at least ")[1].split(" bytes")[0])
    assert required == 2 * 2 * _need(2000, 24)
    plan = plan_tiles(INFO, ["u", "p"], memory_bytes=required, workers=2)
    assert plan.block == 24


def test_bad_requests():
    with pytest.raises(FieldNotFoundError, match="'v'.*u, p"):
        plan_tiles(INFO, ["v"], memory_bytes=MIB)
    mixed = _info(_field("a", (10, 4), (1, 4)), _field("b", (12, 4), (1, 4)))
    with pytest.raises(ArchiveError, match="same number of snapshots"):
        plan_tiles(mixed, ["a", "b"], memory_bytes=MIB)
    with pytest.raises(ArchiveError, match="no fields"):
        plan_tiles(INFO, [], memory_bytes=MIB)
