"""A report helper process for ``snaplift run``: the report's imports and first drawing
done beside the run instead of after it.

On a small archive the report took longer than the run itself (importing matplotlib,
loading fonts, drawing six figures, one core busy, the other idle). ``snaplift run``
therefore starts this helper as soon as it knows a report will be drawn for a small
archive (:func:`start_for`): a process of its own (spawned, not forked from the run, whose
scheduler threads may hold locks), in a session of its own (Ctrl-C in the terminal goes to
the run, which stops it), that imports the report code and draws a throw-away figure while
the run computes. When the store is committed the run sends it the store's path; the
helper reads the store once, forks a copy of itself (no threads of ours alive in it) and
the two draw half of the figures each, on the machine's two cores. The page itself is
written as by :func:`snaplift.report.page.render_report`: into a staging folder renamed
into place, so a report is whole or absent.

Should the helper fail in any way (not started, died, no answer), the run draws the
report itself, as before. The helper never outlives the run: it exits when its input
closes, and :meth:`ReportHelper.close` ends it (SIGTERM while it draws, so that its
staging folder is removed; SIGKILL while it only waits).

This module imports nothing heavy at module level: ``snaplift run`` imports it first.
"""

from __future__ import annotations

import json
import os
import select
import signal
import subprocess
import sys
import time
from pathlib import Path
from typing import IO, Any

__all__ = ["HELPER_ARCHIVE_BYTES", "HELPER_VARIABLE", "ReportHelper", "idle_core", "main", "start_for"]

#: the helper is started only for archives up to this size on disk: beyond it the run takes
#: seconds or more and the report's start-up (about half a second) is not worth a process
HELPER_ARCHIVE_BYTES = 64 * 2**20
#: ``SNAPLIFT_REPORT_HELPER=0`` draws the report in the run's own process (as ``snaplift report`` does);
#: ``1`` starts the helper even on a busy machine (benchmarks); unset: by the load (:func:`idle_core`)
HELPER_VARIABLE = "SNAPLIFT_REPORT_HELPER"
#: seconds the helper gets to clean up after SIGTERM before it is killed
STOP_SECONDS = 5.0
#: seconds the run waits for the helper's page (a small archive's page takes about one),
#: and the helper for its forked copy's figures, before doing the work itself
ANSWER_SECONDS = 120.0


def _archive_bytes(folder: Path, path: Any) -> int | None:
    """Bytes on disk of the archive files a workflow names (None when not plain files)."""
    paths = path if isinstance(path, list) else [path]
    total = 0
    for entry in paths:
        if not isinstance(entry, str) or any(c in entry for c in "*?["):
            return None
        candidate = Path(entry) if Path(entry).is_absolute() else folder / entry
        if not candidate.is_file():
            return None
        total += candidate.stat().st_size
    return total


def idle_core() -> bool:
    """Whether the machine has a core to spare: the 1-minute load average at most the cores
    this process may use less half a core, or (the average lags a minute behind: a machine
    that has just become quiet) no other task runnable at this moment (``/proc/loadavg``).
    The helper pays only with an idle core; on a busy machine its second process (imports
    done twice, a second drawing process) costs about as much as it saves."""
    try:
        cores = len(os.sched_getaffinity(0))
    except AttributeError:  # pragma: no cover - platforms without affinity
        cores = os.cpu_count() or 1
    if cores < 2:
        return False
    if os.getloadavg()[0] <= cores - 0.5:
        return True
    runnable = []
    for _ in range(3):  # the fewest of three looks 2 ms apart: a task that only passes by is not load
        try:  # "0.52 0.58 0.59 2/345 12345": runnable tasks now (this one among them) / all tasks
            runnable.append(int(Path("/proc/loadavg").read_text().split()[3].split("/")[0]))
        except (OSError, ValueError, IndexError):
            return False
        time.sleep(0.002)
    return min(runnable) - 1 <= cores - 2


def start_for(workflow: str | Path) -> ReportHelper | None:
    """A helper for the run of ``workflow`` when it will draw a report of a small archive
    (output.report on, the archive's files at most :data:`HELPER_ARCHIVE_BYTES`) and the
    machine has an idle core (:func:`idle_core`), else None. ``SNAPLIFT_REPORT_HELPER=1``
    starts one whatever the load, ``0`` never.

    The workflow is only peeked at here (a file that does not parse gets no helper; the
    run itself then says what is wrong).
    """
    setting = os.environ.get(HELPER_VARIABLE, "")
    if not hasattr(os, "fork") or setting == "0":
        return None  # (fork, process groups and a load average: POSIX)
    import yaml

    try:
        data = yaml.safe_load(Path(workflow).read_text(encoding="utf-8"))
    except (OSError, ValueError, yaml.YAMLError):
        return None
    if not isinstance(data, dict):
        return None
    output, archive = data.get("output") or {}, data.get("archive") or {}
    if not isinstance(output, dict) or not isinstance(archive, dict) or output.get("report", True) is not True:
        return None
    size = _archive_bytes(Path(workflow).resolve().parent, archive.get("path"))
    if size is None or size > HELPER_ARCHIVE_BYTES:
        return None
    # the load last: a run without a report (or of a large archive) does not wait for its looks
    if setting != "1" and not idle_core():
        return None
    return ReportHelper.start()


class ReportHelper:
    """The run's side of the helper: :meth:`render` a committed store, :meth:`close` always."""

    def __init__(self, process: subprocess.Popen[bytes]) -> None:
        self.process = process
        self.state = "waiting"  # then "drawing", then "answered"

    @classmethod
    def start(cls) -> ReportHelper | None:
        import snaplift

        environment = dict(os.environ)
        source = str(Path(snaplift.__file__).resolve().parents[1])
        environment["PYTHONPATH"] = os.pathsep.join(p for p in (source, environment.get("PYTHONPATH")) if p)
        # its few small products need no thread pool (and leave the cores to the run)
        for name in ("OPENBLAS_NUM_THREADS", "OMP_NUM_THREADS", "MKL_NUM_THREADS"):
            environment.setdefault(name, "1")
        try:
            process = subprocess.Popen([sys.executable, "-c", "from snaplift.report.helper import main; main()"],
                                       stdin=subprocess.PIPE, stdout=subprocess.PIPE, stderr=subprocess.DEVNULL,
                                       env=environment, start_new_session=True, close_fds=True)
        except OSError:
            return None
        return cls(process)

    def render(self, store: str | Path) -> dict[str, Any] | None:
        """The helper's answer for ``store``: ``{"index", "seconds", "figures", "read"}`` or
        ``{"warning"}`` (the report could not be drawn, as render_report would have raised);
        None when the helper failed (the caller draws the report itself)."""
        process = self.process
        if self.state != "waiting" or process.poll() is not None or process.stdin is None or process.stdout is None:
            return None
        self.state = "drawing"
        try:
            process.stdin.write((json.dumps({"store": str(store)}) + "\n").encode())
            process.stdin.close()
            # one line, written whole; a helper that hangs is stopped by close() and the run draws
            ready, _, _ = select.select([process.stdout], [], [], ANSWER_SECONDS)
            line = process.stdout.readline() if ready else b""
        except OSError:  # the helper is gone (broken pipe)
            return None
        try:
            answer = json.loads(line) if line else None
        except ValueError:
            return None
        if not isinstance(answer, dict):
            return None
        self.state = "answered"
        return answer

    def close(self) -> None:
        """End the helper: let it exit once it has answered; stop it otherwise (SIGKILL while
        it only waits, it has written nothing; SIGTERM while it draws, so that it removes its
        staging folder, SIGKILL after :data:`STOP_SECONDS`)."""
        process = self.process
        for stream in (process.stdin, process.stdout):
            if stream is not None:
                try:
                    stream.close()
                except OSError:
                    pass
        if process.poll() is None:
            if self.state == "waiting":
                _signal_group(process, signal.SIGKILL)
            else:
                if self.state == "drawing":
                    _signal_group(process, signal.SIGTERM)
                try:
                    process.wait(STOP_SECONDS)
                except subprocess.TimeoutExpired:
                    _signal_group(process, signal.SIGKILL)
        process.wait()


def _signal_group(process: subprocess.Popen[bytes], number: int) -> None:
    """Signal the helper and the copy it forked (its own session: its group is its pid)."""
    try:
        os.killpg(process.pid, number)
    except (ProcessLookupError, PermissionError):
        pass


# ---------------------------------------------------------------- the helper's own side


def _stop(number: int, _frame: Any) -> None:
    raise SystemExit(128 + number)


def _warm_up() -> None:
    """Draw a throw-away figure: fonts, text layout, log-axis labels, markers, legend and the
    PNG writer are loaded now, not in the first figure of the report."""
    from snaplift.report.figures import _fixed
    from snaplift.report.page import _png

    figure, grid = _fixed(5, 2.5, 1, 2)
    left, right = grid[0]
    left.plot([0.0, 1.0], [0.0, 1.0], marker="o", label="line")
    left.scatter([0.5], [0.5], marker="^", s=30)
    left.bar([0.2], [0.4], 0.1, hatch="//")
    left.set_title("warm", loc="left", fontsize=11)
    left.set_xlabel("time", fontsize=9)
    left.legend(fontsize=8, title="t", title_fontsize=9)
    right.semilogy([1.0, 2.0, 3.0], [1e-4, 1e-2, 1.0])
    right.text(0.1, 0.9, "x", fontsize=8, transform=right.transAxes)
    figure.suptitle("warm", fontsize=11)
    _png(figure)


def _forked(jobs: list[Any]) -> list[Any]:
    """Draw the figure jobs in this process and a forked copy of it, about half the weight
    each; the copy only draws (no store or archive reads: those jobs stay here) and sends
    its PNGs back through a pipe. Should the copy fail, its jobs are drawn here."""
    import pickle

    from snaplift.report.page import draw_job

    order = sorted(range(len(jobs)), key=lambda i: -jobs[i].weight)
    mine: list[int] = []
    theirs: list[int] = []
    load = [0.0, 0.0]
    for i in order:
        side = 0 if jobs[i].reads or load[0] <= load[1] else 1
        (mine if side == 0 else theirs).append(i)
        load[side] += jobs[i].weight
    results: dict[int, Any] = {}
    if not theirs or (os.environ.get(HELPER_VARIABLE) != "1" and not idle_core()):
        return [draw_job(job) for job in jobs]
    reading, writing = os.pipe()
    try:
        pid = os.fork()
    except OSError:  # no process to spare (limits, memory): all of them here
        os.close(reading)
        os.close(writing)
        return [draw_job(job) for job in jobs]
    if pid == 0:  # the copy: draw, send, leave without running any exit handler of the helper
        code = 1
        try:
            os.close(reading)
            data = pickle.dumps({i: draw_job(jobs[i]) for i in theirs})
            with os.fdopen(writing, "wb") as pipe:
                pipe.write(data)
            code = 0
        finally:
            os._exit(code)
    os.close(writing)
    reaped = False
    try:
        for i in mine:
            results[i] = draw_job(jobs[i])
        with os.fdopen(reading, "rb") as pipe:
            ready, _, _ = select.select([pipe], [], [], ANSWER_SECONDS)
            data = pipe.read() if ready else b""
        if ready:
            _, status = os.waitpid(pid, 0)
            reaped = True
            if status == 0:
                results.update(pickle.loads(data))
    finally:
        if not reaped:
            try:
                os.kill(pid, signal.SIGKILL)
                os.waitpid(pid, 0)
            except (ProcessLookupError, ChildProcessError):
                pass
    for i in theirs:
        if i not in results:
            results[i] = draw_job(jobs[i])
    return [results[i] for i in range(len(jobs))]


def main() -> None:
    """The helper process: warm up, wait for one store path on stdin, draw its report,
    answer one JSON line on stdout, exit."""
    signal.signal(signal.SIGINT, signal.SIG_IGN)
    signal.signal(signal.SIGTERM, _stop)
    answer: IO[str] = os.fdopen(os.dup(1), "w")
    os.dup2(2, 1)  # anything printed on the way goes where stderr goes, not into the answer
    from snaplift.errors import SnapliftError
    from snaplift.report.page import render_report

    try:
        _warm_up()
    except Exception:  # noqa: BLE001 -- a warm-up is optional; the report is drawn regardless
        pass
    line = sys.stdin.readline()
    if not line:
        return
    try:
        summary = render_report(json.loads(line)["store"], split=_forked)
        reply: dict[str, Any] = {"index": str(summary.index), "seconds": summary.seconds,
                                 "figures": list(summary.figures), "read": summary.archive_values_read}
    except (SnapliftError, NotImplementedError, OSError) as error:
        reply = {"warning": str(error)}
    except Exception as error:  # noqa: BLE001 -- said by the run as a warning, like a drawing failure there
        reply = {"warning": f"{type(error).__name__}: {error}"}
    answer.write(json.dumps(reply) + "\n")
    answer.flush()
    # the page is in place and the answer sent: leave without the interpreter's teardown
    # (a tenth of a second of freeing matplotlib's and numpy's objects, the run waits for it)
    os._exit(0)


if __name__ == "__main__":  # pragma: no cover - started by ReportHelper.start
    main()
