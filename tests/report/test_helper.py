"""The report helper of ``snaplift run``: the same page as drawn in process, and no process or
half-written report left behind whether it answers, waits or is stopped while it draws."""

from __future__ import annotations

import os
import shutil
import subprocess
import sys
import time
from pathlib import Path

import psutil
import pytest
import yaml

from snaplift.report import helper as helper_module
from snaplift.report.helper import ReportHelper, start_for
from snaplift.report.page import render_report, report_folder
from snaplift.workflow import runner


def _copy(store: Path, folder: Path) -> Path:
    target = folder / store.name
    shutil.copytree(store, target)
    return target


def _leftovers(folder: Path) -> list[str]:
    return sorted(p.name for p in folder.iterdir() if ".staging-" in p.name)


def test_helper_draws_the_page_drawn_in_process(wave_stores: dict[str, Path], tmp_path: Path) -> None:
    store = _copy(wave_stores["rank6"], tmp_path)
    expected = render_report(store, tmp_path / "in-process")
    helper = ReportHelper.start()
    assert helper is not None
    try:
        answer = helper.render(store)
    finally:
        helper.close()
    assert answer is not None and "warning" not in answer, answer
    assert Path(answer["index"]) == report_folder(store) / "index.html"
    assert answer["figures"] == list(expected.figures)  # same figures, same order
    assert answer["read"] == expected.archive_values_read
    for name in expected.figures:  # the Agg canvas draws the same pixels in either process
        drawn = (report_folder(store) / f"{name}.png").read_bytes()
        assert drawn == (tmp_path / "in-process" / f"{name}.png").read_bytes(), name
    assert helper.process.returncode == 0
    assert _leftovers(tmp_path) == []


def test_helper_stopped_while_it_waits(tmp_path: Path) -> None:
    helper = ReportHelper.start()
    assert helper is not None
    helper.close()  # never asked: killed, it had written nothing
    assert helper.process.returncode is not None
    assert not psutil.pid_exists(helper.process.pid) or psutil.Process(helper.process.pid).status() == "zombie"


def test_helper_stopped_while_it_draws(wave_stores: dict[str, Path], tmp_path: Path) -> None:
    # Ctrl-C in the run while the helper draws: SIGTERM, the helper removes its staging folder
    store = _copy(wave_stores["rank6"], tmp_path)
    helper = ReportHelper.start()
    assert helper is not None and helper.process.stdin is not None
    helper.process.stdin.write(f'{{"store": "{store}"}}\n'.encode())
    helper.process.stdin.flush()
    helper.state = "drawing"
    time.sleep(1.0)  # somewhere in its imports, warm-up or figures
    helper.close()
    assert helper.process.returncode is not None
    folder = report_folder(store)
    # whole or absent: never a staging folder left, never a page without its marker
    assert _leftovers(tmp_path) == []
    assert not folder.exists() or (folder / "index.html").is_file() and (folder / "snaplift-report.json").is_file()


def test_a_helper_that_died_leaves_the_report_to_the_run(wave_stores: dict[str, Path], tmp_path: Path) -> None:
    store = _copy(wave_stores["rank6"], tmp_path)
    helper = ReportHelper.start()
    assert helper is not None
    helper.process.kill()
    helper.process.wait()
    said: list[str] = []
    try:
        page = runner._write_report(store, said.append, helper)
    finally:
        helper.close()
    assert page == report_folder(store) / "index.html" and page.is_file()
    assert said and said[0].startswith("report:")


def test_which_runs_get_a_helper(tmp_path: Path, monkeypatch: pytest.MonkeyPatch) -> None:
    (tmp_path / "a.h5").write_bytes(b"\0" * 1000)
    started: list[bool] = []
    monkeypatch.setattr(ReportHelper, "start", classmethod(lambda cls: started.append(True) or "helper"))
    monkeypatch.delenv(helper_module.HELPER_VARIABLE, raising=False)
    monkeypatch.setattr(helper_module, "idle_core", lambda: True)

    def helper_for(**sections) -> object:
        data = {"archive": {"path": "a.h5", "fields": ["u"]}, **sections}
        (tmp_path / "w.yaml").write_text(yaml.safe_dump(data))
        return start_for(tmp_path / "w.yaml")

    assert helper_for() == "helper"  # report on by default, a small archive
    assert helper_for(output={"path": "r.zarr", "report": False}) is None
    monkeypatch.setattr(helper_module, "HELPER_ARCHIVE_BYTES", 999)
    assert helper_for() is None  # beyond the size the helper pays for
    monkeypatch.setattr(helper_module, "HELPER_ARCHIVE_BYTES", 10**6)
    (tmp_path / "w.yaml").write_text("archive: [unclosed")
    assert start_for(tmp_path / "w.yaml") is None  # the run itself says what is wrong
    monkeypatch.setattr(helper_module, "idle_core", lambda: False)
    assert helper_for() is None  # a busy machine: no core for the helper to use
    monkeypatch.setenv(helper_module.HELPER_VARIABLE, "1")
    assert helper_for() == "helper"  # unless asked for (benchmarks)
    monkeypatch.setenv(helper_module.HELPER_VARIABLE, "0")
    monkeypatch.setattr(helper_module, "idle_core", lambda: True)
    assert helper_for() is None
    assert started == [True, True]


def test_snaplift_run_leaves_no_helper_behind(wave_stores: dict[str, Path], tmp_path: Path) -> None:
    shutil.copy(wave_stores["archive"], tmp_path / "waves.h5")
    workflow = {"archive": {"path": "waves.h5", "fields": ["p"], "time": "t", "snapshots": {"stop": 30}},
                "compress": {"method": "tsqr", "rank": 4}, "output": {"path": "r.zarr"}, "cluster": "threads"}
    (tmp_path / "w.yaml").write_text(yaml.safe_dump(workflow))
    mark = f"{os.getpid()}-{time.time()}"
    env = {**os.environ, helper_module.HELPER_VARIABLE: "1", "SNAPLIFT_TEST_MARK": mark}  # whatever the load
    done = subprocess.run([str(Path(sys.executable).parent / "snaplift"), "run", str(tmp_path / "w.yaml"), "--quiet"],
                          capture_output=True, text=True, env=env, timeout=300)
    assert done.returncode == 0, done.stderr
    assert (tmp_path / "r.zarr.report" / "index.html").is_file()
    assert _leftovers(tmp_path) == []
    assert done.stdout.strip() == str(tmp_path / "r.zarr")

    def ours(process: psutil.Process) -> bool:
        try:
            return process.environ().get("SNAPLIFT_TEST_MARK") == mark
        except (psutil.Error, OSError):
            return False

    assert [p.pid for p in psutil.process_iter() if ours(p)] == []  # neither the helper nor its copy


def test_ctrl_c_while_the_report_is_drawn(wave_stores: dict[str, Path], tmp_path: Path,
                                          monkeypatch: pytest.MonkeyPatch) -> None:
    # the store is committed before the report: Ctrl-C then says so (not "nothing committed")
    from snaplift.report import page

    shutil.copy(wave_stores["archive"], tmp_path / "waves.h5")
    workflow = {"archive": {"path": "waves.h5", "fields": ["p"], "time": "t", "snapshots": {"stop": 30}},
                "compress": {"method": "tsqr", "rank": 4}, "output": {"path": "r.zarr"}, "cluster": "threads"}
    (tmp_path / "w.yaml").write_text(yaml.safe_dump(workflow))

    def interrupted(*args, **kwargs):
        raise KeyboardInterrupt

    monkeypatch.setattr(page, "render_report", interrupted)
    with pytest.raises(runner.ReportInterrupted, match="r.zarr is complete; run 'snaplift report"):
        runner.run_workflow(tmp_path / "w.yaml")
    assert (tmp_path / "r.zarr" / "zarr.json").is_file()
    assert not (tmp_path / "r.zarr.report").exists() and not (tmp_path / "r.zarr.staging").exists()
    assert _leftovers(tmp_path) == []
