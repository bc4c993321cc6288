"""The example workflows in workflows/ run on the (small) demo archive and agree on the shedding.

Consistency, not a published reference: lifting the fields (pointwise terms, delays) or
fitting EDMD to a dictionary of the coefficients must keep the dominant shedding
frequency of plain DMD (within 2 % for the lifted fields, 5 % for EDMD; common practice for a frequency read off a short
record of ~15 periods: the periodogram bin is ~1/15 of the frequency).
"""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pytest
import yaml

from snaplift.demo.fin_duct import generate_fin_duct
from snaplift.results.store import read_group
from snaplift.workflow.runner import run_workflow

ROOT = Path(__file__).resolve().parents[2]


@pytest.fixture(scope="module")
def folder(tmp_path_factory) -> Path:
    where = tmp_path_factory.mktemp("examples")
    generate_fin_duct(where / "fin-duct.h5", size="small")
    return where


def _run(folder: Path, name: str) -> Path:
    data = yaml.safe_load((ROOT / "workflows" / name).read_text())
    data["output"] = {"path": f"{name}.zarr"}
    path = folder / name
    path.write_text(yaml.safe_dump(data))
    return run_workflow(path).path


def _dominant(store: Path) -> float:
    spectrum = read_group(store, "spectrum")
    oscillating = np.abs(spectrum["frequency"]) > 0
    k = int(np.argmax(np.where(oscillating, np.abs(spectrum["amplitude"]), -1.0)))
    return float(abs(spectrum["frequency"][k]))


def test_lifted_and_edmd_examples_keep_the_shedding_frequency(folder: Path) -> None:
    plain = _dominant(_run(folder, "fin-duct.yaml"))
    lifted = _run(folder, "fin-duct-lifted.yaml")
    assert abs(_dominant(lifted) - plain) <= 0.02 * plain
    assert {"T", "T_square", "u"} <= set(read_group(lifted, "modes"))
    edmd = _run(folder, "fin-duct-edmd.yaml")
    frequency = np.abs(read_group(edmd, "spectrum")["frequency"])
    # a monomial dictionary of a limit cycle is not invariant: its spectrum is approximate
    # (Williams et al. 2015 discuss the truncation error); 5 % here, common practice
    assert np.min(np.abs(frequency - plain)) <= 0.05 * plain
    assert read_group(edmd, "eigenfunctions")["value"].shape[0] == frequency.size


def test_demo_links_the_archive_where_the_examples_expect_it(tmp_path: Path) -> None:
    from snaplift.demo.run import link_archive
    from snaplift.errors import ConfigError

    archive = tmp_path / "cache" / "fin-duct-small.h5"
    archive.parent.mkdir()
    archive.write_bytes(b"stand-in")
    examples = tmp_path / "workflows"
    examples.mkdir()
    for name in ("fin-duct.yaml", "fin-duct-lifted.yaml", "fin-duct-edmd.yaml"):
        text = (ROOT / "workflows" / name).read_text()
        assert yaml.safe_load(text)["archive"]["path"] == "fin-duct.h5"
        assert "--workflow-dir" in text  # the comment says how to get the archive there
    link = link_archive(archive, examples)
    assert link == examples / "fin-duct.h5" and link.resolve() == archive.resolve()
    assert link_archive(archive, examples).read_bytes() == b"stand-in"  # again: replaced
    other = tmp_path / "other"
    other.mkdir()
    (other / "fin-duct.h5").write_bytes(b"user data")
    with pytest.raises(ConfigError, match="not a link"):
        link_archive(archive, other)
    assert (other / "fin-duct.h5").read_bytes() == b"user data"
