"""The content sample a run records for the append path: which snapshots, and what reading it costs."""

from __future__ import annotations

import hashlib
from pathlib import Path

import h5py
import numpy as np
import pytest

from snaplift.archive import open_archive
from snaplift.workflow.fingerprint import (
    SAMPLE_BLOCK_BYTES,
    SAMPLE_BLOCKS,
    SAMPLE_FLOOR_BYTES,
    block_hashes,
    sample_blocks,
)

MIB = 2**20


@pytest.mark.parametrize(("n", "chunk", "snapshot_bytes"), [
    (1024, 1, 2 * MIB), (1024, 8, 2 * MIB), (1024, 32, 2 * MIB), (1000, 7, 3000), (5, 64, 2 * MIB),
    (64, 64, 2 * MIB), (1, 1, 100), (300, 16, 200 * MIB)])
def test_sample_covers_first_and_last_snapshot_within_the_budget(n: int, chunk: int, snapshot_bytes: int) -> None:
    blocks = sample_blocks(n, min(chunk, n), min(chunk, n) * snapshot_bytes, n * snapshot_bytes)
    starts = [a for a, _ in blocks]
    assert blocks[0][0] == 0 and blocks[-1][1] == n
    assert starts == sorted(starts) and all(b0 <= a1 for (_, b0), (a1, _) in zip(blocks, blocks[1:]))
    assert len(blocks) <= SAMPLE_BLOCKS
    sampled = sum(b - a for a, b in blocks) * snapshot_bytes
    # the stated bound (module docstring): 1 % of the archive or the floor, whichever is larger;
    # two single snapshots may always be read
    assert sampled <= max(0.01 * n * snapshot_bytes, SAMPLE_FLOOR_BYTES, 2 * snapshot_bytes)


def test_large_chunks_are_sampled_over_a_few_snapshots() -> None:
    # 32 snapshots of 2 MiB per chunk (64 MiB): the chunks are counted whole (a compressed
    # chunk is read whole), two of them, each over two snapshots (8 MiB where 128 MiB were read)
    blocks = sample_blocks(1024, 32, 32 * 2 * MIB, 1024 * 2 * MIB)
    assert blocks == [(0, 2), (1022, 1024)]
    assert all(b - a == SAMPLE_BLOCK_BYTES // (2 * MIB) for a, b in blocks)
    # 8 snapshots of 2 MiB per chunk: four chunks (64 MiB whole), two snapshots of each
    blocks = sample_blocks(1024, 8, 8 * 2 * MIB, 1024 * 2 * MIB)
    assert len(blocks) == 4 and all(b - a == 2 for a, b in blocks)
    assert len(sample_blocks(1024, 1, 2 * MIB, 1024 * 2 * MIB)) == SAMPLE_BLOCKS
    # small chunks are still sampled whole
    assert sample_blocks(1024, 2, 2 * 1 * MIB, 1024 * MIB)[1] == (146, 148)


def _read_chars() -> int:
    # bytes read by this process's system calls, page cache or not (proc(5), /proc/[pid]/io "rchar")
    for line in Path("/proc/self/io").read_text().splitlines():
        if line.startswith("rchar:"):
            return int(line.split()[1])
    raise AssertionError("no rchar in /proc/self/io")


@pytest.mark.skipif(not Path("/proc/self/io").exists(), reason="needs Linux /proc/self/io")
def test_hashing_a_partial_chunk_reads_only_its_snapshots(tmp_path: Path) -> None:
    # an unfiltered HDF5 dataset with 10 MiB chunks of 16 snapshots: the sample reads the
    # sampled snapshots, not whole chunks
    n, points, chunk = 256, 81920, 16
    values = np.random.default_rng(1).standard_normal((n, points))
    with h5py.File(tmp_path / "a.h5", "w") as h5:
        h5.create_dataset("u", data=values, chunks=(chunk, points))
        h5.create_dataset("t", data=np.arange(n, dtype=float))
    reader = open_archive(tmp_path / "a.h5", fields=["u"], time="t")
    blocks = sample_blocks(n, chunk, chunk * points * 8, n * points * 8)
    assert all(b - a < chunk for a, b in blocks)
    before = _read_chars()
    hashes, counted = block_hashes(reader, ["u"], blocks)
    read = _read_chars() - before
    assert counted == sum(b - a for a, b in blocks) * points * 8
    # the kernel's count of bytes read: the sampled snapshots and some metadata, far below whole chunks
    assert read < counted + MIB
    assert read < len(blocks) * chunk * points * 8 / 2
    # the digests are SHA-256 (hashlib) of the field's name and the sampled values, points by snapshots
    expected = [hashlib.sha256(b"u" + np.ascontiguousarray(values[a:b].T).tobytes()).hexdigest()[:32]
                for a, b in blocks]
    assert hashes == expected
