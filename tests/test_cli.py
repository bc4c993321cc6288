"""The command line through typer's CliRunner: tables, JSON, one-line errors, exit codes."""

from __future__ import annotations

import json
from pathlib import Path

import h5py
import numpy as np
import pytest
import yaml
from typer.testing import CliRunner

from snaplift.cli import app

runner = CliRunner()


@pytest.fixture()
def archive(tmp_path: Path) -> Path:
    t = 0.1 * np.arange(30)
    x = np.linspace(0, 1, 12)
    # two travelling waves: a known linear system (frequencies 1.0 Hz and 2.5 Hz)
    u = (np.cos(2 * np.pi * (x[None, :] - 1.0 * t[:, None]))
         + 0.3 * np.sin(2 * np.pi * (2 * x[None, :] - 2.5 * t[:, None])))
    path = tmp_path / "wave.h5"
    with h5py.File(path, "w") as h5:
        h5["t"] = t
        h5.create_dataset("u", data=u[:, :, None].repeat(3, axis=2), chunks=(1, 12, 3))
    return path


def test_help_has_examples() -> None:
    for command in ("demo", "run", "scan", "spectrum", "report", "forecast", "export", "compare"):
        result = runner.invoke(app, [command, "--help"])
        assert result.exit_code == 0
        assert "Example" in result.output


def test_scan_table_and_json(archive: Path) -> None:
    table = runner.invoke(app, ["scan", str(archive)])
    assert table.exit_code == 0, table.output
    assert "snapshots" in table.output and "30" in table.output
    data = json.loads(runner.invoke(app, ["scan", str(archive), "--json"]).output)
    assert data["n_snapshots"] == 30
    assert data["fields"][0]["name"] == "u"
    assert data["spacing"]["uniform"] is True


def test_scan_plan_for_a_method(archive: Path) -> None:
    out = runner.invoke(app, ["scan", str(archive), "--method", "sketch", "--rank", "3"])
    assert out.exit_code == 0 and "compress.method sketch" in out.output and "1 pass" in out.output
    bad = runner.invoke(app, ["scan", str(archive), "--method", "svd"])
    assert bad.exit_code == 2 and "not a compress method" in bad.output


def test_scan_of_several_runs(archive: Path) -> None:
    # the same file twice under two names: two runs of 30 snapshots each
    copy = archive.with_name("second.h5")
    copy.write_bytes(archive.read_bytes())
    out = runner.invoke(app, ["scan", str(archive), str(copy)])
    assert out.exit_code == 0, out.output
    assert "2 runs of 30, 30 snapshots" in out.output
    assert json.loads(runner.invoke(app, ["scan", str(archive), str(copy), "--json"]).output)["n_snapshots"] == 60


def test_run_then_spectrum_json(archive: Path, tmp_path: Path) -> None:
    workflow = tmp_path / "w.yaml"
    workflow.write_text(yaml.safe_dump({
        "archive": {"path": archive.name, "fields": ["u"], "time": "t"},
        "compress": {"rank": 4, "oversample": 4}, "output": {"path": "r.zarr"}, "cluster": "threads",
    }))
    dry = runner.invoke(app, ["run", str(workflow), "--dry-run"])
    assert dry.exit_code == 0 and "is valid" in dry.output
    assert not (tmp_path / "r.zarr").exists()
    result = runner.invoke(app, ["run", str(workflow)])
    assert result.exit_code == 0, result.output
    data = json.loads(runner.invoke(app, ["spectrum", str(tmp_path / "r.zarr"), "--json"]).output)
    frequencies = sorted(abs(m["frequency"]) for m in data["modes"])
    # two travelling waves at 1.0 and 2.5 Hz, each a conjugate pair (exact for DMD, Tu et al. 2014)
    np.testing.assert_allclose(frequencies, [1.0, 1.0, 2.5, 2.5], rtol=1e-8)


@pytest.mark.parametrize(
    "arguments, message",
    [
        (["scan", "missing.h5"], "missing.h5"),
        (["spectrum", "nowhere.zarr"], "does not exist"),
        (["spectrum", "nowhere.zarr", "--sort", "colour"], "--sort 'colour' is not allowed"),
    ],
)
def test_user_errors_are_one_line_exit_2(arguments: list[str], message: str, tmp_path: Path, monkeypatch) -> None:
    monkeypatch.chdir(tmp_path)
    result = runner.invoke(app, arguments)
    assert result.exit_code == 2
    assert message in result.output
    assert "Traceback" not in result.output
    assert len([line for line in result.output.splitlines() if line.strip()]) == 1


def test_invalid_workflow_is_one_line(tmp_path: Path) -> None:
    workflow = tmp_path / "w.yaml"
    workflow.write_text("archive: {path: a.h5, fields: [u], step: 0.1}\ncompress: {rank: -3}\n")
    result = runner.invoke(app, ["run", str(workflow)])
    assert result.exit_code == 2
    assert "compress.rank = -3" in result.output and "greater than or equal to 1" in result.output


@pytest.mark.parametrize(
    "arguments, message",
    [
        (["run"], "Missing argument 'workflow'"),
        (["spectrum", "a.zarr", "b.zarr"], "unexpected extra argument"),
        (["scan", "a.h5", "--colour"], "No such option: --colour"),
    ],
)
def test_usage_errors_are_one_line_exit_2(arguments: list[str], message: str) -> None:
    result = runner.invoke(app, arguments)
    assert result.exit_code == 2
    lines = [line for line in result.output.splitlines() if line.strip()]
    assert len(lines) == 1 and message in lines[0] and "--help" in lines[0], result.output


def test_usage_error_and_version_as_a_real_process() -> None:
    import subprocess
    import sys

    from snaplift import __version__

    run = subprocess.run([sys.executable, "-m", "snaplift.cli", "run"], capture_output=True, text=True, timeout=120)
    assert run.returncode == 2 and run.stderr.strip().startswith("snaplift: error: Missing argument")
    assert len(run.stderr.strip().splitlines()) == 1 and run.stdout == ""
    version = subprocess.run([sys.executable, "-m", "snaplift.cli", "--version"], capture_output=True, text=True,
                             timeout=120)
    assert version.returncode == 0 and version.stdout.strip() == f"snaplift {__version__}"
