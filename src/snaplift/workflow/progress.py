"""Progress of a run, per stage: a rich display for people, plain lines for batch logs.

The runner opens one :class:`ProgressReporter` and hands it to the scheduler
(:func:`snaplift.cluster.open_scheduler`), which advances it as futures complete
(distributed) or tasks finish (threads). Stages (and the compress tile loop) may also
call :meth:`ProgressReporter.add_work` / :meth:`ProgressReporter.advance` directly, one
unit per tile. ``quiet`` silences the terminal; ``log_file`` receives time-stamped lines
(stage start and end, every 10 % of a stage's work, messages) for batch jobs whose
output is not a terminal.
"""

from __future__ import annotations

import datetime as _dt
import threading
from pathlib import Path
from typing import IO, Any

__all__ = ["ProgressReporter"]


def _now() -> str:
    return _dt.datetime.now(_dt.UTC).isoformat(timespec="seconds")


class ProgressReporter:
    """Per-stage progress with rich; also a :class:`snaplift.cluster.TaskProgress`.

    Parameters
    ----------
    console
        A ``rich.console.Console`` (default: a new one on standard output).
    quiet
        Print nothing to the terminal (the log file, if any, is still written).
    log_file
        Append plain time-stamped lines here.

    Example
    -------
    >>> reporter = ProgressReporter(quiet=True)
    >>> reporter.begin("compress", "randomized SVD")
    >>> reporter.add_work(4); reporter.advance(4)
    >>> reporter.end("compress", "done")
    >>> reporter.close()
    """

    def __init__(self, *, console: Any = None, quiet: bool = False, log_file: str | Path | None = None) -> None:
        self.quiet = quiet
        self._console = console
        self._log: IO[str] | None = open(log_file, "a", buffering=1) if log_file else None  # noqa: SIM115
        self._lock = threading.Lock()
        self._progress: Any = None
        self._task: Any = None
        self._stage: str | None = None
        self._total = 0
        self._expected = 0
        self._announced = 0
        self._done = 0
        self._logged_decile = 0

    # -- plain lines ---------------------------------------------------------------
    def _write_log(self, text: str) -> None:
        if self._log is not None:
            self._log.write(f"{_now()} {text}\n")

    def message(self, text: str) -> None:
        """A line for the user (and the log)."""
        with self._lock:
            self._write_log(text)
            if not self.quiet:
                self._get_console().print(text, highlight=False)

    def _get_console(self) -> Any:
        if self._console is None:
            from rich.console import Console

            self._console = Console()
        return self._console

    # -- stages --------------------------------------------------------------------
    def begin(self, stage: str, description: str) -> None:
        """A stage starts; its work is announced later with :meth:`add_work`."""
        with self._lock:
            self._stage, self._total, self._done, self._logged_decile = stage, 0, 0, 0
            self._expected, self._announced = 0, 0
            self._write_log(f"{stage}: started - {description}")
            if self.quiet:
                return
            if self._progress is None:
                from rich.progress import (
                    BarColumn,
                    MofNCompleteColumn,
                    Progress,
                    TextColumn,
                    TimeElapsedColumn,
                )

                self._progress = Progress(TextColumn("{task.description}"), BarColumn(), MofNCompleteColumn(),
                                          TimeElapsedColumn(), console=self._get_console(), transient=False)
                self._progress.start()
            self._task = self._progress.add_task(f"{stage}: {description}", total=None)

    def expect(self, units: int) -> None:
        """The stage's whole work, known up front (every pass of compress): work announced
        later with :meth:`add_work` counts against it, so the bar does not reach 100 %
        after the first pass."""
        with self._lock:
            self._expected = int(units)
            self._total = max(self._expected, self._announced)
            if self._progress is not None and self._task is not None:
                self._progress.update(self._task, total=self._total)

    def add_work(self, units: int) -> None:
        with self._lock:
            self._announced += int(units)
            self._total = max(self._expected, self._announced)
            if self._progress is not None and self._task is not None:
                self._progress.update(self._task, total=self._total)

    def advance(self, units: int = 1) -> None:
        with self._lock:
            self._done += int(units)
            if self._progress is not None and self._task is not None:
                self._progress.update(self._task, completed=self._done)
            if self._total and self._stage:
                decile = min(10, int(10 * self._done / self._total))
                if decile > self._logged_decile:
                    self._logged_decile = decile
                    self._write_log(f"{self._stage}: {10 * decile} % ({self._done} of {self._total} units)")

    def end(self, stage: str, summary: str) -> None:
        """A stage finished (computed or reused); ``summary`` says which and what it cost."""
        with self._lock:
            self._write_log(f"{stage}: finished - {summary}")
            if self._progress is not None and self._task is not None:
                total = max(self._total, self._done, 1)
                self._progress.update(self._task, total=total, completed=total,
                                      description=f"{stage}: {summary}")
            elif not self.quiet:
                self._get_console().print(f"{stage}: {summary}", highlight=False)
            self._task = None
            self._stage = None

    def close(self) -> None:
        with self._lock:
            if self._progress is not None:
                self._progress.stop()
                self._progress = None
            if self._log is not None:
                self._log.close()
                self._log = None
