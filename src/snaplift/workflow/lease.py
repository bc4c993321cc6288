"""One run at a time per result store: a lease file with a heartbeat.

The lease is ``<store>.lease`` next to the store (the store itself is replaced by rename
at commit, so it cannot hold the lock). It is a small JSON record: host, pid, process
start time, run start time, a random token, the heartbeat interval and the time of the
last beat. A thread rewrites it every ``interval`` seconds (write to a temporary file,
then ``os.replace``, so a reader never sees half a record).

A lease is *stale*, and is taken over with a warning, when

- its holder is on this host and its process is gone (pid not running, or running but
  started at another time: the pid was reused), or
- its last beat is older than ``missed_beats x interval`` by this host's clock (a holder
  on any host that died, lost its node, or was suspended); hosts are assumed to keep
  their clocks within a few seconds of each other (NTP), far less than the default
  ``3 x 10 s``.

Creation is atomic (``os.link`` of a complete temporary file, which fails if the lease
exists; safe on NFS, where ``O_EXCL`` historically was not). Taking over renames the
stale lease aside first, so two runs that both find it stale cannot both win: the
second finds the first one's fresh lease. The holder checks at every beat that the
lease still carries its token; a holder that was taken over (it was suspended past the
stale limit) is told so through :attr:`Lease.lost` and the runner stops before
committing anything.
"""

from __future__ import annotations

import json
import os
import secrets
import socket
import threading
import time
import warnings
from collections.abc import Callable
from pathlib import Path
from typing import Any

from snaplift.errors import ResultStoreError

__all__ = ["HEARTBEAT_SECONDS", "MISSED_BEATS", "Lease", "LeaseHeldError", "LeaseLostError"]

#: seconds between heartbeats
HEARTBEAT_SECONDS = 10.0
#: a lease whose last beat is older than this many intervals is stale
MISSED_BEATS = 3


class LeaseHeldError(ResultStoreError):
    """Another live run holds the result store."""


class LeaseLostError(ResultStoreError):
    """This run's lease was taken over by another run (this one was presumed dead)."""


def _process_start(pid: int) -> float | None:
    try:
        import psutil

        return float(psutil.Process(pid).create_time())
    except Exception:
        return None


def _pid_alive(pid: int) -> bool:
    try:
        os.kill(pid, 0)
    except ProcessLookupError:
        return False
    except PermissionError:  # exists, owned by someone else
        return True
    return True


class Lease:
    """The lease on one result store; use as a context manager.

    Parameters
    ----------
    path
        The result store the lease protects (the lease file is ``<path>.lease``).
    interval
        Seconds between heartbeats.
    missed_beats
        Beats a holder may miss before its lease counts as stale.
    clock
        Returns the current time in seconds (injectable so tests do not wait).
    heartbeat
        Start the heartbeat thread (tests of the takeover logic switch it off).

    Example
    -------
    >>> with Lease("results/run.zarr") as lease:   # doctest: +SKIP
    ...     lease.check()                            # raises LeaseLostError if taken over
    """

    def __init__(self, path: str | Path, *, interval: float = HEARTBEAT_SECONDS, missed_beats: int = MISSED_BEATS,
                 clock: Callable[[], float] = time.time, heartbeat: bool = True) -> None:
        self.store = Path(path)
        self.path = self.store.with_name(self.store.name + ".lease")
        self.interval = float(interval)
        self.missed_beats = int(missed_beats)
        self.clock = clock
        self.token = secrets.token_hex(8)
        self.host = socket.gethostname()
        self.pid = os.getpid()
        self.started = clock()
        self.taken_over: dict[str, Any] | None = None
        self._heartbeat = heartbeat
        self._stop = threading.Event()
        self._thread: threading.Thread | None = None
        self._lost = False

    # -- the record ------------------------------------------------------------------
    def _record(self) -> dict[str, Any]:
        return {"host": self.host, "pid": self.pid, "process_start": _process_start(self.pid),
                "started": self.started, "beat": self.clock(), "interval": self.interval,
                "token": self.token, "store": str(self.store)}

    def _temporary(self) -> Path:
        path = self.path.with_name(f"{self.path.name}.{self.token}.{secrets.token_hex(4)}.tmp")
        path.write_text(json.dumps(self._record()))
        return path

    def read(self) -> dict[str, Any] | None:
        """The current lease record, or None if there is none (or it is unreadable)."""
        try:
            return json.loads(self.path.read_text())
        except (OSError, ValueError):
            return None

    def stale_reason(self, record: dict[str, Any]) -> str | None:
        """Why a lease record is stale, or None if its holder must be presumed alive."""
        host, pid = record.get("host"), record.get("pid")
        if host == self.host and isinstance(pid, int):
            if not _pid_alive(pid):
                return f"process {pid} on {host} is not running"
            start = _process_start(pid)
            recorded = record.get("process_start")
            if start is not None and recorded is not None and abs(start - float(recorded)) > 1.0:
                return f"process {pid} on {host} is another process than the holder (pid reused)"
        beat = record.get("beat")
        interval = float(record.get("interval") or self.interval)
        limit = self.missed_beats * interval
        if not isinstance(beat, int | float):
            return "the lease record has no heartbeat"
        age = self.clock() - float(beat)
        if age > limit:
            return f"its last heartbeat was {age:.0f} s ago (stale after {limit:.0f} s)"
        return None

    @staticmethod
    def describe(record: dict[str, Any]) -> str:
        started = record.get("started")
        known = isinstance(started, int | float)
        when = time.strftime("%Y-%m-%d %H:%M:%S %Z", time.localtime(started)) if known else "?"
        return f"host {record.get('host')}, pid {record.get('pid')}, started {when}"

    # -- acquire / release -----------------------------------------------------------
    def acquire(self) -> Lease:
        """Take the lease, taking over a stale one with a warning; else raise LeaseHeldError."""
        self.path.parent.mkdir(parents=True, exist_ok=True)
        for _ in range(5):
            temporary = self._temporary()
            try:
                os.link(temporary, self.path)
                self._start()
                return self
            except FileExistsError:
                pass
            finally:
                temporary.unlink(missing_ok=True)
            record = self.read()
            if record is None:
                # a lease that vanished or is unreadable (torn by a crash of another kind of
                # writer): look again after a moment rather than deleting what may be fresh
                time.sleep(0.05)
                record = self.read()
                if record is None and self.path.exists():
                    self._set_aside(None)
                continue
            reason = self.stale_reason(record)
            if reason is None:
                raise LeaseHeldError(
                    f"result store {self.store} is in use by another run ({self.describe(record)}); "
                    f"wait for it to finish, or if that run is dead its lease {self.path} expires "
                    f"{self.missed_beats * float(record.get('interval') or self.interval):.0f} s after its "
                    "last heartbeat"
                )
            if self._set_aside(record):
                self.taken_over = {**record, "reason": reason}
                warnings.warn(
                    f"taking over the lease of {self.store} from a run that is gone ({self.describe(record)}): "
                    f"{reason}", RuntimeWarning, stacklevel=2)
        raise LeaseHeldError(f"could not take the lease {self.path}; another run keeps taking it")

    def _set_aside(self, record: dict[str, Any] | None) -> bool:
        aside = self.path.with_name(f"{self.path.name}.stale-{self.token}")
        try:
            os.replace(self.path, aside)
        except FileNotFoundError:
            return False
        try:
            moved = json.loads(aside.read_text())
        except (OSError, ValueError):
            moved = None
        if record is not None and (moved or {}).get("token") != record.get("token"):
            # someone else took over between our read and our rename: put theirs back
            try:
                os.link(aside, self.path)
            except FileExistsError:
                pass
            aside.unlink(missing_ok=True)
            return False
        aside.unlink(missing_ok=True)
        return True

    def _start(self) -> None:
        if self._heartbeat:
            self._thread = threading.Thread(target=self._beat, name="snaplift-lease", daemon=True)
            self._thread.start()

    def _beat(self) -> None:
        while not self._stop.wait(self.interval):
            self.beat()

    def beat(self) -> None:
        """Rewrite the record with a fresh heartbeat, if the lease is still ours."""
        current = self.read()
        if current is None or current.get("token") != self.token:
            self._lost = True
            return
        temporary = self._temporary()
        os.replace(temporary, self.path)

    @property
    def lost(self) -> bool:
        return self._lost

    def check(self) -> None:
        """Raise :class:`LeaseLostError` if another run has taken the lease over."""
        current = self.read()
        if self._lost or current is None or current.get("token") != self.token:
            self._lost = True
            holder = f" ({self.describe(current)})" if current else ""
            raise LeaseLostError(
                f"the lease of {self.store} was taken over by another run{holder} while this run was "
                "suspended or cut off; this run stops without writing"
            )

    def release(self) -> None:
        self._stop.set()
        if self._thread is not None:
            self._thread.join(timeout=5)
        current = self.read()
        if current is not None and current.get("token") == self.token:
            self.path.unlink(missing_ok=True)

    def __enter__(self) -> Lease:
        return self.acquire()

    def __exit__(self, *exc: object) -> None:
        self.release()
