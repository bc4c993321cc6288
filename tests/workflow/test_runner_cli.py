"""`snaplift run` options: --quiet, --log, --dry-run, through typer's CliRunner."""

from __future__ import annotations

from pathlib import Path

import h5py
import numpy as np
import yaml
from typer.testing import CliRunner

from snaplift.cli import app
from snaplift.workflow.progress import ProgressReporter


def _workflow(folder: Path, cluster: object = "threads") -> Path:
    rng = np.random.default_rng(1)
    with h5py.File(folder / "a.h5", "w") as h5:
        h5["t"] = 0.1 * np.arange(24)
        h5.create_dataset("u", data=rng.standard_normal((24, 5, 6)), chunks=(1, 5, 6))
    path = folder / "w.yaml"
    # compress.memory bounds the whole process tree, interpreters included: a budget that
    # holds them; the tiles stay small (each worker gets snaplift.archive.plan.TILES_PER_WORKER)
    path.write_text(yaml.safe_dump({"archive": {"path": "a.h5", "fields": ["u"], "time": "t"},
                                    "compress": {"rank": 3, "oversample": 2, "memory": "2GiB"},
                                    "output": {"path": "r.zarr"}, "cluster": cluster}))
    return path


def test_quiet_prints_only_the_result_path(tmp_path: Path) -> None:
    result = CliRunner().invoke(app, ["run", str(_workflow(tmp_path)), "--quiet"])
    assert result.exit_code == 0, result.output
    assert result.output.strip() == str(tmp_path / "r.zarr")


def test_log_file_has_every_stage(tmp_path: Path) -> None:
    log = tmp_path / "run.log"
    path = _workflow(tmp_path, {"kind": "local", "workers": 1})
    result = CliRunner().invoke(app, ["run", str(path), "--quiet", "--log", str(log)])
    assert result.exit_code == 0, result.output
    text = log.read_text()
    for stage in ("scan", "compress", "fit", "modes", "report"):
        assert f"{stage}: started" in text and f"{stage}: finished" in text
    # progress under distributed comes from futures: the compress stage reached 100 %
    assert "compress: 100 %" in text
    again = CliRunner().invoke(app, ["run", str(path), "--log", str(log)])
    assert again.exit_code == 0 and "compress reused" in again.output


def test_dry_run_says_what_it_would_write(tmp_path: Path) -> None:
    result = CliRunner().invoke(app, ["run", str(_workflow(tmp_path)), "--dry-run"])
    assert result.exit_code == 0
    assert f"would write {tmp_path / 'r.zarr'}" in result.output and "r.zarr.lease" in result.output
    assert not (tmp_path / "r.zarr").exists()


def test_reporter_logs_deciles_and_stays_silent_when_quiet(tmp_path: Path, capsys) -> None:
    reporter = ProgressReporter(quiet=True, log_file=tmp_path / "p.log")
    reporter.begin("compress", "tiles")
    reporter.add_work(20)
    for _ in range(20):
        reporter.advance()
    reporter.end("compress", "computed")
    reporter.close()
    lines = (tmp_path / "p.log").read_text().splitlines()
    assert sum("compress: " in line and " % (" in line for line in lines) == 10  # 10 %, 20 %, ... 100 %
    assert capsys.readouterr().out == ""


def test_dry_run_checks_the_archive_before_the_queue(tmp_path: Path) -> None:
    path = _workflow(tmp_path)
    ok = CliRunner().invoke(app, ["run", str(path), "--dry-run"])
    assert ok.exit_code == 0, ok.output
    assert "u (24, 5, 6)" in ok.output and "24 snapshots" in ok.output
    data = yaml.safe_load(path.read_text())
    for section, value, message in (
        ("fields", ["u", "w"], "archive field 'w' not found"),
        ("weights", "area", "'area'"),
        ("mask", "solid", "'solid'"),
        ("runs", "run", "archive.runs dataset 'run' not found"),
        ("coords", {"x": "xc"}, "coordinate dataset 'xc'"),
        ("time", "when", "'when'"),
    ):
        broken = tmp_path / f"broken-{section}.yaml"
        broken.write_text(yaml.safe_dump({**data, "archive": {**data["archive"], section: value}}))
        result = CliRunner().invoke(app, ["run", str(broken), "--dry-run"])
        assert result.exit_code == 2, (section, result.output)
        assert message in result.output and "Traceback" not in result.output, (section, result.output)
        assert len(result.output.strip().splitlines()) == 1, result.output
    # no time dataset and no step: the message names the keys to set
    with h5py.File(tmp_path / "b.h5", "w") as h5:
        h5.create_dataset("u", data=np.zeros((24, 5, 6)))
    timeless = tmp_path / "timeless.yaml"
    timeless.write_text(yaml.safe_dump({**data, "archive": {"path": "b.h5", "fields": ["u"]}}))
    result = CliRunner().invoke(app, ["run", str(timeless), "--dry-run"])
    assert result.exit_code == 2 and "archive.time" in result.output and "archive.step" in result.output


def test_a_typo_is_reported_before_an_old_store(tmp_path: Path) -> None:
    path = _workflow(tmp_path)
    assert CliRunner().invoke(app, ["run", str(path), "--quiet"]).exit_code == 0
    data = yaml.safe_load(path.read_text())
    data["archive"]["fields"] = ["uu"]
    data["compress"]["rank"] = 2
    path.write_text(yaml.safe_dump(data))
    result = CliRunner().invoke(app, ["run", str(path)])
    assert result.exit_code == 2
    assert "archive field 'uu' not found" in result.output and "different workflow" not in result.output
