"""Helpers of the fault suite: small archives, workflows, the CLI, input hashes.

Every case runs the command line (typer's CliRunner in process, a few as a real
subprocess) and checks what a user would: exit status 2, one line on stderr and no
traceback, the named path/field/index, inputs byte-identical before and after, and no
result store that looks complete.
"""

from __future__ import annotations

import hashlib
import os
import subprocess
import sys
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import h5py
import numpy as np
import pytest
import yaml
import zarr
from typer.testing import CliRunner

from snaplift.cli import app


@dataclass
class Outcome:
    code: int
    stdout: str
    stderr: str


class Faults:
    """``faults`` fixture: build inputs in ``folder`` and run the CLI on them."""

    def __init__(self, folder: Path) -> None:
        self.folder = folder

    # -- inputs -------------------------------------------------------------------
    def data(self, m: int = 24, grid: tuple[int, int] = (6, 8), seed: int = 0) -> np.ndarray:
        # two damped oscillations on a small grid (a known linear system)
        rng = np.random.default_rng(seed)
        n = grid[0] * grid[1]
        modes = rng.standard_normal((n, 2)) + 1j * rng.standard_normal((n, 2))
        eigenvalues = np.array([0.97 * np.exp(0.4j), 0.9 * np.exp(1.1j)])
        x = (modes @ (eigenvalues[:, None] ** np.arange(m)[None, :])).real
        return x.T.reshape(m, *grid)

    def hdf5(self, name: str = "a.h5", m: int = 24, **datasets: Any) -> Path:
        path = self.folder / name
        u = self.data(m)
        with h5py.File(path, "w") as h5:
            h5.create_dataset("u", data=u, chunks=(1, *u.shape[1:]), maxshape=(None, *u.shape[1:]))
            h5.create_dataset("t", data=0.1 * np.arange(m), maxshape=(None,))
            for key, value in datasets.items():
                h5[key] = value
        return path

    def zarr_archive(self, name: str = "a.zarr", m: int = 24, fill_value: Any = 0.0) -> Path:
        path = self.folder / name
        u = self.data(m)
        group = zarr.open_group(str(path), mode="w", zarr_format=3)
        array = group.create_array("u", shape=u.shape, chunks=(1, *u.shape[1:]), dtype="f8", compressors=None,
                                   fill_value=fill_value)
        array[...] = u
        group.create_array("t", shape=(m,), dtype="f8", compressors=None)[...] = 0.1 * np.arange(m)
        return path

    def workflow(self, name: str = "w.yaml", archive: str = "a.h5", output: str = "r.zarr", **sections: Any) -> Path:
        data: dict[str, Any] = {"archive": {"path": archive, "fields": ["u"], "time": "t"},
                                "compress": {"method": "randomized", "rank": 6, "oversample": 4},
                                "fit": {"rank": 4}, "output": {"path": output}, "cluster": "threads"}
        for key, value in sections.items():
            if isinstance(value, dict) and isinstance(data.get(key), dict):
                data[key] = {**data[key], **value}
            else:
                data[key] = value
        path = self.folder / name
        path.write_text(yaml.safe_dump(data))
        return path

    # -- running ----------------------------------------------------------------------
    def cli(self, *args: str) -> Outcome:
        result = CliRunner().invoke(app, [str(a) for a in args])
        if result.exception is not None and not isinstance(result.exception, SystemExit):
            raise result.exception  # a crash, not a clean exit: show it
        return Outcome(result.exit_code, result.stdout, result.stderr)

    def subprocess(self, *args: str, timeout: float = 300) -> Outcome:
        env = {**os.environ, "PYTHONWARNINGS": "ignore"}
        done = subprocess.run([sys.executable, "-m", "snaplift.cli", *map(str, args)], capture_output=True,
                              text=True, timeout=timeout, cwd=self.folder, env=env)
        return Outcome(done.returncode, done.stdout, done.stderr)

    # -- checks -------------------------------------------------------------------------
    def hashes(self, *paths: Path) -> dict[str, str]:
        out = {}
        for path in paths:
            files = sorted(p for p in Path(path).rglob("*") if p.is_file()) if Path(path).is_dir() else [Path(path)]
            for file in files:
                out[str(file)] = hashlib.sha256(file.read_bytes()).hexdigest()
        return out

    def one_line_error(self, outcome: Outcome, *named: str) -> str:
        """Exit 2, exactly one non-empty line on stderr, no traceback, naming each of ``named``."""
        lines = [line for line in outcome.stderr.splitlines() if line.strip()]
        assert outcome.code == 2, (outcome.code, outcome.stderr[-2000:])
        assert len(lines) == 1, outcome.stderr[-2000:]
        assert "Traceback" not in outcome.stderr and 'File "' not in outcome.stderr
        for text in named:
            assert text in lines[0], (text, lines[0])
        return lines[0]

    def no_complete_store(self, path: Path) -> None:
        """Nothing at ``path`` looks like a finished result store."""
        if not path.exists():
            return
        try:
            attrs = dict(zarr.open_group(str(path), mode="r").attrs)
        except Exception:
            return
        assert not attrs.get("snaplift_complete"), f"{path} looks complete"


@pytest.fixture
def faults(tmp_path: Path) -> Faults:
    return Faults(tmp_path)
