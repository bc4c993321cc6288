"""The workflow file, validated in one place by frozen pydantic models.

Sections: ``archive``, ``prepare``, ``lift``, ``compress``, ``fit``, ``output``,
``cluster``. An unknown key, a wrong type or an impossible combination is a
:class:`~snaplift.errors.ConfigError` naming the key, the value given and what is allowed.
Relative paths resolve against the folder of the workflow file (see :func:`load_workflow`).
"""

from __future__ import annotations

import hashlib
import json
from pathlib import Path
from typing import Annotated, Any, Literal, Union

import yaml
from pydantic import BaseModel, ConfigDict, Field, ValidationError, field_validator, model_validator

from snaplift.errors import ConfigError

__all__ = [
    "Workflow",
    "ArchiveSection",
    "SnapshotRange",
    "PrepareSection",
    "CompressSection",
    "FitSection",
    "OutputSection",
    "ClusterSection",
    "load_workflow",
    "parse_workflow",
    "section_fingerprint",
]


class _Section(BaseModel):
    model_config = ConfigDict(extra="forbid", frozen=True)


class SnapshotRange(_Section):
    """Which snapshots to use: python-slice semantics over the archive's snapshot axis."""

    start: int = Field(0, ge=0)
    stop: int | None = Field(None, ge=1)
    every: int = Field(1, ge=1)

    @model_validator(mode="after")
    def _ordered(self) -> SnapshotRange:
        if self.stop is not None and self.stop <= self.start:
            raise ValueError(f"stop ({self.stop}) must be greater than start ({self.start})")
        return self


class ArchiveSection(_Section):
    path: str = Field(description="HDF5/netCDF-4 file, .zarr, .npy, or a glob of per-snapshot files")
    fields: list[str] = Field(min_length=1)
    time: str | None = Field(None, description="dataset holding the snapshot times")
    step: float | None = Field(None, gt=0, description="fixed time step when there is no time dataset")
    weights: str | None = Field(None, description="per-point weights dataset (cell areas/volumes)")
    mask: str | None = Field(None, description="boolean dataset, true = excluded point")
    snapshots: SnapshotRange = SnapshotRange()
    format: Literal["hdf5", "zarr", "series", "npy"] | None = None

    @model_validator(mode="after")
    def _time_source(self) -> ArchiveSection:
        if self.time is not None and self.step is not None:
            raise ValueError("give either 'time' (a dataset) or 'step' (a number), not both")
        if len(set(self.fields)) != len(self.fields):
            raise ValueError(f"fields must be distinct, got {self.fields}")
        return self


class PrepareSection(_Section):
    center: bool = False
    scale: Literal["none", "rms"] | dict[str, Annotated[float, Field(gt=0)]] = "rms"


class CompressSection(_Section):
    method: Literal["randomized", "sketch", "tsqr"] = "randomized"
    rank: int = Field(40, ge=1)
    oversample: int = Field(10, ge=0)
    power_iterations: int = Field(1, ge=0)
    seed: int = Field(0, ge=0)
    memory: str | int | None = Field(
        None, description="memory budget for tiles, e.g. '2GiB' (default: from the cluster)"
    )

    @field_validator("memory")
    @classmethod
    def _memory(cls, value: str | int | None) -> str | int | None:
        if value is not None:
            parse_bytes(value)
        return value

    @model_validator(mode="after")
    def _supported(self) -> CompressSection:
        if self.method != "randomized":
            raise NotImplementedError(
                f"compress.method {self.method!r} is not available in this version; "
                "use 'randomized'"
            )
        return self


class FitSection(_Section):
    method: Literal["dmd"] = "dmd"
    rank: int | None = Field(None, ge=1, description="second truncation of the coefficients")


class OutputSection(_Section):
    path: str = "results/snaplift.zarr"


class ClusterSection(_Section):
    kind: Literal["threads", "local"] = "local"
    workers: int | None = Field(None, ge=1)
    threads_per_worker: int | None = Field(None, ge=1)
    memory_per_worker: str | None = None


class Workflow(_Section):
    archive: ArchiveSection
    prepare: PrepareSection = PrepareSection()
    lift: list[dict[str, Any]] = Field(default_factory=list)
    compress: CompressSection = CompressSection()
    fit: FitSection = FitSection()
    output: OutputSection = OutputSection()
    cluster: ClusterSection = ClusterSection()

    @field_validator("cluster", mode="before")
    @classmethod
    def _cluster_name(cls, value: Any) -> Any:
        if isinstance(value, str):
            return {"kind": value}
        return value

    @field_validator("lift")
    @classmethod
    def _lift(cls, value: list[dict[str, Any]]) -> list[dict[str, Any]]:
        if value:
            raise NotImplementedError(
                "lift: dictionaries of observables are not available in this version; use lift: []"
            )
        return value

    @model_validator(mode="after")
    def _combinations(self) -> Workflow:
        if self.fit.rank is not None and self.fit.rank > self.compress.rank:
            raise ValueError(
                f"fit.rank ({self.fit.rank}) cannot exceed compress.rank ({self.compress.rank})"
            )
        if isinstance(self.prepare.scale, dict):
            missing = sorted(set(self.archive.fields) - set(self.prepare.scale))
            extra = sorted(set(self.prepare.scale) - set(self.archive.fields))
            if missing or extra:
                raise ValueError(
                    "prepare.scale must give one positive number per archive field "
                    f"{self.archive.fields}; missing {missing}, unknown {extra}"
                )
        return self


_UNITS = {"": 1, "b": 1, "k": 10**3, "kb": 10**3, "m": 10**6, "mb": 10**6, "g": 10**9,
          "gb": 10**9, "t": 10**12, "tb": 10**12, "kib": 2**10, "mib": 2**20, "gib": 2**30,
          "tib": 2**40}


def parse_bytes(value: str | int) -> int:
    """``'2GiB'`` -> 2147483648; ``'500MB'`` -> 500000000; integers pass through."""
    if isinstance(value, int):
        if value <= 0:
            raise ValueError(f"a byte count must be positive, got {value}")
        return value
    text = str(value).strip().lower().replace(" ", "")
    number = text.rstrip("abcdefghijklmnopqrstuvwxyz")
    unit = text[len(number):]
    try:
        amount = float(number)
    except ValueError:
        amount = -1.0
    if unit not in _UNITS or amount <= 0:
        raise ValueError(
            f"{value!r} is not a size; expected a number with a unit such as 512MB, 2GiB, 1.5TB"
        )
    return int(amount * _UNITS[unit])


def _format_validation_error(error: ValidationError, source: str) -> str:
    parts = []
    for item in error.errors():
        key = ".".join(str(p) for p in item["loc"] if not str(p).startswith("function-"))
        # pydantic puts union members in loc; keep only the path a user wrote
        key = ".".join(p for p in key.split(".") if p not in {"str", "int", "dict[str,float]",
                                                            "literal['none','rms']"})
        given = item.get("input")
        message = item["msg"].removeprefix("Value error, ")
        if item["type"] == "extra_forbidden":
            message = "unknown key"
            allowed = _allowed_keys(item["loc"][:-1])
            if allowed:
                message += f"; allowed keys: {', '.join(allowed)}"
            parts.append(f"{key}: {message}")
            continue
        shown = json.dumps(given, default=str) if not isinstance(given, dict) else "{...}"
        parts.append(f"{key or '(top level)'} = {shown}: {message}")
    return f"invalid workflow {source}: " + "; ".join(parts)


def _allowed_keys(loc: tuple[Any, ...]) -> list[str]:
    model: Any = Workflow
    for part in loc:
        field = model.model_fields.get(str(part)) if hasattr(model, "model_fields") else None
        if field is None:
            return []
        annotation = field.annotation
        model = annotation if isinstance(annotation, type) and issubclass(annotation, BaseModel) else None
        if model is None:
            return []
    return sorted(model.model_fields)


def parse_workflow(data: Any, *, source: str = "<text>") -> Workflow:
    """Validate a mapping (the parsed YAML) into a :class:`Workflow`."""
    if not isinstance(data, dict):
        raise ConfigError(f"invalid workflow {source}: expected a mapping of sections, got {type(data).__name__}")
    try:
        return Workflow.model_validate(data)
    except ValidationError as error:
        raise ConfigError(_format_validation_error(error, source)) from None
    except NotImplementedError as error:
        raise ConfigError(f"workflow {source}: {error}") from None


def load_workflow(path: str | Path) -> tuple[Workflow, str, Path]:
    """Read and validate a workflow file; return (workflow, its text, its folder).

    Example
    -------
    >>> workflow, text, folder = load_workflow("workflows/fin-duct.yaml")  # doctest: +SKIP
    """
    path = Path(path)
    try:
        text = path.read_text()
    except OSError as error:
        raise ConfigError(f"cannot read workflow file {path}: {error.strerror}") from None
    try:
        data = yaml.safe_load(text)
    except yaml.YAMLError as error:
        mark = getattr(error, "problem_mark", None)
        where = f" line {mark.line + 1}, column {mark.column + 1}" if mark else ""
        raise ConfigError(f"workflow {path}{where} is not valid YAML: {getattr(error, 'problem', error)}") from None
    return parse_workflow(data, source=str(path)), text, path.resolve().parent


def resolve_path(folder: Path, value: str) -> str:
    """Resolve a path (or glob) from the workflow against the workflow file's folder."""
    candidate = Path(value).expanduser()
    return str(candidate if candidate.is_absolute() else (folder / candidate))


def section_fingerprint(*parts: Any) -> str:
    """A stable hash of settings (pydantic models, dicts, strings) for stage reuse."""
    digest = hashlib.sha256()
    for part in parts:
        if isinstance(part, BaseModel):
            part = part.model_dump(mode="json")
        digest.update(json.dumps(part, sort_keys=True, default=str).encode())
    return digest.hexdigest()[:16]
