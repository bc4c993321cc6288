"""plan_tiles with a compress method: the memory model of snaplift.archive.plan, by hand."""

from __future__ import annotations

import math

import numpy as np
import pytest

from snaplift.archive import ArchiveInfo, FieldInfo, plan_tiles
from snaplift.archive.plan import TILES_PER_WORKER, method_passes, method_widths
from snaplift.errors import ArchiveError

MIB = 2**20


def _field(name, shape, chunks, dtype="f8", attrs=None):
    stored = np.dtype(dtype)
    out = np.dtype(np.complex128 if stored.kind == "c" else np.float64)
    return FieldInfo(name, shape, stored, out, chunks, dict(attrs or {}), int(np.prod(shape)) * stored.itemsize)


def _info(*fields, fmt="hdf5"):
    return ArchiveInfo("invented.h5", fmt, {f.name: f for f in fields}, {}, 0)


# time-major: one snapshot per chunk, 2 fields of 64 x 64 and 32 x 32 points, 4096 snapshots
TIME_MAJOR = _info(_field("u", (4096, 64, 64), (1, 64, 64)), _field("p", (4096, 32, 32), (1, 32, 32), dtype="f4"))


def _peak(n_t, b, k, l, *, n, m, r, fields, workers, in_flight, method, s=8):
    """The module docstring's model written out by hand."""
    tile = n_t * b * s
    # the sparse sign co-range map keeps zeta = min(l, 8) int32 columns + float64 signs per row
    # and one int32 column pointer per row
    cache = n * (min(l, 8) * (4 + 8) + 4) if method == "sketch" else 0
    result = s * (n_t * k + b * (k + l))
    driver = {"sketch": s * (2 * n * k + n * r + fields * m * l + n) + cache,
              "randomized": s * (3 * n * k + m * k + n)}[method]
    # worker processes: each holds an n x k slot or operand through a pass, and the driver
    # collects one slot per worker beside its own accumulator
    driver = max(driver, s * ((workers + 1) * n * k + m * k + n))
    return workers * (2 * tile + cache + s * n * k) + in_flight * result + driver


@pytest.mark.parametrize("method", ["sketch", "randomized"])
def test_time_major_tiles_are_full_height_and_fit(method):
    plan = plan_tiles(TIME_MAJOR, ["u", "p"], memory_bytes=512 * MIB, workers=2, method=method, rank=40)
    k, l = method_widths(method, 40)
    assert plan.point_blocks == (((0, 4096),), ((0, 1024),))  # never rechunked, never split
    peak = _peak(4096, plan.block, k, l, n=5120, m=4096, r=40, fields=2, workers=2, in_flight=3, method=method)
    assert plan.peak_bytes_estimate == peak <= 512 * MIB
    assert plan.n_tiles // 2 >= TILES_PER_WORKER * 2  # every worker has work
    assert plan.passes == method_passes(method) and plan.bytes_to_read == 4096 * (4096 * 8 + 1024 * 4)


def test_block_is_the_longest_that_fits_when_memory_is_the_limit():
    plan = plan_tiles(TIME_MAJOR, ["u"], memory_bytes=64 * MIB, workers=2, method="randomized", rank=40)

    def peak(b):
        return _peak(4096, b, 50, 0, n=4096, m=4096, r=40, fields=1, workers=2, in_flight=3, method="randomized")

    assert peak(plan.block) <= 64 * MIB < peak(plan.block + 1)


def test_rows_are_split_when_one_chunk_does_not_fit():
    info = _info(_field("w", (100, 512, 512), (4, 512, 512)))
    # the driver's accumulators take ~126 MB, the worker's n x k slot 42 MB; a full-height chunk
    # tile and its results ~100 MB more
    plan = plan_tiles(info, ["w"], memory_bytes=200 * MIB, workers=1, method="randomized", rank=10)
    assert plan.block == 4  # one stored chunk of snapshots
    sizes = {stop - start for start, stop in plan.point_blocks[0][:-1]}
    assert len(plan.point_blocks[0]) > 1 and len(sizes) == 1 and sizes.pop() % 512 == 0  # whole grid rows
    assert plan.partial_chunk_reads and plan.peak_bytes_estimate <= 200 * MIB
    assert plan.bytes_to_read == 100 * 512 * 512 * 8  # uncompressed: partial reads cost their bytes
    compressed = _info(_field("w", (100, 512, 512), (4, 512, 512), attrs={"compression": "gzip"}))
    again = plan_tiles(compressed, ["w"], memory_bytes=200 * MIB, workers=1, method="randomized", rank=10)
    # each row block decompresses whole chunks again
    assert again.bytes_to_read == len(again.point_blocks[0]) * 100 * 512 * 512 * 8


def test_tsqr_tiles_hold_every_snapshot():
    info = _info(_field("v", (200, 300, 40), (1, 300, 40)))
    # 12000 x 200 values (18.3 MiB): the R factors of leaves of r rows hold min(r, 200) x 200
    # each, as much as the data unless leaves are much taller than 200 rows
    plan = plan_tiles(info, ["v"], memory_bytes=32 * MIB, workers=2, method="tsqr", rank=20)
    assert plan.snapshot_blocks == ((0, 200),)
    assert len(plan.point_blocks[0]) > 1 and all((b - a) % 40 == 0 for a, b in plan.point_blocks[0][:-1])
    assert plan.peak_bytes_estimate <= 32 * MIB and plan.passes == 2
    with pytest.raises(ArchiveError, match="needs at least"):  # the refused budget says what would do
        plan_tiles(info, ["v"], memory_bytes=16 * MIB, workers=2, method="tsqr", rank=20)


def test_blocks_align_to_the_least_common_multiple_of_stored_chunks():
    info = _info(_field("u", (120, 10, 10), (8, 10, 10)), _field("p", (120, 5, 5), (6, 5, 5)))
    plan = plan_tiles(info, ["u", "p"], memory_bytes=64 * MIB, method="sketch", rank=3)
    assert plan.chunk == math.lcm(8, 6) and all(s % 24 == 0 for s, _ in plan.snapshot_blocks)


def test_too_small_a_budget_names_the_requirement():
    with pytest.raises(ArchiveError) as caught:
        plan_tiles(TIME_MAJOR, ["u"], memory_bytes=1 * MIB, workers=2, method="sketch", rank=40)
    message = str(caught.value)
    assert "compress.memory" in message and "'sketch'" in message and "2 workers" in message
    required = int(message.split("at least ")[-1].split(" bytes")[0])
    assert plan_tiles(TIME_MAJOR, ["u"], memory_bytes=required, workers=2, method="sketch", rank=40)


def test_describe_reports_passes_and_memory_per_worker():
    plan = plan_tiles(TIME_MAJOR, ["u"], memory_bytes=512 * MIB, workers=2, method="randomized", rank=40,
                      power_iterations=2)
    summary = plan.describe()
    assert summary["passes"] == 6 and summary["bytes_all_passes"] == 6 * plan.bytes_to_read
    assert summary["peak_bytes_per_worker"] == 2 * plan.tile_bytes + plan.result_bytes
    assert method_widths("sketch", 40) == (81, 163) and method_passes("sketch", check_pass=True) == 2
