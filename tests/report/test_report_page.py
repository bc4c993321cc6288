"""snaplift report: the page, its figures and its cautions, drawn from a store fitted to analytic waves."""

from __future__ import annotations

import re
import shutil
import warnings
from pathlib import Path

import matplotlib.image
import numpy as np
import pytest
import yaml
import zarr
from typer.testing import CliRunner

from snaplift.cli import app
from snaplift.errors import ResultStoreError
from snaplift.report.page import MARKER, render_report, report_folder
from snaplift.workflow.runner import run_workflow

runner = CliRunner()
FIGURES = {"energy", "eigenvalues", "spectrum", "modes_u", "modes_p", "modes_w", "errors", "forecast"}


def test_run_leaves_a_report_next_to_the_store(wave_stores: dict[str, Path]) -> None:
    # the report stage of `snaplift run` writes RESULT.report/ (fixture stores come from run_workflow)
    folder = report_folder(wave_stores["rank6"])
    assert folder == wave_stores["rank6"].with_name("rank6.zarr.report")
    assert (folder / "index.html").is_file() and (folder / MARKER).is_file()


def test_run_report_switch(wave_stores: dict[str, Path], tmp_path: Path) -> None:
    # output.report: false leaves the store alone; the default draws RESULT.report/ after the commit
    shutil.copy(wave_stores["archive"], tmp_path / "waves.h5")
    for name, switch in (("off", False), ("on", True)):
        workflow = {"archive": {"path": "waves.h5", "fields": ["p"], "time": "t", "snapshots": {"stop": 30}},
                    "compress": {"method": "tsqr", "rank": 4}, "output": {"path": f"{name}.zarr", "report": switch},
                    "cluster": "threads"}
        (tmp_path / f"{name}.yaml").write_text(yaml.safe_dump(workflow))
        summary = run_workflow(tmp_path / f"{name}.yaml")
        assert summary.path.is_dir()
        assert (summary.report is not None) == switch
        assert (tmp_path / f"{name}.zarr.report" / "index.html").is_file() == switch
    out = runner.invoke(app, ["run", str(tmp_path / "on.yaml"), "--overwrite"])
    assert out.exit_code == 0 and "report:" in out.output and "index.html" in out.output


def test_page_is_self_contained_with_every_figure(wave_stores: dict[str, Path], tmp_path: Path) -> None:
    summary = render_report(wave_stores["rank6"], tmp_path / "page")
    assert set(summary.figures) == FIGURES  # 1-D (p), 2-D (u) and 3-D (w, mid-planes) fields
    text = summary.index.read_text()
    # every figure embedded (no file or network needed to see it) and also written as a PNG
    embedded = re.findall(r"src='data:image/png;base64,", text)
    assert len(embedded) == len(FIGURES)
    assert not re.search(r"(src|href)=['\"](https?:)?//", text)
    for name in FIGURES:
        image = matplotlib.image.imread(tmp_path / "page" / f"{name}.png")
        assert image.shape[0] > 200 and image.shape[1] > 400
        assert np.std(image[..., :3]) > 0.05, name  # not a blank canvas
    # the cautions, in plain words
    assert "valid only near the data it was fitted on" in text
    assert "licensed engineering judgement" in text and "applicable codes" in text
    # provenance: archive, workflow text, versions, passes
    assert "waves.h5" in text and "method: tsqr" in text  # the workflow text
    assert "versions" in text and "numpy" in text and "pass(es) over the archive" in text
    # the probe forecast read the archive
    assert summary.archive_values_read > 0


def test_report_without_the_archive(wave_stores: dict[str, Path], tmp_path: Path) -> None:
    store = tmp_path / "moved.zarr"
    shutil.copytree(wave_stores["rank4"], store, ignore=shutil.ignore_patterns("*.report"))
    root = zarr.open_group(str(store), mode="r+")
    root.attrs["archive"] = str(tmp_path / "gone.h5")
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        zarr.consolidate_metadata(str(store))
    summary = render_report(store)
    assert summary.archive_values_read == 0 and "forecast" in summary.figures
    assert (tmp_path / "moved.zarr.report" / "index.html").is_file()


def test_report_command_and_foreign_folder(wave_stores: dict[str, Path], tmp_path: Path) -> None:
    out = runner.invoke(app, ["report", str(wave_stores["rank4"]), "--out", str(tmp_path / "r"), "--modes", "2"])
    assert out.exit_code == 0, out.output
    assert "index.html" in out.output and "figures" in out.output
    foreign = tmp_path / "mine"
    foreign.mkdir()
    (foreign / "notes.txt").write_text("keep")
    with pytest.raises(ResultStoreError, match="is not a snaplift report"):
        render_report(wave_stores["rank4"], foreign)
    assert (foreign / "notes.txt").read_text() == "keep"
    bad = runner.invoke(app, ["report", str(tmp_path / "none.zarr")])
    assert bad.exit_code == 2 and "does not exist" in bad.output and "Traceback" not in bad.output


def test_probe_fields_are_fields_of_the_report(tmp_path: Path) -> None:
    # two sensor signals (one value per snapshot): their modes are stored as (mode,) arrays and
    # must be read as fields, drawn as one-point bars and forecast at their single point.
    # Analytic signals: x = cos(2 pi f t), y = sin(2 pi f t + 0.4) with f = 0.7 (invented probe data)
    import h5py

    from snaplift.results.reading import open_store

    t = 0.05 * np.arange(400)
    with h5py.File(tmp_path / "probes.h5", "w") as h5:
        h5["x"] = np.cos(2 * np.pi * 0.7 * t)
        h5["y"] = np.sin(2 * np.pi * 0.7 * t + 0.4)
    workflow = {"archive": {"path": "probes.h5", "fields": ["x", "y"], "step": 0.05},
                "lift": [{"kind": "delays", "count": 4}], "compress": {"method": "tsqr", "rank": 2},
                "output": {"path": "p.zarr", "report": False}, "cluster": "threads"}
    (tmp_path / "p.yaml").write_text(yaml.safe_dump(workflow))
    store = run_workflow(tmp_path / "p.yaml").path
    view = open_store(store)
    assert view.fields == ["x", "y"]  # the frequency stored beside them is not a field
    summary = render_report(store, tmp_path / "page")
    assert {"modes_points", "forecast"} <= set(summary.figures)
    text = summary.index.read_text()
    assert "fields x, y" in text
    # one sinusoid: the leading pair sits at 0.7 per time unit (the archive gives no time unit)
    frequency = np.abs(np.asarray(view.spectrum["frequency"].values[:2]))
    np.testing.assert_allclose(frequency, 0.7, rtol=1e-6)


def test_probe_reads_beyond_the_budget_are_skipped(wave_stores: dict[str, Path], tmp_path: Path,
                                                   monkeypatch: pytest.MonkeyPatch) -> None:
    # the archive values at the probe points would touch more stored chunks than the budget:
    # the forecast is compared with the projection on the basis only, and the page says why
    from snaplift.report import page

    monkeypatch.setattr(page, "PROBE_READ_BYTES", 1)
    text = render_report(wave_stores["rank6"], tmp_path / "page").index.read_text()
    assert "read budget" in text and "(0 values read from the archive" in text
    monkeypatch.setattr(page, "PROBE_READ_BYTES", 64 * 2**20)
    text = render_report(wave_stores["rank6"], tmp_path / "again").index.read_text()
    assert "read budget" not in text and "(0 values read" not in text
