"""Block checksums in the result store, and what a run verified with them.

Compress reads every block (tile) of the archive at least once and takes a CRC-32C of
each as read (:mod:`snaplift.stream._digest`); a block read again in the same run (the
later passes of ``randomized`` and ``tsqr``, a resumed run) is verified against its
first read there, and a difference stops the run. This module keeps those checksums
with the compress result, in the store's ``checksums/`` group:

- ``checksums/field`` (block,): the field of each block (the first of a tile of
  several lifted fields);
- ``checksums/extent`` (block, 4): kept-row start and stop within the field, archive
  snapshot, number of fields in the tile (a block is one snapshot of one row block);
- ``checksums/digest`` (block,): the CRC of the block's values as read (decoded,
  masked, weighted), attribute ``covers``: a fingerprint of what the values depend on
  (archive section and raw-field lifting), ``algorithm``.

A later run that reads the archive again (compress recomputed, or the append path
reading new blocks) compares every block it read whose extent matches a stored one
(same row blocks; the snapshot blocks may differ) with the stored checksum: equal blocks are *verified*; the count, and
any block that differs, are said in the run's output and kept in the compress record
(``blocks_verified_against_previous``, ``blocks_differing_from_previous``, with the
note ``force_full_recompute``: ``snaplift run --overwrite``). Blocks a run does not read
(a reused result, old snapshots on the append path) are not verified by checksum; the
scan stage's file record and sampled blocks cover those
(:mod:`snaplift.workflow.fingerprint`).
"""

from __future__ import annotations

from typing import Any

import numpy as np

from snaplift.stream._digest import ALGORITHM
from snaplift.workflow.lift_section import RAW_KINDS
from snaplift.workflow.schema import Workflow, section_fingerprint

__all__ = ["GROUP", "FORCE", "covers", "write_digests", "stored_digests", "merge", "compare", "checksum_record"]

GROUP = "checksums"
FORCE = "snaplift run --overwrite recomputes every stage from the archive"
#: blocks named in a record or a warning (the rest are counted)
NAMED = 5


def covers(workflow: Workflow) -> str:
    """What the checksummed values depend on besides the archive's bytes: the archive
    section (fields, mask, weights, selection) and the raw-field lifting."""
    raw = [e.model_dump(mode="json") for e in workflow.lift if e.kind in RAW_KINDS]
    return section_fingerprint("block-checksums", workflow.archive, raw, ALGORITHM)


def _empty() -> dict[str, np.ndarray]:
    return {"field": np.array([], dtype=str), "extent": np.zeros((0, 4), dtype=np.int64),
            "digest": np.zeros(0, dtype=np.int64)}


def write_digests(writer: Any, table: dict[str, np.ndarray] | None, basis: str) -> int:
    """Write the checksum table into the stage being written; the number of blocks."""
    if table is None or not len(table["digest"]):
        return 0
    attrs = {"covers": basis, "algorithm": ALGORITHM,
             "meaning": "checksum of each block's values as read (decoded, masked, weighted)",
             "extent": ["row_start", "row_stop", "snapshot", "fields"]}
    writer.array(GROUP, "field", np.asarray(table["field"]), ("block",))
    writer.array(GROUP, "extent", np.asarray(table["extent"], dtype=np.int64), ("block", "extent"))
    writer.array(GROUP, "digest", np.asarray(table["digest"], dtype=np.int64), ("block",), attrs=attrs)
    return int(len(table["digest"]))


def stored_digests(root: Any, basis: str) -> dict[str, np.ndarray] | None:
    """The previous store's checksum table if it covers the same values (``basis``), else None."""
    if root is None:
        return None
    try:
        group = root[GROUP]
        digest = group["digest"]
        if dict(digest.attrs).get("covers") != basis:
            return None
        return {"field": np.array([str(f) for f in np.asarray(group["field"][...]).ravel()], dtype=str),
                "extent": np.asarray(group["extent"][...], dtype=np.int64).reshape(-1, 4),
                "digest": np.asarray(digest[...], dtype=np.int64)}
    except (KeyError, OSError, ValueError, TypeError):  # an older store, or another layout: nothing to compare
        return None


def _keys(tables: list[dict[str, np.ndarray]]) -> list[np.ndarray]:
    """Each table's blocks as one structured key (field, rows, snapshot, span) per row, with
    the field names numbered alike in every table; vectorised, so a million blocks cost
    arrays, not Python objects."""
    names = np.unique(np.concatenate([np.asarray(t["field"], dtype=str) for t in tables]))
    kind = np.dtype([("field", np.int64), ("r0", np.int64), ("r1", np.int64), ("snapshot", np.int64),
                     ("span", np.int64)])
    out = []
    for t in tables:
        key = np.empty(len(t["digest"]), dtype=kind)
        key["field"] = np.searchsorted(names, np.asarray(t["field"], dtype=str))
        extent = np.asarray(t["extent"], dtype=np.int64).reshape(-1, 4)
        key["r0"], key["r1"], key["snapshot"], key["span"] = extent.T
        out.append(key)
    return out


def merge(old: dict[str, np.ndarray] | None, new: dict[str, np.ndarray] | None) -> dict[str, np.ndarray]:
    """One table of both (the new entry wins where both hold a block)."""
    old, new = old or _empty(), new or _empty()
    if not len(old["digest"]):
        return new
    old_key, new_key = _keys([old, new])
    keep = ~np.isin(old_key, new_key)
    return {name: np.concatenate([np.asarray(old[name])[keep], np.asarray(new[name])])
            for name in ("field", "extent", "digest")}


def compare(stored: dict[str, np.ndarray] | None, current: dict[str, np.ndarray] | None
            ) -> tuple[int, list[str]]:
    """Blocks of ``current`` equal to the stored block of the same extent; the differing ones,
    named by field, rows and snapshot ranges (one entry per range)."""
    if stored is None or current is None or not len(stored["digest"]) or not len(current["digest"]):
        return 0, []
    stored_key, current_key = _keys([stored, current])
    _, i_stored, i_current = np.intersect1d(stored_key, current_key, assume_unique=False, return_indices=True)
    same = np.asarray(stored["digest"])[i_stored] == np.asarray(current["digest"])[i_current]
    differing: dict[tuple[str, int, int], list[int]] = {}
    for index in i_current[~same]:
        name = str(current["field"][index])
        r0, r1, snapshot, _ = (int(v) for v in current["extent"][index])
        differing.setdefault((name, r0, r1), []).append(snapshot)
    named = []
    for (name, r0, r1), snapshots in differing.items():
        for a, b in _ranges(sorted(snapshots)):
            where = f"snapshot {a}" if a == b else f"snapshots {a}..{b}"
            named.append(f"field '{name}' rows {r0}..{r1 - 1}, {where}")
    return int(same.sum()), named


def _ranges(values: list[int]) -> list[tuple[int, int]]:
    out: list[tuple[int, int]] = []
    for value in values:
        if out and value == out[-1][1] + 1:
            out[-1] = (out[-1][0], value)
        else:
            out.append((value, value))
    return out


def checksum_record(read_again: int, written: int, against: int, differing: list[str], *,
                    previous: bool) -> tuple[dict[str, Any], str, str | None]:
    """The compress record's checksum fields, the text for the run's output, and a warning (or None)."""
    record: dict[str, Any] = {
        "checksum": ALGORITHM, "blocks_checksummed": int(written), "blocks_verified_in_run": int(read_again),
        "blocks_verified_against_previous": int(against), "blocks_differing_from_previous": differing[:NAMED],
        "blocks_differing_ranges": len(differing), "force_full_recompute": FORCE}
    # "N blocks verified by checksum": reads in this run equal to the first read of the same
    # block (later passes, a resume) plus blocks equal to the previous result's
    text = f"{read_again + against} blocks verified by checksum" if read_again or previous else ""
    if differing:
        text += f"; {len(differing)} part(s) differ from the previous result (named in the warnings)"
    warning = None
    if differing:
        more = f" and {len(differing) - NAMED} more" if len(differing) > NAMED else ""
        warning = (f"{len(differing)} part(s) of the archive differ from what the previous result read "
                   f"({'; '.join(differing[:NAMED])}{more}): the archive was rewritten; this run's results "
                   "come from the archive as it is now")
    return record, text, warning


def record_checksums(store: Any, workflow: Workflow, info: dict[str, Any], warnings: list[str], *,
                     keep_previous: bool = False) -> tuple[dict[str, Any], str]:
    """Write the compress result's checksums into the stage being written, compare the
    blocks read with the previous result's, and say what was verified.

    ``info`` is the compress result's ``info`` (``block_digests``, ``blocks_verified``);
    with ``keep_previous`` (the append path) the previous checksums of the blocks not
    read again are kept beside the new ones. Returns the record fields and the text
    for the run's output.
    """
    basis = covers(workflow)
    current = info.get("block_digests")
    previous = stored_digests(getattr(store, "previous", None), basis)
    against, differing = compare(previous, current)
    table = merge(previous, current) if keep_previous else current
    written = write_digests(store.writer, table, basis)
    record, text, warning = checksum_record(int(info.get("blocks_verified", 0)), written, against, differing,
                                            previous=previous is not None)
    if warning is not None:
        warnings.append(warning)
    return record, text
