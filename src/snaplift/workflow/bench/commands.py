"""Whole commands timed as a user runs them: under ``slowfs-run`` (reads capped, page cache
bounded) or after dropping the page cache (cold, uncapped).

``slowfs-run`` (shipped beside this module) puts the command in a blkio (or
io) + memory cgroup: reads from the device that holds the archive are throttled to
``--read-limit`` and the page cache the command fills counts against ``--cache-limit``, so
an archive larger than the limit is read from the device again on every pass, as one
larger than a node's memory is. It needs Linux, root and those cgroup controllers; where
any is missing the bench refuses in one line naming it.
"""

from __future__ import annotations

import os
import re
import shutil
import subprocess
import sys
import time
from dataclasses import dataclass
from pathlib import Path

from snaplift.errors import ConfigError
from snaplift.workflow.bench.archive import drop_page_cache

__all__ = ["Cap", "CommandRun", "find_slowfs_run", "slowfs_missing", "require_slowfs", "run_command",
           "START_MARK"]

#: printed (by ``_MARK``, or :mod:`snaplift.workflow.bench.started`) before the command runs: the
#: wall-clock start of the timed process, from which a run's startup share is counted
START_MARK = "snaplift-bench-start"
_SLOWFS_LINE = re.compile(r"^slowfs-run: ([0-9.]+) s, exit (-?\d+)\s*$", re.M)
_CGROUP = Path("/sys/fs/cgroup")


@dataclass(frozen=True)
class Cap:
    """The read-bound regime: bytes per second read from the device, bytes of page cache."""

    read_limit: str
    cache_limit: str
    tool: Path


@dataclass(frozen=True)
class CommandRun:
    seconds: float
    output: str
    started: float | None  # wall-clock epoch at which the command itself started (START_MARK)
    ended: float | None = None  # wall-clock epoch at which the command (and slowfs-run) had ended


#: prints the start mark, then becomes the command: plain Python, nothing imported (run as
#: ``-m snaplift.workflow.bench.started`` the mark came after importing the bench package and
#: numpy, 0.2-0.4 s on a loaded machine, moved from the run's startup to its store share)
_MARK = (f"import os, sys, time; print('{START_MARK}', f'{{time.time():.6f}}', flush=True); "
         "os.execvp(sys.argv[1], sys.argv[1:])")


def find_slowfs_run(environ: dict[str, str] | None = None, *, source: Path | None = None) -> Path | None:
    """``slowfs-run``: ``$SNAPLIFT_SLOWFS_RUN``, else the copy shipped beside this module
    (``snaplift/workflow/bench/slowfs-run``), else on ``PATH``; ``None`` when absent."""
    environ = dict(os.environ) if environ is None else environ
    given = environ.get("SNAPLIFT_SLOWFS_RUN")
    if given:
        return Path(given) if Path(given).is_file() else None
    shipped = (source or Path(__file__)).resolve().with_name("slowfs-run")
    if shipped.is_file():
        return shipped
    found = shutil.which("slowfs-run", path=environ.get("PATH"))
    return Path(found) if found else None


def slowfs_missing(tool: Path | None, *, platform: str | None = None, euid: int | None = None,
                   cgroup: Path = _CGROUP) -> str | None:
    """What the capped regime lacks on this machine (``None``: nothing)."""
    platform = sys.platform if platform is None else platform
    if not platform.startswith("linux"):
        return f"Linux (this is {platform})"
    if tool is None:
        return ("the slowfs-run tool (snaplift ships one beside snaplift/workflow/bench/commands.py; "
                "set SNAPLIFT_SLOWFS_RUN or put one on PATH)")
    euid = (os.geteuid() if hasattr(os, "geteuid") else -1) if euid is None else euid
    if euid != 0:
        return "root (cgroups and dropping the page cache)"
    v1 = (cgroup / "blkio").is_dir() and (cgroup / "memory").is_dir()
    controllers = cgroup / "cgroup.controllers"
    v2 = controllers.is_file() and {"io", "memory"} <= set(controllers.read_text().split())
    if not (v1 or v2):
        return f"blkio/io and memory cgroup controllers (none under {cgroup})"
    return None


def require_slowfs(read_limit: str, cache_limit: str) -> Cap:
    tool = find_slowfs_run()
    missing = slowfs_missing(tool)
    if missing:
        raise ConfigError(f"--read-limit/--cache-limit need {missing}")
    assert tool is not None
    return Cap(read_limit, cache_limit, tool)


def run_command(argv: list[str], *, folder: Path, cap: Cap | None, cold: bool, env: dict[str, str] | None = None,
                cwd: Path | None = None) -> CommandRun:
    """Run ``argv`` once and time it, whole: under ``slowfs-run`` when ``cap`` (which drops
    the page cache itself and times the command), else after dropping the page cache
    (``cold``) or as it is (warm). A failing command is a one-line error with its last line."""
    marked = [sys.executable, "-c", _MARK, *argv]
    if cap is not None and sys.prefix != sys.base_prefix and env is None:
        # slowfs-run re-warms the Python installation after dropping the page cache: the
        # virtual environment only when VIRTUAL_ENV names it (it is unset when the venv's
        # python is run directly), else the command's imports read numpy, scipy, zarr...
        # through the read cap (0.2-0.6 s of each command's startup, measured)
        env = {**os.environ, "VIRTUAL_ENV": sys.prefix}
    package = Path(__file__).resolve().parents[2]
    if cap is not None and not _inside(package, Path(sys.prefix)):
        # snaplift installed in development mode: its modules live outside the environment,
        # where slowfs-run does not warm them; an installed copy would be warm (some 260
        # small reads through the cap at each command's start otherwise)
        env = dict(os.environ if env is None else env)
        env["SLOWFS_WARM"] = ":".join(filter(None, [env.get("SLOWFS_WARM", ""), str(package)]))
    if cap is not None:
        # the shipped copy may have lost its executable bit in an install: bash runs it regardless
        launcher = [str(cap.tool)] if os.access(cap.tool, os.X_OK) else ["bash", str(cap.tool)]
        full = [*launcher, "--read-limit", cap.read_limit, "--cache-limit", cap.cache_limit,
                "--path", str(folder), "--", *marked]
    else:
        full = marked
        if cold:
            drop_page_cache()
    start = time.perf_counter()
    done = subprocess.run(full, capture_output=True, text=True, env=env, cwd=cwd)
    seconds = time.perf_counter() - start
    ended = time.time()
    output = done.stdout + done.stderr
    if cap is not None:
        found = _SLOWFS_LINE.findall(output)
        if found:
            seconds = float(found[-1][0])
    if done.returncode != 0:
        last = next((line for line in reversed(output.strip().splitlines()) if line.strip()), "no output")
        raise ConfigError(f"bench: {' '.join(argv[:3])} ... failed (exit {done.returncode}): {last.strip()}")
    return CommandRun(seconds, output, start_of(output), ended)


def _inside(path: Path, folder: Path) -> bool:
    return path.resolve().is_relative_to(folder.resolve())


def start_of(output: str) -> float | None:
    match = re.search(rf"^{START_MARK} ([0-9.]+)$", output, re.M)
    return float(match.group(1)) if match else None
