"""Issue 11, item 5: a missing zarr chunk is an error, not a snapshot of zeros; a damaged one names its file."""

from __future__ import annotations

import numpy as np
import yaml
import zarr

from snaplift.results.store import read_group


def test_missing_chunk_is_an_error_naming_array_and_chunk(faults) -> None:
    archive = faults.zarr_archive()
    (archive / "u" / "c" / "17" / "0" / "0").unlink()
    before = faults.hashes(archive)
    outcome = faults.subprocess("run", faults.workflow(archive="a.zarr"))
    faults.one_line_error(outcome, "array 'u'", "chunk [17, 0, 0]", "snapshots 17..17", "missing_chunks: fill")
    assert faults.hashes(archive) == before
    faults.no_complete_store(faults.folder / "r.zarr")


def test_scan_full_reports_the_missing_chunk(faults) -> None:
    archive = faults.zarr_archive()
    (archive / "u" / "c" / "5" / "0" / "0").unlink()
    outcome = faults.cli("scan", archive, "--full")
    faults.one_line_error(outcome, "array 'u'", "chunk [5, 0, 0]")


def test_missing_chunk_read_as_fill_value_when_allowed(faults) -> None:
    archive = faults.zarr_archive()
    (archive / "u" / "c" / "17" / "0" / "0").unlink()
    workflow = faults.workflow(archive="a.zarr")
    data = yaml.safe_load(workflow.read_text())
    data["archive"]["missing_chunks"] = "fill"
    workflow.write_text(yaml.safe_dump(data))
    outcome = faults.cli("run", workflow, "-q")
    assert outcome.code == 0, outcome.stderr
    norms = read_group(faults.folder / "r.zarr", "diagnostics")
    assert norms["time"].size == 24


def test_missing_chunk_of_an_array_without_fill_value(faults) -> None:
    # zarr v2 arrays may declare no fill value: then 'fill' has nothing to fill with
    path = faults.folder / "v2.zarr"
    group = zarr.open_group(str(path), mode="w", zarr_format=2)
    u = faults.data()
    group.create_array("u", shape=u.shape, chunks=(1, *u.shape[1:]), dtype="f8", compressors=None,
                       fill_value=None)[...] = u
    group.create_array("t", shape=(24,), dtype="f8", compressors=None)[...] = 0.1 * np.arange(24)
    (path / "u" / "3.0.0").unlink()
    outcome = faults.cli("run", faults.workflow(archive="v2.zarr"))
    faults.one_line_error(outcome, "array 'u'", "chunk [3, 0, 0]", "no fill value")


def test_truncated_chunk_names_the_file(faults) -> None:
    archive = faults.zarr_archive()
    chunk = archive / "u" / "c" / "3" / "0" / "0"
    chunk.write_bytes(chunk.read_bytes()[:100])
    outcome = faults.cli("run", faults.workflow(archive="a.zarr"))
    faults.one_line_error(outcome, str(chunk), "truncated")


def test_damaged_compressed_chunk_is_one_line(faults) -> None:
    path = faults.folder / "z.zarr"
    group = zarr.open_group(str(path), mode="w", zarr_format=3)
    u = faults.data()
    group.create_array("u", shape=u.shape, chunks=(1, *u.shape[1:]), dtype="f8")[...] = u  # default compressor
    group.create_array("t", shape=(24,), dtype="f8")[...] = 0.1 * np.arange(24)
    chunk = path / "u" / "c" / "3" / "0" / "0"
    chunk.write_bytes(chunk.read_bytes()[:10])
    outcome = faults.cli("run", faults.workflow(archive="z.zarr"))
    faults.one_line_error(outcome, "array 'u'", "damaged or truncated")
