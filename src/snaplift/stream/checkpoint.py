"""The compress loop's checkpointable state: :class:`StreamState` (accumulators, the ledger of
tiles already folded, the pass number, bytes read), written atomically (temporary file +
``os.replace``) and read back, and :class:`Checkpointer`, which decides when to save. A loop
given a loaded state skips the tiles in its ledger, so a killed run resumes and reads at most
one checkpoint interval again.
"""

from __future__ import annotations

import json
import os
import tempfile
import time
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import numpy as np

from snaplift.units import parse_every

__all__ = ["StreamState", "Checkpointer", "save_checkpoint", "load_checkpoint"]


@dataclass
class StreamState:
    """Everything a compress loop needs to resume: plain arrays and numbers.

    ``key`` identifies the job (method, settings, plan, archive): a state saved for a
    different key is not resumed. ``pass_number`` counts finished passes; ``done`` holds
    the ids of the tiles of the current pass already folded into ``arrays``.
    """

    key: str
    pass_number: int = 0
    arrays: dict[str, np.ndarray] = field(default_factory=dict)
    done: set[int] = field(default_factory=set)
    bytes_read: int = 0
    info: dict[str, Any] = field(default_factory=dict)

    def finish_pass(self) -> None:
        self.pass_number += 1
        self.done = set()

    def save(self, path: str | os.PathLike[str]) -> None:
        """Write atomically: a reader sees the old file or the new one, never a torn one."""
        save_checkpoint(self, path)

    @classmethod
    def load(cls, path: str | os.PathLike[str]) -> StreamState:
        return load_checkpoint(path)


def save_checkpoint(state: StreamState, path: str | os.PathLike[str]) -> None:
    """Save ``state`` to ``path`` (``.npz``) through a temporary file and ``os.replace``.

    Example
    -------
    >>> state = StreamState("job", arrays={"y": np.zeros(3)}, done={0, 2})
    >>> save_checkpoint(state, "/tmp/snaplift-doctest.npz")
    >>> sorted(load_checkpoint("/tmp/snaplift-doctest.npz").done)
    [0, 2]
    """
    path = Path(path)
    path.parent.mkdir(parents=True, exist_ok=True)
    names = sorted(state.arrays)
    meta = {"key": state.key, "pass_number": int(state.pass_number), "bytes_read": int(state.bytes_read),
            "info": state.info, "names": names}
    payload: dict[str, Any] = {f"array_{i}": np.asarray(state.arrays[name]) for i, name in enumerate(names)}
    payload["done"] = np.array(sorted(state.done), dtype=np.int64)
    payload["meta"] = np.frombuffer(json.dumps(meta, default=str).encode(), dtype=np.uint8)
    handle, temporary = tempfile.mkstemp(prefix=path.name + ".", suffix=".tmp", dir=path.parent)
    try:
        with os.fdopen(handle, "wb") as stream:
            np.savez(stream, **payload)
            stream.flush()
            os.fsync(stream.fileno())
        os.replace(temporary, path)
    except BaseException:
        with _suppress():
            os.unlink(temporary)
        raise


class _suppress:
    def __enter__(self) -> None:
        return None

    def __exit__(self, *exc: Any) -> bool:
        return True


def load_checkpoint(path: str | os.PathLike[str]) -> StreamState:
    """Read a state written by :func:`save_checkpoint`."""
    with np.load(path, allow_pickle=False) as data:
        meta = json.loads(bytes(data["meta"]).decode())
        arrays = {name: np.array(data[f"array_{i}"]) for i, name in enumerate(meta["names"])}
        done = {int(i) for i in data["done"]}
    return StreamState(meta["key"], int(meta["pass_number"]), arrays, done, int(meta["bytes_read"]),
                       dict(meta.get("info") or {}))


class Checkpointer:
    """Saves a :class:`StreamState` under ``directory`` every so many tiles or seconds.

    Parameters
    ----------
    directory
        Where ``compress.npz`` lives (created when first needed).
    every
        ``compress.checkpoint_every``; default 60 seconds.
    """

    def __init__(self, directory: str | os.PathLike[str], every: int | float | str | None = None,
                 *, name: str = "compress") -> None:
        self.path = Path(directory) / f"{name}.npz"
        tiles, seconds = parse_every(every if every is not None else "60s")
        self.every_tiles, self.every_seconds = tiles, seconds
        self._count = 0
        self._last = time.monotonic()
        self.saves = 0

    def load(self, key: str) -> StreamState | None:
        """The saved state for ``key``, or None (no file, or a file for another job)."""
        if not self.path.exists():
            return None
        try:
            state = load_checkpoint(self.path)
        except (OSError, ValueError, KeyError):
            return None  # a damaged checkpoint only costs a fresh start
        return state if state.key == key else None

    def tick(self) -> bool:
        """Count one folded tile; True when the interval is reached (the caller then saves)."""
        self._count += 1
        return (self.every_tiles is not None and self._count >= self.every_tiles) or (
            self.every_seconds is not None and time.monotonic() - self._last >= self.every_seconds)

    def save(self, state: StreamState) -> None:
        state.save(self.path)
        self.saves += 1
        self._count = 0
        self._last = time.monotonic()

    def remove(self) -> None:
        with _suppress():
            self.path.unlink()
