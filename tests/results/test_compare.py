"""snaplift compare: two ranks of one analytic archive share their leading modes."""

from __future__ import annotations

import json
from pathlib import Path

import numpy as np
import pytest
from typer.testing import CliRunner

from snaplift.cli import app
from snaplift.errors import ConfigError
from snaplift.results.compare import compare_stores, modal_assurance

runner = CliRunner()


def test_modal_assurance_criterion() -> None:
    # MAC (Allemang & Brown 1982): 1 for shapes equal up to a complex factor, 0 for orthogonal ones
    rng = np.random.default_rng(3)
    a = rng.standard_normal(50) + 1j * rng.standard_normal(50)
    assert modal_assurance(a, (2.0 - 3.0j) * a) == pytest.approx(1.0, abs=1e-14)
    b = rng.standard_normal(50)
    b_orthogonal = b - np.vdot(a.real, b) / np.vdot(a.real, a.real) * a.real
    assert modal_assurance(a.real, b_orthogonal) == pytest.approx(0.0, abs=1e-14)
    # the weighted form equals the plain one on sqrt(w)-scaled shapes (definition)
    w = rng.uniform(0.5, 2.0, 50)
    assert modal_assurance(a, b, w) == pytest.approx(modal_assurance(np.sqrt(w) * a, np.sqrt(w) * b), rel=1e-12)
    # NaN (masked) points are left out
    a_masked = a.copy()
    a_masked[:5] = np.nan
    assert modal_assurance(a_masked, a) == pytest.approx(1.0, abs=1e-14)


def test_two_ranks_of_one_archive(wave_stores: dict[str, Path]) -> None:
    result = compare_stores(wave_stores["rank6"], wave_stores["rank4"])
    assert sorted(result["fields"]) == ["p", "u", "w"]
    # the rank-4 fit holds the two strongest waves: 4 eigenvalues matched, the weakest pair only in A
    assert len(result["matched"]) == 4
    assert result["only_b"] == []
    only_a = sorted(abs(r["frequency"]) for r in result["only_a"])
    # the third wave: omega = 4.7 rad/s -> 4.7 / (2 pi) Hz (the archive's exact eigenvalue)
    np.testing.assert_allclose(only_a, [4.7 / (2 * np.pi)] * 2, rtol=1e-9)
    for match in result["matched"]:
        for field, mac in match["mac"].items():
            assert mac > 0.999, (field, match)  # the criterion for shared modes
        # same wave in both: frequencies agree to well under the frequency resolution 1/span
        assert abs(match["frequency_difference"]) < 1e-3 / (6.0)
        assert np.sign(match["frequency_a"]) == np.sign(match["frequency_b"])
    frequencies = sorted(abs(m["frequency_a"]) for m in result["matched"])
    np.testing.assert_allclose(frequencies, np.repeat([2.0, 3.1], 2) / (2 * np.pi), rtol=1e-9)


def test_compare_command(wave_stores: dict[str, Path]) -> None:
    out = runner.invoke(app, ["compare", str(wave_stores["rank6"]), str(wave_stores["rank4"]), "--json"])
    assert out.exit_code == 0, out.output
    data = json.loads(out.output)
    assert len(data["matched"]) == 4 and len(data["only_a"]) == 2
    table = runner.invoke(app, ["compare", str(wave_stores["rank6"]), str(wave_stores["rank4"])])
    assert table.exit_code == 0 and "MAC u" in table.output and "modes only A has (2)" in table.output
    # a store compared with itself matches every mode with MAC 1
    same = compare_stores(wave_stores["rank4"], wave_stores["rank4"])
    assert [(m["a"], m["b"]) for m in same["matched"]] == [(k, k) for k in range(4)]
    assert all(v == pytest.approx(1.0, abs=1e-12) for m in same["matched"] for v in m["mac"].values())


def test_compare_errors(wave_stores: dict[str, Path], tmp_path: Path) -> None:
    with pytest.raises(ConfigError, match="--tolerance must be > 0"):
        compare_stores(wave_stores["rank6"], wave_stores["rank4"], tolerance=0)
    out = runner.invoke(app, ["compare", str(wave_stores["rank6"]), str(tmp_path / "missing.zarr")])
    assert out.exit_code == 2 and "missing.zarr does not exist" in out.output and "Traceback" not in out.output


def _wave_store(folder: Path, scale: float, unit: str, origin: float = 0.0) -> Path:
    """A growing travelling wave (2 Hz, 0.1 1/s) over a steady 300 K, time stored as ``scale x seconds``."""
    import h5py
    import yaml

    from snaplift.workflow.runner import run_workflow

    folder.mkdir()
    t = 0.05 * np.arange(40)
    x = np.linspace(0.0, 0.3, 16, endpoint=False)
    values = 300.0 + 5.0 * np.exp(0.1 * t)[:, None] * np.cos(2 * np.pi * x[None, :] / 0.3 - 4 * np.pi * t[:, None])
    with h5py.File(folder / "a.h5", "w") as h5:
        h5["t"] = scale * t
        h5["t"].attrs["units"] = unit
        h5.create_dataset("T", data=values, chunks=(1, 16))
        h5["xc"] = origin + x
    workflow = {"archive": {"path": "a.h5", "fields": ["T"], "time": "t", "coords": {"x": "xc"}},
                "compress": {"method": "tsqr", "rank": 3}, "fit": {"rank": 3}, "output": {"path": "r.zarr"},
                "cluster": "threads"}
    (folder / "w.yaml").write_text(yaml.safe_dump(workflow))
    return run_workflow(folder / "w.yaml").path


def test_stores_in_seconds_and_milliseconds_match(tmp_path: Path) -> None:
    # one data set with its time in s and in ms: the stored rates are both in 1/s, so every
    # mode matches with zero difference (the rates must not be converted a second time)
    seconds = _wave_store(tmp_path / "s", 1.0, "s")
    milliseconds = _wave_store(tmp_path / "ms", 1000.0, "ms")
    result = compare_stores(seconds, milliseconds)
    assert result["units"] == {"frequency": "Hz", "growth": "1/s"}
    assert [(m["a"], m["b"]) for m in result["matched"]] == [(k, k) for k in range(3)]
    assert result["only_a"] == [] and result["only_b"] == []
    # the data's own wave: 2 Hz, growth 0.1 1/s (analytic), equal in both to round-off
    assert sorted(abs(m["frequency_a"]) for m in result["matched"]) == pytest.approx([0.0, 2.0, 2.0], abs=1e-9)
    for match in result["matched"]:
        assert abs(match["frequency_difference"]) < 1e-9 and abs(match["growth_difference"]) < 1e-9
        assert match["mac"]["T"] == pytest.approx(1.0, abs=1e-12)  # MAC of a shape with itself (definition)


def test_grids_of_one_size_over_other_regions_get_no_mac(tmp_path: Path) -> None:
    # the same values on a grid of the same size moved by 1 m: not the same grid, so no MAC
    here = _wave_store(tmp_path / "here", 1.0, "s")
    there = _wave_store(tmp_path / "there", 1.0, "s", origin=1.0)
    result = compare_stores(here, there)
    assert result["fields_on_other_grids"] == ["T"]
    assert len(result["matched"]) == 3 and all(m["mac"]["T"] is None for m in result["matched"])
    assert compare_stores(here, here)["fields_on_other_grids"] == []
