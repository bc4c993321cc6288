"""Cluster profiles: the ``cluster:`` section given by name, by file, or inline.

Forms accepted in a workflow file::

    cluster: local                         # a kind with its defaults (threads, local, allocation ...)
    cluster: configs/slurm-example.yaml     # a profile file, relative to the workflow file
    cluster: slurm-example                  # a profile name, looked up as <name>.yaml (below)
    cluster: {profile: slurm-example, workers: 16}   # a profile with keys overridden
    cluster: {kind: slurm, queue: short, cores: 8, memory: 32GiB}   # all inline

A profile name is looked up, in order, in the folders of ``$SNAPLIFT_PROFILES``
(separated like ``PATH``), ``configs/`` beside the workflow file, ``configs/`` in the
workflow file's parent folder (the repository layout: ``workflows/`` and ``configs/`` are
siblings) and ``configs/`` in the current folder. A profile file holds the keys of the
``cluster`` section (:class:`snaplift.workflow.schema.ClusterSection`) and nothing else.
The loader records where the settings came from in ``cluster.profile``; a profile file
without ``kind`` means ``kind: local``. A mapping that has both ``kind`` and ``profile``
is taken as inline settings (``profile`` is then only a label).
"""

from __future__ import annotations

import os
from pathlib import Path
from typing import Any

import yaml

from snaplift.errors import ConfigError

__all__ = ["KINDS", "find_profile", "profile_folders", "resolve_cluster"]

KINDS = ("threads", "local", "address", "slurm", "pbs", "allocation")


def profile_folders(folder: Path | None) -> list[Path]:
    """Where profile names are looked up, in order."""
    found: list[Path] = []
    for entry in os.environ.get("SNAPLIFT_PROFILES", "").split(os.pathsep):
        if entry:
            found.append(Path(entry).expanduser())
    if folder is not None:
        found += [folder / "configs", folder.parent / "configs"]
    found.append(Path.cwd() / "configs")
    unique: list[Path] = []
    for path in found:
        if path not in unique:
            unique.append(path)
    return unique


def find_profile(reference: str, folder: Path | None) -> Path:
    """The file a profile reference names: a path to a YAML file, or a profile name."""
    candidate = Path(reference).expanduser()
    if candidate.suffix in (".yaml", ".yml"):
        path = candidate if candidate.is_absolute() else (folder or Path.cwd()) / candidate
        if not path.is_file():
            raise ConfigError(f"cluster profile file {path} does not exist")
        return path.resolve()
    searched = profile_folders(folder)
    for base in searched:
        for suffix in (".yaml", ".yml"):
            path = base / f"{reference}{suffix}"
            if path.is_file():
                return path.resolve()
    names = sorted({p.stem for base in searched if base.is_dir() for p in base.glob("*.y*ml")})
    raise ConfigError(
        f"cluster profile {reference!r} not found; kinds: {', '.join(KINDS)}; profiles in "
        f"{', '.join(str(b) for b in searched)}: {', '.join(names) or '(none)'}"
    )


def _read_profile(path: Path) -> dict[str, Any]:
    try:
        data = yaml.safe_load(path.read_text())
    except OSError as error:
        raise ConfigError(f"cannot read cluster profile {path}: {error.strerror}") from None
    except yaml.YAMLError as error:
        raise ConfigError(f"cluster profile {path} is not valid YAML: {getattr(error, 'problem', error)}") from None
    if not isinstance(data, dict):
        raise ConfigError(f"cluster profile {path} must be a mapping of cluster keys, got {type(data).__name__}")
    if "profile" in data:
        raise ConfigError(f"cluster profile {path}: a profile cannot name another profile (key 'profile')")
    return data


def resolve_cluster(value: Any, folder: Path | None) -> Any:
    """Turn a ``cluster:`` value into inline settings (a mapping), reading profile files.

    Values that are neither strings nor mappings are returned unchanged, so that the
    schema reports their type.

    Example
    -------
    >>> resolve_cluster("threads", None)
    {'kind': 'threads'}
    """
    if isinstance(value, str):
        if value in KINDS:
            return {"kind": value}
        path = find_profile(value, folder)
        return {"kind": "local", **_read_profile(path), "profile": str(path)}
    # a mapping that already has a kind is inline settings; its 'profile' only labels them
    # (this also makes resolving twice harmless)
    if isinstance(value, dict) and isinstance(value.get("profile"), str) and "kind" not in value:
        path = find_profile(value["profile"], folder)
        overrides = {k: v for k, v in value.items() if k != "profile"}
        return {"kind": "local", **_read_profile(path), **overrides, "profile": str(path)}
    return value
