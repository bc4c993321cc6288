"""A result store built stage by stage in a staging area that survives a kill.

Next to the result store ``R.zarr`` the runner keeps (deterministic names, so the next
run finds them)::

    R.zarr.staging/
      store.zarr/        the store being built (same layout as R.zarr); renamed to R.zarr
      stages/<stage>.json   completion record of each finished stage (written last, atomically)
      stages/<stage>.journal   arrays a stage has started writing (to clear a torn stage)
      checkpoint/<stage>-<fingerprint>/   checkpoints inside a stage (compress)
      identity.json      which workflow this staging area belongs to
    R.zarr.lease         the lease of the run that holds R.zarr (snaplift.workflow.lease)

A stage is finished when its record exists; its arrays are then kept on resume. A stage
that is started again first deletes whatever its journal says it wrote. Arrays of a
stage that the previous complete store already holds, with the same fingerprint, are
hard-linked (or copied) from it instead of recomputed. The commit writes provenance,
consolidates metadata once, sets the completion record of the store, renames
``store.zarr`` into place and removes the staging area: a store that is not complete
never looks complete.
"""

from __future__ import annotations

import json
import os
import shutil
import warnings
from collections.abc import Sequence
from pathlib import Path
from typing import Any

import numpy as np
import zarr

from snaplift.errors import ResultStoreError
from snaplift.results.store import COMPLETE_KEY, FORMAT_KEY, STORE_VERSION, StoreWriter, _jsonable

__all__ = ["IDENTITY_KEY", "STAGES_KEY", "StagedStore", "check_free_space"]

STAGES_KEY = "stages"
IDENTITY_KEY = "workflow_identity"
#: the file that marks a staging area as snaplift's (only such folders are ever removed)
MARKER = "identity.json"


def _is_result_store(path: Path) -> bool:
    """True if ``path`` is a folder holding a snaplift result store (its root says so)."""
    if path.is_symlink() or not path.is_dir():
        return False
    meta = _read_json(path / "zarr.json")
    return isinstance(meta, dict) and bool((meta.get("attributes") or {}).get(FORMAT_KEY))


def check_free_space(directory: str | Path, needed: int, what: str) -> None:
    """Fail early, with the numbers, if ``directory``'s file system lacks ``needed`` bytes.

    A margin of 5 % plus 64 MiB covers metadata and file-system rounding (common practice).

    Example
    -------
    >>> check_free_space(".", 1, "a test")
    """
    directory = Path(directory)
    probe = directory
    while not probe.exists() and probe != probe.parent:
        probe = probe.parent
    free = shutil.disk_usage(probe).free
    required = int(needed * 1.05) + 64 * 2**20
    if free < required:
        raise ResultStoreError(
            f"not enough free disk space for {what} in {probe}: need about {required / 1e9:.2f} GB "
            f"({needed} bytes plus margin), {free / 1e9:.2f} GB free; free some space or choose "
            "another output.path"
        )


def _write_json(path: Path, data: Any) -> None:
    temporary = path.with_name(path.name + ".tmp")
    temporary.write_text(json.dumps(_jsonable(data), indent=1))
    os.replace(temporary, path)


def _read_json(path: Path) -> Any:
    try:
        return json.loads(path.read_text())
    except (OSError, ValueError):
        return None


def _link_or_copy(source: str, target: str) -> None:
    try:
        os.link(source, target)
    except OSError:
        shutil.copy2(source, target)


class _TrackingWriter(StoreWriter):
    """The StoreWriter API on a fixed staging folder, journaling what each stage writes."""

    def __init__(self, staged: StagedStore) -> None:
        self.path = staged.path
        self.staging = staged.store_path
        self.overwrite = True
        self._staged = staged
        if (self.staging / "zarr.json").exists():
            self.root = zarr.open_group(str(self.staging), mode="r+", zarr_format=3)
        else:
            self.root = zarr.open_group(str(self.staging), mode="w", zarr_format=3)

    def _prepare(self, group: str, name: str) -> None:
        self._staged._journal(f"{group}/{name}" if group else name)
        node = self._group_node(group)
        if name in node:
            del node[name]

    def array(self, group: str, name: str, data: np.ndarray, dimensions: Sequence[str],
              chunks: tuple[int, ...] | None = None, attrs: dict[str, Any] | None = None) -> zarr.Array:
        self._prepare(group, name)
        return super().array(group, name, data, dimensions, chunks=chunks, attrs=attrs)

    def arrays(self, group: str, items: Sequence[tuple[str, np.ndarray, Sequence[str]]]) -> None:
        names = [name for name, _, _ in items]
        self._staged._journal_many([f"{group}/{name}" if group else name for name in names])
        node = self.root.require_group(group) if group else self.root
        present = set(node.keys())
        for name in names:
            if name in present:
                del node[name]
        super().arrays(group, items)

    def empty(self, group: str, name: str, shape: tuple[int, ...], dtype: Any, dimensions: Sequence[str],
              chunks: tuple[int, ...], attrs: dict[str, Any] | None = None) -> zarr.Array:
        self._prepare(group, name)
        return super().empty(group, name, shape, dtype, dimensions, chunks, attrs=attrs)

    def group_attrs(self, group: str, attrs: dict[str, Any]) -> None:
        super().group_attrs(group, attrs)
        self._staged._group_attrs(group, attrs)


class StagedStore:
    """The staging area of one result store; see the module docstring for its layout.

    Parameters
    ----------
    path
        The result store to build (``output.path``).
    identity
        What makes a store "of this workflow" (archive path and fields): a store at
        ``path`` with another identity is refused unless ``overwrite``.
    overwrite
        Replace a store written by a different workflow, and reuse nothing: neither the
        previous store's stages nor a killed run's staging area (every stage is computed
        from the archive again).
    """

    def __init__(self, path: str | Path, *, identity: str, overwrite: bool = False) -> None:
        self.path = Path(path)
        self.identity = identity
        self.area = self.path.with_name(self.path.name + ".staging")
        self.old = self.path.with_name(self.path.name + ".old")
        self.overwrite = overwrite
        self.store_path = self.area / "store.zarr"
        self.records = self.area / "stages"
        self.checkpoints = self.area / "checkpoint"
        self.previous: zarr.Group | None = None
        self.previous_stages: dict[str, Any] = {}
        self.discarded: str | None = None
        self._current: str | None = None
        self._attrs: dict[str, dict[str, Any]] = {}
        self._check_existing(overwrite)
        self._open_area()
        self.writer = _TrackingWriter(self)

    # -- what is already there ------------------------------------------------------
    def _check_existing(self, overwrite: bool) -> None:
        if not self.path.exists():
            return
        try:
            attrs = dict(zarr.open_group(str(self.path), mode="r").attrs)
        except Exception:
            attrs = {}
        if not attrs.get(FORMAT_KEY):
            raise ResultStoreError(
                f"{self.path} exists and is not a snaplift result store; refusing to replace it "
                "(even with --overwrite); choose another output.path"
            )
        if attrs.get(IDENTITY_KEY) != self.identity and not overwrite:
            raise ResultStoreError(
                f"{self.path} holds results of a different workflow (archive {attrs.get('archive')!r}, "
                f"identity {attrs.get(IDENTITY_KEY)}); pass --overwrite to replace it or change output.path"
            )
        if attrs.get(COMPLETE_KEY) and attrs.get(IDENTITY_KEY) == self.identity and not overwrite:
            self.previous = zarr.open_group(str(self.path), mode="r")
            self.previous_stages = dict(attrs.get(STAGES_KEY) or {})  # type: ignore[arg-type]

    def _open_area(self) -> None:
        marker = self.area / MARKER
        if self.old.exists() and not _is_result_store(self.old):
            raise ResultStoreError(
                f"{self.old} exists and was not made by snaplift (the previous store is moved there at commit); "
                "move or rename it, or choose another output.path"
            )
        if self.area.exists() or self.area.is_symlink():
            known = _read_json(marker) if self.area.is_dir() and not self.area.is_symlink() else None
            # (a staging area of an earlier version has the identity and a stages folder, no made_by)
            ours = isinstance(known, dict) and (known.get("made_by") == "snaplift" or (
                "identity" in known and (self.area / "stages").is_dir()))
            if not ours:
                raise ResultStoreError(
                    f"{self.area} exists and was not made by snaplift (no {MARKER} marker); snaplift keeps its "
                    "unfinished work there: move or rename it, or choose another output.path"
                )
            if not isinstance(known, dict) or known.get("identity") != self.identity or not self.store_path.exists():
                self.discarded = f"discarded an unfinished staging area of another workflow ({self.area})"
                shutil.rmtree(self.area)
            elif self.overwrite:
                self.discarded = f"--overwrite: discarded the unfinished staging area {self.area}"
                shutil.rmtree(self.area)
        self.area.mkdir(parents=True, exist_ok=True)
        if not marker.exists():
            # written first: every folder below is snaplift's because this one is
            _write_json(marker, {"made_by": "snaplift", "identity": self.identity, "pid": os.getpid()})
        self.records.mkdir(parents=True, exist_ok=True)
        self.checkpoints.mkdir(parents=True, exist_ok=True)

    @property
    def has_progress(self) -> bool:
        """True if a stage finished or a checkpoint was written: worth keeping for a resume."""
        return any(self.records.glob("*.json")) or any(p for p in self.checkpoints.iterdir())

    # -- stage records --------------------------------------------------------------
    def record(self, stage: str) -> dict[str, Any] | None:
        """The completion record of ``stage`` in the staging area, if it finished."""
        return _read_json(self.records / f"{stage}.json")

    def previous_record(self, stage: str) -> dict[str, Any] | None:
        return self.previous_stages.get(stage)

    def begin(self, stage: str) -> None:
        """Start (or restart) a stage: forget its record and delete what it wrote before."""
        self._current = stage
        self._attrs = {}
        (self.records / f"{stage}.json").unlink(missing_ok=True)
        journal = self.records / f"{stage}.journal"
        if journal.exists():
            for line in journal.read_text().splitlines():
                self._delete(line.strip())
            journal.unlink()

    def _delete(self, key: str) -> None:
        if not key:
            return
        target = self.store_path / key
        if target.is_dir():
            shutil.rmtree(target)

    def _journal(self, key: str) -> None:
        if self._current is None:
            raise RuntimeError("StagedStore: write outside a stage (call begin() first)")
        with open(self.records / f"{self._current}.journal", "a") as handle:
            handle.write(key + "\n")
            handle.flush()
            os.fsync(handle.fileno())

    def _journal_many(self, keys: list[str]) -> None:
        """:meth:`_journal` for several keys with one write and one fsync."""
        if self._current is None:
            raise RuntimeError("StagedStore: write outside a stage (call begin() first)")
        with open(self.records / f"{self._current}.journal", "a") as handle:
            handle.write("".join(key + "\n" for key in keys))
            handle.flush()
            os.fsync(handle.fileno())

    def _group_attrs(self, group: str, attrs: dict[str, Any]) -> None:
        self._attrs.setdefault(group, {}).update(_jsonable(attrs))

    def finish(self, stage: str, record: dict[str, Any]) -> dict[str, Any]:
        """Write the completion record of ``stage`` (last, atomically)."""
        journal = self.records / f"{stage}.journal"
        arrays = sorted(set(journal.read_text().split())) if journal.exists() else []
        full = {**record, "arrays": arrays, "group_attrs": self._attrs}
        _write_json(self.records / f"{stage}.json", full)
        self._current = None
        return full

    def reuse(self, stage: str) -> dict[str, Any]:
        """Bring ``stage``'s arrays over from the previous complete store (hard links)."""
        record = self.previous_record(stage)
        if record is None or self.previous is None:
            raise ResultStoreError(f"stage {stage!r} cannot be reused: the previous store has no record of it")
        self.begin(stage)
        for key in record.get("arrays", []):
            source = self.path / key
            if not source.is_dir():
                raise ResultStoreError(
                    f"{self.path} lists array {key!r} for stage {stage!r} but it is missing; "
                    "the store was modified by hand; rerun with --overwrite"
                )
            group = key.rsplit("/", 1)[0] if "/" in key else ""
            if group:
                self.writer.root.require_group(group)
            self._journal(key)
            shutil.copytree(source, self.store_path / key, copy_function=_link_or_copy)
        for group, attrs in (record.get("group_attrs") or {}).items():
            self.writer.group_attrs(group, attrs)
        kept = {k: v for k, v in record.items() if k not in ("arrays", "group_attrs")}
        return kept

    def checkpoint_directory(self, stage: str, fingerprint: str) -> Path:
        """A checkpoint folder private to one stage fingerprint; others of the stage are removed."""
        for old in self.checkpoints.glob(f"{stage}-*"):
            if old.name != f"{stage}-{fingerprint}":
                shutil.rmtree(old, ignore_errors=True)
        directory = self.checkpoints / f"{stage}-{fingerprint}"
        directory.mkdir(parents=True, exist_ok=True)
        return directory

    def clear_checkpoints(self, stage: str) -> None:
        for old in self.checkpoints.glob(f"{stage}-*"):
            shutil.rmtree(old, ignore_errors=True)

    # -- commit / abort ---------------------------------------------------------------
    def stage_records(self) -> dict[str, dict[str, Any]]:
        out = {}
        for path in sorted(self.records.glob("*.json")):
            out[path.stem] = _read_json(path)
        return out

    def commit(self, attrs: dict[str, Any]) -> Path:
        """Provenance, consolidated metadata, completion record, rename; remove the staging area."""
        root = self.writer.root
        # one write of the root's attributes, the completion record with them: the store is in
        # the staging area until the rename below, so it cannot look complete before that
        # (``update_attributes``: one write; ``attrs.update`` wrote the root's zarr.json once per key)
        root.update_attributes(_jsonable({**attrs, FORMAT_KEY: STORE_VERSION, IDENTITY_KEY: self.identity,
                                          COMPLETE_KEY: True}))
        with warnings.catch_warnings():
            # consolidated metadata is not yet in the v3 spec; the README promises it (xarray uses it)
            warnings.filterwarnings("ignore", message="Consolidated metadata", category=UserWarning)
            zarr.consolidate_metadata(str(self.store_path))
        old = None
        if self.path.exists():
            old = self.old
            if old.exists():
                if not _is_result_store(old):
                    raise ResultStoreError(f"{old} exists and was not made by snaplift; move or rename it, "
                                           "then run again to commit (the finished stages are kept)")
                shutil.rmtree(old)
            os.replace(self.path, old)
        os.replace(self.store_path, self.path)
        if old is not None:
            shutil.rmtree(old, ignore_errors=True)
        shutil.rmtree(self.area, ignore_errors=True)
        return self.path

    def abort(self) -> None:
        """Remove the staging area (nothing worth resuming in it)."""
        shutil.rmtree(self.area, ignore_errors=True)
