"""Issue 11 (a): blocks read again are verified against a checksum of their first read.

A rewrite in place is made at the byte level (the chunk's bytes in the HDF5 file are
overwritten, the file's modification time restored), so that neither the file's size
and time nor the fingerprint's byte sample can see it: only the block checksums can.
The reference for every result is a run from scratch on the archive as it is after the
edit (same seed, same plan); the checksum is CRC-32C (Castagnoli et al. 1993), compared
with google_crc32c's own value in the first test.
"""

from __future__ import annotations

import os
import signal
import subprocess
import sys
from pathlib import Path

import google_crc32c
import h5py
import numpy as np
import pytest
import yaml
import zarr

from snaplift.archive import _handles
from snaplift.results.store import read_group
from snaplift.stream import _passes
from snaplift.stream._digest import block_digest
from snaplift.workflow.runner import FAULT_VARIABLE, RunInterrupted, run_workflow

SNAPSHOTS = 64
GRID = (40, 50)  # 16 kB a snapshot: the file (1 MB) is larger than the fingerprint's byte sample
EDITED = 20  # a snapshot outside the byte sample (checked) and outside the sampled blocks
THREADS = {"kind": "threads", "workers": 2}
# 8 snapshots a tile, 8 tiles a pass (as in tests/workflow/test_runner_resume.py)
STREAMED = {"memory": "2GiB", "in_memory": "never", "checkpoint_every": 2}


def _values(m: int) -> np.ndarray:
    # three damped oscillations on a 40 x 50 grid and a noise tail (a known linear system)
    rng = np.random.default_rng(4)
    pairs = np.array([0.98 * np.exp(0.3j), 0.92 * np.exp(1.0j), 0.95 * np.exp(0.1j)])
    n = GRID[0] * GRID[1]
    phi = rng.standard_normal((n, 3)) + 1j * rng.standard_normal((n, 3))
    x = (phi @ (pairs[:, None] ** np.arange(m)[None, :])).real.T.reshape(-1, *GRID)
    return x + 1e-3 * rng.standard_normal(x.shape)


def _archive(folder: Path) -> Path:
    path = folder / "a.h5"
    with h5py.File(path, "w") as h5:
        h5.create_dataset("t", data=0.05 * np.arange(SNAPSHOTS), maxshape=(None,))
        h5.create_dataset("u", data=_values(SNAPSHOTS), chunks=(1, *GRID), maxshape=(None, *GRID))
    return path


def _workflow(folder: Path, method: str = "randomized", output: str = "r.zarr", name: str = "w.yaml") -> Path:
    compress = {"method": method, "rank": 6, "oversample": 4, **STREAMED}
    data = {"archive": {"path": "a.h5", "fields": ["u"], "time": "t"}, "prepare": {"center": True},
            "compress": compress, "fit": {"rank": 6}, "output": {"path": output, "report": False},
            "cluster": THREADS}
    path = folder / name
    path.write_text(yaml.safe_dump(data))
    return path


def _rewrite_in_place(path: Path, snapshot: int) -> None:
    """Overwrite the bytes of one snapshot's chunk (3 u + 1) and restore the file's times."""
    stat = path.stat()
    with h5py.File(path, "r") as h5:
        chunk = h5["u"].id.get_chunk_info_by_coord((snapshot, 0, 0))
        values = np.asarray(h5["u"][snapshot], dtype="<f8")
    # the edit must be invisible to the fingerprint's byte sample (64 KiB at start, middle, end)
    size, window = stat.st_size, 64 * 1024
    for start in (0, size // 2 - window // 2, size - window):
        assert chunk.byte_offset + chunk.size <= start or chunk.byte_offset >= start + window
    with open(path, "r+b") as handle:
        handle.seek(chunk.byte_offset)
        handle.write((3 * values + 1).astype("<f8").tobytes())
    os.utime(path, ns=(stat.st_atime_ns, stat.st_mtime_ns))


def _run(path: Path, fault: str | None = None) -> subprocess.CompletedProcess:
    env = {k: v for k, v in os.environ.items() if k != FAULT_VARIABLE}
    env["PYTHONWARNINGS"] = "ignore"
    if fault:
        env[FAULT_VARIABLE] = fault
    return subprocess.run([sys.executable, "-m", "snaplift.cli", "run", str(path)], cwd=path.parent, env=env,
                          capture_output=True, text=True, timeout=300)


def _compress_record(store: Path) -> dict:
    return dict(zarr.open_group(str(store), mode="r").attrs)["stages"]["compress"]


def _same_results(a: Path, b: Path) -> None:
    # reference: a run from scratch of the same workflow on the same archive; 1e-12 relative
    for group, name in (("basis", "singular_value"), ("spectrum", "eigenvalue")):
        np.testing.assert_allclose(read_group(a, group)[name], read_group(b, group)[name], rtol=1e-12, atol=1e-12)


def _one_line(outcome: subprocess.CompletedProcess, *named: str) -> str:
    lines = [line for line in outcome.stderr.splitlines() if line.strip()]
    assert outcome.returncode == 2, (outcome.returncode, outcome.stderr[-2000:])
    assert len(lines) == 1 and "Traceback" not in outcome.stderr, outcome.stderr[-2000:]
    for text in named:
        assert text in lines[0], (text, lines[0])
    return lines[0]


def test_the_block_checksum_is_crc32c_of_each_snapshot() -> None:
    values = np.arange(12.0).reshape(3, 4)  # snapshot-major: one row per snapshot
    # reference: google_crc32c over each row's bytes
    assert list(block_digest(values)) == [google_crc32c.value(row.tobytes()) for row in values]
    # a strided (non-contiguous) block gives the digests of its values, not of its memory
    wide = np.zeros((3, 8))
    wide[:, ::2] = values
    assert np.array_equal(block_digest(wide[:, ::2]), block_digest(values))
    changed = values.copy()
    changed[1, 2] = np.nextafter(changed[1, 2], np.inf)  # one bit of one snapshot
    assert list(block_digest(changed) != block_digest(values)) == [False, True, False]


@pytest.mark.parametrize("method", ["randomized", "tsqr"])
def test_a_block_rewritten_between_passes_stops_the_run(tmp_path: Path, monkeypatch: pytest.MonkeyPatch,
                                                       faults, method: str) -> None:
    archive = _archive(tmp_path)
    workflow = _workflow(tmp_path, method)
    original = _passes.Pass.end_pass

    def end_pass(self, state) -> None:
        original(self, state)
        if state.pass_number == 1:  # between the first pass and the second
            _handles.clear(close=True)
            _rewrite_in_place(archive, EDITED)

    monkeypatch.setattr(_passes.Pass, "end_pass", end_pass)
    before = faults.hashes(archive)
    stopped = faults.cli("run", workflow)
    line = faults.one_line_error(stopped, "a.h5", "field 'u'", "rows", "changed" if method == "tsqr" else "rewritten")
    if method == "randomized":  # tiles of 8 snapshots: the tile and the edited snapshot are named
        assert "snapshots 16..23 (snapshot 20 first)" in line
    assert faults.hashes(archive) != before  # the edit happened (and nothing else wrote the archive)
    faults.no_complete_store(tmp_path / "r.zarr")
    assert not list((tmp_path / "r.zarr.staging").glob("checkpoint/compress-*/compress.npz"))
    monkeypatch.setattr(_passes.Pass, "end_pass", original)
    # the checkpoint was dropped: the next run starts afresh from the archive as it is now
    again = faults.cli("run", workflow, "-q")
    assert again.code == 0, again.stderr
    fresh = _workflow(tmp_path, method, output="fresh.zarr", name="fresh.yaml")
    assert faults.cli("run", fresh, "-q").code == 0
    _same_results(tmp_path / "r.zarr", tmp_path / "fresh.zarr")


def _interrupt_inside_pass_two(workflow: Path, monkeypatch: pytest.MonkeyPatch) -> None:
    # Ctrl-C after 11 tiles (8 a pass): the checkpoint of tile 10 holds pass 1 and 2 tiles of pass 2
    monkeypatch.setenv(FAULT_VARIABLE, "compress:11:INT")
    with pytest.raises(RunInterrupted):
        run_workflow(workflow)
    monkeypatch.delenv(FAULT_VARIABLE)


def test_a_block_rewritten_between_an_interrupted_run_and_its_resume_is_detected(
        tmp_path: Path, monkeypatch: pytest.MonkeyPatch, faults) -> None:
    pytest.importorskip("dask_jobqueue.slurm")  # as in tests/workflow/test_runner_resume.py
    archive = _archive(tmp_path)
    workflow = _workflow(tmp_path)
    _interrupt_inside_pass_two(workflow, monkeypatch)
    _rewrite_in_place(archive, EDITED)
    resumed = faults.cli("run", workflow)
    faults.one_line_error(resumed, "a.h5", "field 'u'", "snapshots 16..23 (snapshot 20 first)", "first read")
    faults.no_complete_store(tmp_path / "r.zarr")
    # the run stopped with its checkpoint dropped: the next one computes from the archive as it is
    again = faults.cli("run", workflow, "-q")
    assert again.code == 0, again.stderr
    fresh = _workflow(tmp_path, output="fresh.zarr", name="fresh.yaml")
    assert faults.cli("run", fresh, "-q").code == 0
    _same_results(tmp_path / "r.zarr", tmp_path / "fresh.zarr")


@pytest.mark.slow
def test_a_block_rewritten_after_a_kill_is_detected_on_resume(tmp_path: Path) -> None:
    archive = _archive(tmp_path)
    workflow = _workflow(tmp_path)
    killed = _run(workflow, "compress:11")  # SIGKILL inside pass 2 (8 tiles a pass)
    assert killed.returncode == -signal.SIGKILL
    _rewrite_in_place(archive, EDITED)
    resumed = _run(workflow)
    _one_line(resumed, "a.h5", "field 'u'", "snapshots 16..23 (snapshot 20 first)", "first read")
    assert not (tmp_path / "r.zarr").exists()
    again = _run(workflow)
    assert again.returncode == 0, again.stderr
    fresh = _workflow(tmp_path, output="fresh.zarr", name="fresh.yaml")
    assert _run(fresh).returncode == 0
    _same_results(tmp_path / "r.zarr", tmp_path / "fresh.zarr")


def test_a_resumed_run_on_an_unchanged_archive_verifies_every_block_read_again(
        tmp_path: Path, monkeypatch: pytest.MonkeyPatch, faults) -> None:
    pytest.importorskip("dask_jobqueue.slurm")
    _archive(tmp_path)
    reference = _workflow(tmp_path, output="ref.zarr", name="ref.yaml")
    assert faults.cli("run", reference, "-q").code == 0
    full = _compress_record(tmp_path / "ref.zarr")
    # a block is one snapshot of a row block (here all 2000 points): 64 blocks; passes 2, 3 and 4
    # of the randomized SVD (2 + 2q, q = 1; Halko et al. 2011) read each again
    assert full["blocks_checksummed"] == SNAPSHOTS and full["blocks_verified_in_run"] == 3 * SNAPSHOTS
    workflow = _workflow(tmp_path)
    _interrupt_inside_pass_two(workflow, monkeypatch)
    resumed = faults.cli("run", workflow)
    assert resumed.code == 0, resumed.stderr
    assert "192 blocks verified by checksum" in " ".join(resumed.stdout.split())
    record = _compress_record(tmp_path / "r.zarr")
    assert record["blocks_verified_in_run"] == 3 * SNAPSHOTS and record["blocks_differing_ranges"] == 0
    assert "--overwrite" in record["force_full_recompute"]
    checksums = read_group(tmp_path / "r.zarr", "checksums")
    assert checksums["digest"].shape == (SNAPSHOTS,) and checksums["extent"].shape == (SNAPSHOTS, 4)
    _same_results(tmp_path / "r.zarr", tmp_path / "ref.zarr")
    # run again, nothing changed: every stage reused, nothing read
    again = faults.cli("run", workflow)
    assert again.code == 0 and _compress_record(tmp_path / "r.zarr")["status"] == "reused"


def test_a_block_rewritten_before_a_grown_archive_is_run_again_is_reported(tmp_path: Path, faults) -> None:
    archive = _archive(tmp_path)
    workflow = _workflow(tmp_path)
    assert faults.cli("run", workflow, "-q").code == 0
    # the archive grows by 8 snapshots and, outside the sampled blocks, one old snapshot is
    # rewritten in place
    new_values = _values(SNAPSHOTS + 8)[SNAPSHOTS:]
    _rewrite_in_place(archive, EDITED)
    with h5py.File(archive, "a") as h5:
        h5["u"].resize((SNAPSHOTS + 8, *GRID))
        h5["u"][SNAPSHOTS:] = new_values
        h5["t"].resize((SNAPSHOTS + 8,))
        h5["t"][SNAPSHOTS:] = 0.05 * np.arange(SNAPSHOTS, SNAPSHOTS + 8)
    again = faults.cli("run", workflow)
    assert again.code == 0, again.stderr
    text = " ".join(again.stdout.split())
    # 3 x 72 blocks read again in the run, and the 63 unchanged old blocks
    assert "279 blocks verified by checksum; 1 part(s) differ" in text, text
    record = _compress_record(tmp_path / "r.zarr")
    assert record["status"] == "computed"  # randomized has no append path: every block is read
    # the 63 other old snapshots equal the previous result's (tiles of 9 snapshots now, 8 before)
    assert record["blocks_verified_against_previous"] == SNAPSHOTS - 1
    assert record["blocks_differing_from_previous"] == [f"field 'u' rows 0..1999, snapshot {EDITED}"]
    attrs = dict(zarr.open_group(str(tmp_path / "r.zarr"), mode="r").attrs)
    assert any(f"snapshot {EDITED})" in w and "rewritten" in w for w in attrs["warnings"])
    fresh = _workflow(tmp_path, output="fresh.zarr", name="fresh.yaml")
    assert faults.cli("run", fresh, "-q").code == 0
    _same_results(tmp_path / "r.zarr", tmp_path / "fresh.zarr")


def test_stored_and_new_checksums_are_matched_by_field_rows_and_snapshot() -> None:
    from snaplift.workflow.checksums import compare, merge

    rng = np.random.default_rng(3)

    def table(n: int) -> dict:
        extent = np.column_stack([np.zeros(n, int), np.full(n, 100), rng.permutation(n), np.ones(n, int)])
        return {"field": rng.choice(["u", "p"], n), "extent": extent, "digest": rng.integers(0, 4, n)}

    old, new = table(300), table(400)
    # reference: the same comparison with plain Python dictionaries (common practice)
    before = {(f, *map(int, e)): int(d) for f, e, d in zip(old["field"], old["extent"], old["digest"])}
    after = {(f, *map(int, e)): int(d) for f, e, d in zip(new["field"], new["extent"], new["digest"])}
    common = set(before) & set(after)
    verified, differing = compare(old, new)
    assert verified == sum(before[k] == after[k] for k in common)
    named = {(k[0], k[3]) for k in common if before[k] != after[k]}
    listed = set()
    for text in differing:  # "field 'u' rows 0..99, snapshot 7" or "snapshots 7..9"
        name = text.split("'")[1]
        span = text.rsplit(" ", 1)[1].split("..")
        listed |= {(name, s) for s in range(int(span[0]), int(span[-1]) + 1)}
    assert listed == named
    merged = merge(old, new)
    together = {**before, **after}
    assert {(f, *map(int, e)): int(d) for f, e, d in zip(merged["field"], merged["extent"], merged["digest"])} \
        == together
