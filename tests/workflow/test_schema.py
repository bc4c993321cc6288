"""The workflow schema: examples stay valid, errors name the key, value and what is allowed."""

from __future__ import annotations

from pathlib import Path

import pytest
import yaml

from snaplift.errors import ConfigError
from snaplift.workflow.schema import ClusterSection, load_workflow, parse_bytes, parse_workflow

ROOT = Path(__file__).resolve().parents[2]


@pytest.mark.parametrize("path", sorted((ROOT / "workflows").glob("*.yaml")), ids=lambda p: p.name)
def test_example_workflows_validate(path: Path) -> None:
    workflow, text, folder = load_workflow(path)
    assert workflow.archive.fields
    assert folder == path.parent


@pytest.mark.parametrize("path", sorted((ROOT / "configs").glob("*.yaml")), ids=lambda p: p.name)
def test_cluster_profiles_validate(path: Path) -> None:
    ClusterSection.model_validate(yaml.safe_load(path.read_text()))


def test_packaged_demo_workflow_is_the_example() -> None:
    packaged = ROOT / "src" / "snaplift" / "demo" / "fin-duct.yaml"
    assert packaged.read_text() == (ROOT / "workflows" / "fin-duct.yaml").read_text()


def _base() -> dict:
    return {"archive": {"path": "a.h5", "fields": ["u"], "step": 0.1}}


def test_unknown_key_names_key_and_allowed_keys() -> None:
    data = _base()
    data["compress"] = {"rnak": 3}
    with pytest.raises(ConfigError, match=r"compress\.rnak: unknown key; allowed keys: .*rank"):
        parse_workflow(data)


def test_wrong_value_names_key_value_and_choices() -> None:
    data = _base()
    data["prepare"] = {"scale": "rmss"}
    with pytest.raises(ConfigError) as info:
        parse_workflow(data)
    message = str(info.value)
    assert "prepare.scale" in message and '"rmss"' in message and "rms" in message
    assert "\n" not in message


def test_time_and_step_are_exclusive() -> None:
    data = _base()
    data["archive"]["time"] = "t"
    with pytest.raises(ConfigError, match="either 'time'"):
        parse_workflow(data)


def test_fit_rank_cannot_exceed_compress_rank() -> None:
    data = _base()
    data["compress"] = {"rank": 5}
    data["fit"] = {"rank": 6}
    with pytest.raises(ConfigError, match=r"fit.rank \(6\) cannot exceed compress.rank \(5\)"):
        parse_workflow(data)


def test_scale_mapping_must_cover_fields() -> None:
    data = _base()
    data["prepare"] = {"scale": {"v": 2.0}}
    with pytest.raises(ConfigError, match=r"missing \['u'\], unknown \['v'\]"):
        parse_workflow(data)


def test_cluster_by_name() -> None:
    data = _base()
    data["cluster"] = "threads"
    assert parse_workflow(data).cluster.kind == "threads"


def test_sizes() -> None:
    assert parse_bytes("2GiB") == 2 * 2**30
    assert parse_bytes("500MB") == 500 * 10**6
    with pytest.raises(ValueError, match="not a size"):
        parse_bytes("lots")


def test_bad_yaml_names_line(tmp_path: Path) -> None:
    path = tmp_path / "w.yaml"
    path.write_text("archive: [\n  path: x\n")
    with pytest.raises(ConfigError, match=r"w.yaml line \d+, column \d+ is not valid YAML"):
        load_workflow(path)
