"""The workflow schema: examples stay valid, errors name the key, value and what is allowed."""

from __future__ import annotations

from pathlib import Path

import pytest
import yaml

from snaplift.errors import ConfigError
from snaplift.units import parse_bytes
from snaplift.workflow.schema import ClusterSection, load_workflow, parse_workflow

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


# -- cluster profiles -------------------------------------------------------------------

PROFILES = sorted((ROOT / "configs").glob("*.yaml"))


def test_every_kind_has_an_example_profile() -> None:
    kinds = {yaml.safe_load(p.read_text()).get("kind", "local") for p in PROFILES}
    assert {"threads", "local", "slurm", "pbs", "allocation"} <= kinds


@pytest.mark.parametrize("path", PROFILES, ids=lambda p: p.name)
def test_profiles_by_name_and_file_in_a_workflow(path: Path, tmp_path: Path) -> None:
    workflow_file = ROOT / "workflows" / "fin-duct.yaml"
    data = yaml.safe_load(workflow_file.read_text())
    by_name = parse_workflow({**data, "cluster": path.stem}, folder=workflow_file.parent)
    assert by_name.cluster.profile == str(path)
    by_file = parse_workflow({**data, "cluster": f"../configs/{path.name}"}, folder=workflow_file.parent)
    assert by_file.cluster == by_name.cluster
    with_override = parse_workflow({**data, "cluster": {"profile": path.stem, "start_timeout": 5}},
                                   folder=workflow_file.parent)
    assert with_override.cluster.start_timeout == 5
    assert with_override.cluster.kind == by_name.cluster.kind


def test_profile_found_through_environment(tmp_path: Path, monkeypatch: pytest.MonkeyPatch) -> None:
    (tmp_path / "site.yaml").write_text("kind: slurm\ncores: 4\nmemory: 8GiB\nqueue: long\n")
    monkeypatch.setenv("SNAPLIFT_PROFILES", str(tmp_path))
    data = _base()
    data["cluster"] = {"profile": "site", "queue": "short"}
    cluster = parse_workflow(data).cluster
    assert (cluster.kind, cluster.queue, cluster.cores) == ("slurm", "short", 4)


def test_unknown_profile_lists_kinds_and_profiles() -> None:
    data = _base()
    data["cluster"] = "nowhere"
    with pytest.raises(ConfigError, match=r"cluster profile 'nowhere' not found; kinds: threads, local, .*"):
        parse_workflow(data, folder=ROOT / "workflows")


def test_cluster_key_of_another_kind_is_an_error() -> None:
    data = _base()
    data["cluster"] = {"kind": "local", "queue": "short"}
    expected = r"cluster.queue does not apply to kind 'local'; it applies to kinds slurm, pbs"
    with pytest.raises(ConfigError, match=expected):
        parse_workflow(data)


def test_batch_kinds_need_cores_memory_and_a_lifetime_below_walltime() -> None:
    data = _base()
    data["cluster"] = {"kind": "slurm", "cores": 4}
    with pytest.raises(ConfigError, match="needs cluster.cores and cluster.memory"):
        parse_workflow(data)
    data["cluster"] = {"kind": "pbs", "cores": 4, "memory": "8GiB", "walltime": "01:00:00", "worker_lifetime": "1h"}
    with pytest.raises(ConfigError, match="worker_lifetime .* must be shorter than the walltime"):
        parse_workflow(data)
    data["cluster"] = {"kind": "address"}
    with pytest.raises(ConfigError, match="needs cluster.address"):
        parse_workflow(data)


def test_durations_and_walltimes() -> None:
    from snaplift.units import parse_duration, parse_walltime

    assert parse_duration("1h30m") == 5400.0 and parse_duration("90s") == 90.0 and parse_duration(12) == 12.0
    assert parse_walltime("02:00:00") == 7200.0 and parse_walltime("1-00:30:00") == 88200.0
    assert parse_walltime("45:00") == 2700.0
    with pytest.raises(ValueError, match="not a duration"):
        parse_duration("soon")
    with pytest.raises(ValueError, match="not HH:MM:SS"):
        parse_walltime("2h")


def test_fit_keys() -> None:
    data = _base()
    data["fit"] = {"rank": {"energy": 0.99}, "debias": "forward-backward", "holdout": 0.1}
    assert parse_workflow(data).fit.rank_argument() == 0.99
    data["fit"] = {"rank": "optimal"}
    assert parse_workflow(data).fit.rank_argument() == "optimal"
    data["fit"] = {"rank": 0}
    with pytest.raises(ConfigError, match="fit.rank"):
        parse_workflow(data)
    data["fit"] = {"method": "edmd"}
    with pytest.raises(ConfigError, match="fit.method edmd needs a dictionary in lift"):
        parse_workflow(data)
    data["fit"] = {"method": "dmd", "coefficients": 4}
    with pytest.raises(ConfigError, match="coefficients applies to methods 'edmd' and 'optimized'"):
        parse_workflow(data)
    data["fit"] = {"debias": "both"}
    with pytest.raises(ConfigError, match="fit.debias"):
        parse_workflow(data)


def test_rbf_function_key_and_the_old_shape_key_refused() -> None:
    data = _base()
    data["fit"] = {"method": "edmd"}
    data["lift"] = [{"kind": "rbf", "function": "thin_plate", "on": "coefficients"}]
    assert parse_workflow(data).lift[0].function == "thin_plate"
    data["lift"] = [{"kind": "rbf", "shape": "thin_plate", "on": "coefficients"}]
    with pytest.raises(ConfigError, match="'shape'.*is now 'function'.*function: thin_plate"):
        parse_workflow(data)


def test_archive_time_unit_and_coords_keys() -> None:
    data = _base()
    data["archive"] = {**data["archive"], "time_unit": "ms", "coords": {"x": "xc"}}
    section = parse_workflow(data).archive
    assert section.time_unit == "ms" and section.coords == {"x": "xc"}
    data["archive"]["time_unit"] = "fortnight"
    with pytest.raises(ConfigError, match="archive.time_unit"):
        parse_workflow(data)
