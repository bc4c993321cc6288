"""Fingerprints of the archive and of the stages, and how an archive changed since last time.

Archive fingerprint (cheap, taken on every run): the archive's files with their sizes
and modification times, and a SHA-256 of a sample of their bytes (64 KiB at the start,
middle and end of up to 16 files spread over the file list, always the first and the
last). Equal fingerprints mean *unchanged* with no data read.

When the fingerprint differs, content hashes decide (:func:`classify_archive`). A run
records SHA-256 hashes of the decoded values of a sample of *snapshot blocks* (whole
stored chunks along the snapshot axis, all points of every requested field): up to
:data:`SAMPLE_BLOCKS` blocks spread evenly over the archive, always the first and the
last, fewer if they would exceed :data:`SAMPLE_FRACTION` of the archive's bytes or
:data:`SAMPLE_FLOOR_BYTES`, whichever is larger (never fewer than two). The next run hashes the same blocks again:

- same snapshot count, every sampled block equal: *unchanged* (the files were touched,
  e.g. opened for writing to add an attribute; sizes may differ);
- more snapshots, every sampled old block equal: *grown*;
- anything else: *changed* (everything is recomputed).

Cost, explicitly: at most ``SAMPLE_BLOCKS`` snapshot blocks per run (a time-major archive
with one snapshot per chunk: 8 snapshots), bounded by 1 % of the archive or 64 MiB; they
are read only when the cheap fingerprint differs (and on a first run, to record them). The price of
not reading every old chunk is that an edit of an old snapshot *outside* the sample goes
unnoticed; a user who rewrites old snapshots in place should pass ``--overwrite`` (or
change the archive's path).

Stage fingerprints chain: ``scan`` hashes the archive section and the archive's content
identity; ``compress`` hashes scan's fingerprint with ``prepare``, ``lift`` and the
``compress`` settings that change results (not ``memory`` or ``checkpoint_every``: the
tiling does not change results, README.md, "compress"); ``fit`` hashes compress's with
``fit``; ``modes`` and ``report`` hash their input's. ``cluster`` and ``output`` never
enter: where a result is computed does not change it. The result store's layout version
(:data:`snaplift.results.store.STORE_VERSION`) enters ``scan`` and the compress settings,
so a store written in an older layout (no units, coordinates or peak amplitudes) is
recomputed, not reused.
"""

from __future__ import annotations

import hashlib
import json
import os
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import numpy as np

from snaplift.archive._base import Reader
from snaplift.results import store as result_store
from snaplift.workflow.lift_section import RAW_KINDS
from snaplift.workflow.schema import Workflow, section_fingerprint

__all__ = [
    "NOT_RESULT_KEYS",
    "SAMPLE_BLOCKS",
    "SAMPLE_FRACTION",
    "Classification",
    "archive_fingerprint",
    "block_hashes",
    "classify_archive",
    "sample_blocks",
    "stage_fingerprints",
    "workflow_identity",
]

SAMPLE_BLOCKS = 8
SAMPLE_FRACTION = 0.01
#: ... but up to this many bytes may always be sampled (small archives get all 8 blocks)
SAMPLE_FLOOR_BYTES = 64 * 2**20
_BYTE_SAMPLE = 64 * 1024
_BYTE_SAMPLE_FILES = 16
#: compress settings that do not change the result (tiling and checkpointing only)
NOT_RESULT_KEYS = frozenset({"memory", "checkpoint_every"})


def _archive_files(reader: Reader) -> list[Path]:
    info = reader.describe()
    if info.files:
        # a zarr store (or a run of one) is listed as its folder: fingerprint the files in it
        out: list[Path] = []
        for entry in map(Path, info.files):
            out.extend(sorted(p for p in entry.rglob("*") if p.is_file()) if entry.is_dir() else [entry])
        return out
    root = Path(reader.path)
    if root.is_file():
        return [root]
    if root.is_dir():
        return sorted(p for p in root.rglob("*") if p.is_file())
    return []


def _sample_bytes(path: Path, size: int) -> bytes:
    offsets = sorted({0, max(0, size // 2 - _BYTE_SAMPLE // 2), max(0, size - _BYTE_SAMPLE)})
    out = b""
    with open(path, "rb") as handle:
        for offset in offsets:
            handle.seek(offset)
            out += handle.read(_BYTE_SAMPLE)
    return out


def archive_fingerprint(reader: Reader) -> dict[str, Any]:
    """Files, sizes, mtimes and a hash of a byte sample; ``fingerprint`` summarises them.

    Example
    -------
    >>> archive_fingerprint(reader)["fingerprint"]  # doctest: +SKIP
    '3f9a0c1d2e4b5a67'
    """
    files = _archive_files(reader)
    root = Path(reader.path)
    listing = hashlib.sha256()
    sample = hashlib.sha256()
    total = 0
    sampled = 0
    stats = []
    for path in files:
        stat = path.stat()
        name = str(path.relative_to(root)) if root.is_dir() and path.is_relative_to(root) else str(path)
        stats.append((name, stat.st_size, stat.st_mtime_ns))
        total += stat.st_size
    listing.update(json.dumps(stats).encode())
    if files:
        step = max(1, len(files) // _BYTE_SAMPLE_FILES)
        chosen = sorted({0, len(files) - 1, *range(0, len(files), step)})[: _BYTE_SAMPLE_FILES + 2]
        for index in chosen:
            data = _sample_bytes(files[index], stats[index][1])
            sample.update(data)
            sampled += len(data)
    info = reader.describe()
    counts = {name: f.n_snapshots for name, f in info.fields.items()}
    summary = section_fingerprint(listing.hexdigest(), sample.hexdigest())
    return {"path": str(reader.path), "files": len(files), "bytes": int(total), "listing": listing.hexdigest()[:16],
            "byte_sample": sample.hexdigest()[:16], "bytes_sampled": int(sampled), "n_snapshots": counts,
            "fingerprint": summary}


def sample_blocks(n_snapshots: int, chunk: int, block_bytes: int, archive_bytes: int) -> list[tuple[int, int]]:
    """The snapshot blocks whose content is hashed (module docstring)."""
    chunk = max(1, int(chunk))
    n_blocks = max(1, -(-int(n_snapshots) // chunk))
    budget = max(2, int(max(SAMPLE_FRACTION * archive_bytes, SAMPLE_FLOOR_BYTES) // max(1, block_bytes)))
    count = min(SAMPLE_BLOCKS, n_blocks, budget)
    picks = sorted({int(round(i)) for i in np.linspace(0, n_blocks - 1, max(count, 1))})
    # the last block of an archive may be partial; it is hashed over the snapshots present
    return [(p * chunk, min((p + 1) * chunk, n_snapshots)) for p in picks]


def block_hashes(reader: Reader, fields: list[str], blocks: list[tuple[int, int]]) -> tuple[list[str], int]:
    """SHA-256 of the decoded values of every field in each block; and the bytes read."""
    info = reader.describe()
    hashes = []
    read = 0
    for start, stop in blocks:
        digest = hashlib.sha256()
        for name in fields:
            f = info.fields[name]
            values = np.ascontiguousarray(reader.read_tile(name, slice(0, f.n_points), slice(start, stop)))
            digest.update(name.encode())
            digest.update(values.tobytes())
            read += f.n_points * (stop - start) * np.dtype(f.stored_dtype).itemsize
        hashes.append(digest.hexdigest()[:32])
    return hashes, read


@dataclass(frozen=True)
class Classification:
    """How the archive relates to the one the previous result was computed from."""

    state: str  # "new", "unchanged", "grown", "changed"
    reason: str
    identity: str  # content identity that enters the scan fingerprint
    samples: dict[str, Any] = field(default_factory=dict)  # block sample to record for next time
    bytes_read: int = 0
    old_snapshots: int | None = None


def _sample_for(reader: Reader, fields: list[str], chunk: int) -> tuple[dict[str, Any], int]:
    info = reader.describe()
    n = info.fields[fields[0]].n_snapshots
    block_bytes = sum(info.fields[f].n_points * chunk * np.dtype(info.fields[f].stored_dtype).itemsize for f in fields)
    archive_bytes = sum(info.fields[f].n_points * n * np.dtype(info.fields[f].stored_dtype).itemsize for f in fields)
    blocks = sample_blocks(n, chunk, block_bytes, archive_bytes)
    hashes, read = block_hashes(reader, fields, blocks)
    return {"chunk": chunk, "n_snapshots": n, "blocks": [[a, b, h] for (a, b), h in zip(blocks, hashes)]}, read


def classify_archive(reader: Reader, fields: list[str], chunk: int, current: dict[str, Any],
                     previous: dict[str, Any] | None) -> Classification:
    """Compare the archive now (``current`` fingerprint) with the previous run's record.

    ``previous`` is the previous scan record: ``{"archive": fingerprint, "samples": ...,
    "identity": ...}`` or None for a first run.
    """
    if not previous or "archive" not in previous:
        samples, read = _sample_for(reader, fields, chunk)
        return Classification("new", "no previous result", current["fingerprint"], samples, read)
    old = previous["archive"]
    old_samples = previous.get("samples") or {}
    if old.get("fingerprint") == current["fingerprint"] and old.get("n_snapshots") == current["n_snapshots"]:
        return Classification("unchanged", "same files, sizes, times and byte sample", previous["identity"],
                              old_samples, 0)
    n_old = int(old_samples.get("n_snapshots", -1))
    n_now = reader.describe().fields[fields[0]].n_snapshots
    blocks = [(int(a), int(b)) for a, b, _ in old_samples.get("blocks", [])]
    if not blocks or n_now < n_old:
        samples, read = _sample_for(reader, fields, chunk)
        reason = "fewer snapshots than before" if n_now < n_old else "no content sample from the previous run"
        return Classification("changed", reason, current["fingerprint"], samples, read, n_old)
    hashes, read = block_hashes(reader, fields, blocks)
    differing = [blocks[i] for i, (h, (_, _, old_h)) in enumerate(zip(hashes, old_samples["blocks"])) if h != old_h]
    if differing:
        samples, more = _sample_for(reader, fields, chunk)
        a, b = differing[0]
        return Classification("changed", f"snapshots {a}..{b - 1} differ from the previous run's "
                              f"({len(differing)} of {len(blocks)} sampled blocks)", current["fingerprint"],
                              samples, read + more, n_old)
    if n_now == n_old:
        # sizes may differ: HDF5 grows when attributes are added or space is reallocated
        return Classification("unchanged", f"files touched, all {len(blocks)} sampled blocks identical",
                              previous["identity"], old_samples, read, n_old)
    samples, more = _sample_for(reader, fields, chunk)
    return Classification("grown", f"{n_now - n_old} snapshot(s) added after {n_old}; all {len(blocks)} "
                          "sampled old blocks identical", current["fingerprint"], samples, read + more, n_old)


def workflow_identity(workflow: Workflow, archive_path: str) -> str:
    """What makes a store 'of this workflow': the archive it reduces and the fields."""
    paths = [os.path.abspath(p) for p in archive_path] if isinstance(archive_path, list) else os.path.abspath(archive_path)
    return section_fingerprint("identity", paths, list(workflow.archive.fields))


def stage_fingerprints(workflow: Workflow, archive_identity: str) -> dict[str, str]:
    """Fingerprint of every stage (module docstring)."""
    compress = {k: v for k, v in workflow.compress.model_dump(mode="json").items() if k not in NOT_RESULT_KEYS}
    # raw-field lifting changes the matrix compress reads; a state dictionary only the fit
    raw = [e.model_dump(mode="json") for e in workflow.lift if e.kind in RAW_KINDS]
    states = [e.model_dump(mode="json") for e in workflow.lift if e.kind not in RAW_KINDS]
    # the store's layout: a store written in another layout is recomputed, not reused
    layout = {"store_version": result_store.STORE_VERSION}
    scan = section_fingerprint("scan", workflow.archive, archive_identity, layout)
    compressed = section_fingerprint("compress", scan, workflow.prepare, raw, compress)
    fit = section_fingerprint("fit", compressed, workflow.fit, states)
    modes = section_fingerprint("modes", fit)
    report = section_fingerprint("report", modes)
    # the compress settings without the archive's content: equal for a grown archive whose
    # stored sketch may be extended (snaplift.workflow.append)
    settings = section_fingerprint("compress-settings", workflow.archive, workflow.prepare, raw, compress, layout)
    return {"scan": scan, "compress": compressed, "fit": fit, "modes": modes, "report": report,
            "compress_settings": settings}
