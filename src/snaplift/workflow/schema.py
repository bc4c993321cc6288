"""The workflow file, validated in one place by frozen pydantic models.

Sections: ``archive``, ``prepare``, ``lift``, ``compress``, ``fit``, ``output``,
``cluster``. An unknown key, a wrong type or an impossible combination is a
:class:`~snaplift.errors.ConfigError` naming the key, the value given and what is allowed.
Relative paths resolve against the folder of the workflow file (see :func:`load_workflow`).
"""

from __future__ import annotations

import hashlib
import json
import re
from pathlib import Path
from typing import TYPE_CHECKING, Annotated, Any, Literal

import yaml
from pydantic import BaseModel, ConfigDict, Field, ValidationError, field_validator, model_validator

from snaplift.compress_methods import METHOD_NAMES
from snaplift.errors import ConfigError
from snaplift.fit_methods import FIT_METHOD_NAMES, FIT_METHODS
from snaplift.units import parse_bytes, parse_every
from snaplift.workflow._text import MAX_MESSAGE, MAX_WORKFLOW_BYTES, safe_load, shorten, shown
from snaplift.workflow.cluster_section import ClusterSection
from snaplift.workflow.lift_section import LiftEntry, check_lift, field_lift, state_source

__all__ = [
    "ArchiveSection",
    "ClusterSection",
    "CompressSection",
    "FitSection",
    "OutputSection",
    "PrepareSection",
    "SnapshotRange",
    "Workflow",
    "load_workflow",
    "parse_workflow",
    "section_fingerprint",
]

if TYPE_CHECKING:
    CompressMethodName = str
    FitMethodName = str
else:
    #: ``compress.method``: a name of the registry (``Literal["randomized", "sketch", "tsqr"]``)
    CompressMethodName = Literal[METHOD_NAMES]
    #: ``fit.method``: a name of the fit registry (``Literal["dmd", "edmd", "optimized"]``)
    FitMethodName = Literal[FIT_METHOD_NAMES]


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
    """``archive:`` — where the snapshots are. ``path`` may be a list of files, each one run
    (same fields and grids); ``runs`` names a dataset of run labels (one per snapshot,
    each run's snapshots contiguous). No pair and no delay window crosses a run boundary."""

    path: str | list[str] = Field(
        description="HDF5/netCDF-4 file, .zarr, .npy, a glob of per-snapshot files, or a list of files, one per run")
    fields: list[str] = Field(min_length=1)
    time: str | None = Field(None, description="dataset holding the snapshot times")
    step: float | None = Field(None, gt=0, description="fixed time step when there is no time dataset")
    time_unit: Literal["s", "ms", "us", "min", "h", "day"] | None = Field(
        None, description="unit of 'step', or of a time dataset that declares none")
    units: dict[str, str] | None = Field(
        None, description="units of fields whose archive declares none, e.g. {p: Pa} (CF / UDUNITS strings)")
    coords: dict[str, str] | None = Field(
        None, description="1-D coordinate datasets per grid dimension, e.g. {x: xc, y: yc}")
    weights: str | dict[str, str] | None = Field(
        None, description="per-point weights dataset (cell areas/volumes), or {field: dataset} per grid")
    mask: str | dict[str, str] | None = Field(
        None, description="boolean dataset, true = excluded point, or {field: dataset} per grid")
    snapshots: SnapshotRange = SnapshotRange()
    format: Literal["hdf5", "zarr", "series", "npy"] | None = None
    runs: str | None = Field(None, description="dataset with one run label per snapshot")
    missing_chunks: Literal["error", "fill"] = Field(
        "error", description="zarr: a chunk absent from the store is an error (default) or read as the "
                             "array's declared fill value ('fill')")

    @field_validator("path")
    @classmethod
    def _paths(cls, value: str | list[str]) -> str | list[str]:
        if isinstance(value, list):
            if not value:
                raise ValueError("a list of archive files needs at least one path")
            if len(set(value)) != len(value):
                raise ValueError("the archive files of a list must be distinct")
            if len(value) == 1:
                return value[0]
        return value

    @model_validator(mode="after")
    def _time_source(self) -> ArchiveSection:
        if self.runs is not None and isinstance(self.path, list):
            raise ValueError("give either a list of files (each a run) or 'runs' (a dataset of run labels), not both")
        if self.time is not None and self.step is not None:
            raise ValueError("give either 'time' (a dataset) or 'step' (a number), not both")
        if len(set(self.fields)) != len(self.fields):
            raise ValueError(f"fields must be distinct, got {self.fields}")
        for key in ("weights", "mask", "units"):
            given = getattr(self, key)
            unknown = sorted(set(given) - set(self.fields)) if isinstance(given, dict) else []
            if unknown:
                raise ValueError(f"{key} key {unknown[0]!r} is not one of the fields {self.fields}; "
                                 "a mapping gives {field: dataset}")
        for dimension in self.coords or {}:
            if not re.fullmatch(r"[A-Za-z_][A-Za-z0-9_]*", dimension):
                raise ValueError(f"coords key {dimension!r} must be a dimension name such as x, y, z or u_x")
        return self


class PrepareSection(_Section):
    center: bool = False
    scale: Literal["none", "rms"] | dict[str, Annotated[float, Field(gt=0)]] = "rms"


class CompressSection(_Section):
    """How the snapshot matrix is compressed (see :mod:`snaplift.stream.compress`).

    ``sketch``: one read (Tropp et al. 2017/2019), widths ``sketch_widths: [k, l]``
    (default ``[2 rank + 1, 2 k + 1]``), coefficients and projection errors estimated
    unless ``check_pass: true`` (one more read, exact); ``corange_map``: ``sparse`` (sparse
    sign map, the default, Tropp et al. 2019) or ``gaussian``. ``randomized``: ``2 + 2
    power_iterations`` reads (Halko et al. 2011). ``tsqr``: two reads, exact (Demmel et al.
    2012), for archives with few snapshots. ``memory``: budget of the tile plan (default:
    from the cluster). ``checkpoint_every``: tiles (``200``) or a duration (``60s``)
    between checkpoints of the streaming loop, when the runner gives it a folder.
    ``in_memory``: ``auto`` reads a small snapshot matrix once and keeps it for every pass
    (:data:`snaplift.archive.plan.IN_MEMORY_LIMIT`), ``never`` always streams tiles.
    """

    #: the choices come from the registry (:data:`snaplift.compress_methods.METHODS`)
    method: CompressMethodName = "randomized"
    rank: int = Field(40, ge=1)
    oversample: int = Field(10, ge=0)
    power_iterations: int = Field(1, ge=0)
    seed: int = Field(0, ge=0)
    memory: str | int | None = Field(
        None, description="memory budget for tiles, e.g. '2GiB' (default: from the cluster)"
    )
    sketch_widths: tuple[int, int] | None = Field(
        None, description="sketch only: range and co-range widths [k, l], rank <= k <= l"
    )
    check_pass: bool = Field(False, description="sketch only: one more read for exact coefficients and errors")
    corange_map: Literal["sparse", "gaussian"] | None = Field(
        None, description="sketch only: co-range test matrix, 'sparse' sign (default) or 'gaussian'"
    )
    checkpoint_every: int | str | None = Field(
        None, description="tiles (e.g. 200) or a duration (e.g. 60s, 5m) between checkpoints"
    )
    in_memory: Literal["auto", "never"] | None = Field(
        None, description="'auto' (default): a snapshot matrix small enough is read once and kept in memory "
        "for every pass; 'never': always stream tiles"
    )

    @field_validator("memory")
    @classmethod
    def _memory(cls, value: str | int | None) -> str | int | None:
        if value is not None:
            parse_bytes(value)
        return value

    @field_validator("checkpoint_every")
    @classmethod
    def _every(cls, value: int | str | None) -> int | str | None:
        if value is not None:
            try:
                parse_every(value)
            except ConfigError as error:
                raise ValueError(str(error).split(": ", 1)[-1]) from None
        return value

    @model_validator(mode="after")
    def _combinations(self) -> CompressSection:
        if self.sketch_widths is not None:
            if self.method != "sketch":
                raise ValueError(f"sketch_widths applies to method 'sketch', not {self.method!r}")
            k, l = self.sketch_widths
            if not self.rank <= k <= l:
                raise ValueError(f"sketch_widths [k, l] = [{k}, {l}] must satisfy rank ({self.rank}) <= k <= l")
        if self.corange_map is not None and self.method != "sketch":
            raise ValueError(f"corange_map applies to method 'sketch', not {self.method!r}")
        if self.check_pass and self.method != "sketch":
            raise ValueError(
                f"check_pass applies to method 'sketch'; {self.method!r} already gives exact coefficients"
            )
        return self


class EnergyRank(_Section):
    energy: float = Field(gt=0, lt=1, description="smallest rank keeping this fraction of the energy")


def _methods_with(option: str) -> str:
    """``'edmd' and 'optimized'``: the fit methods a ``fit:`` key applies to (from the registry)."""
    names = [f"'{info.name}'" for info in FIT_METHODS.values() if option in info.options]
    return " and ".join(names) if len(names) < 3 else ", ".join(names[:-1]) + " and " + names[-1]


class FitSection(_Section):
    """``fit:`` — DMD on the coefficients, with residuals on held-out pairs.

    ``rank`` is a number, ``{energy: 0.999}`` or ``optimal`` (Gavish & Donoho 2014);
    ``debias`` is forward-backward (Dawson et al. 2016) or total least squares (Hemati et
    al. 2017); ``holdout`` pairs are kept out of the fit and give each eigenvalue its
    residual (Colbrook & Townsend 2024), ``trust_threshold`` marks it trusted.
    """

    #: the choices come from the registry (:data:`snaplift.fit_methods.FIT_METHODS`)
    method: FitMethodName = "dmd"
    rank: int | Literal["optimal"] | EnergyRank | None = Field(
        None, description="dmd: second truncation; edmd: truncation of the lifted data; optimized: exponentials"
    )
    coefficients: int | None = Field(
        None, ge=1, description="edmd/optimized on coefficients: how many leading coefficients form the state")
    debias: Literal["none", "forward-backward", "total-least-squares"] = "none"
    holdout: float = Field(0.2, ge=0, lt=0.9, description="fraction of pairs held out for residuals")
    trust_threshold: float = Field(0.01, gt=0, description="residual below which an eigenvalue is trusted")
    seed: int = Field(0, ge=0, description="seed of the choice of held-out pairs")

    @field_validator("rank", mode="before")
    @classmethod
    def _rank(cls, value: Any) -> Any:
        if isinstance(value, bool) or (isinstance(value, int) and value < 1):
            raise ValueError(f"must be a number >= 1, {{energy: fraction}} or 'optimal', got {value!r}")
        return value

    @model_validator(mode="after")
    def _method_options(self) -> FitSection:
        info = FIT_METHODS[self.method]
        if self.debias != "none" and "debias" not in info.options:
            raise ValueError(f"debias applies to method {_methods_with('debias')}, not {self.method!r} (optimized "
                             "DMD is itself robust to noise; for edmd use a truncation rank)")
        if info.integer_rank and self.rank is not None and not isinstance(self.rank, int):
            raise ValueError(f"method {self.method!r} needs rank as a number of exponentials (or none: all "
                             "coefficients)")
        if self.coefficients is not None and "coefficients" not in info.options:
            raise ValueError(f"coefficients applies to methods {_methods_with('coefficients')}; for "
                             f"{self.method} use rank")
        return self

    def rank_argument(self) -> int | float | str | None:
        """The ``rank`` argument of :func:`snaplift.fitting.fit_dmd`."""
        return float(self.rank.energy) if isinstance(self.rank, EnergyRank) else self.rank


class OutputSection(_Section):
    path: str = "results/snaplift.zarr"
    #: draw RESULT.report/ after the store is committed (`snaplift report RESULT` draws it any time)
    report: bool = True


class Workflow(_Section):
    archive: ArchiveSection
    prepare: PrepareSection = PrepareSection()
    lift: list[LiftEntry] = Field(default_factory=list)
    compress: CompressSection = CompressSection()
    fit: FitSection = FitSection()
    output: OutputSection = OutputSection()
    cluster: ClusterSection = ClusterSection()

    @field_validator("cluster", mode="before")
    @classmethod
    def _cluster_name(cls, value: Any) -> Any:
        from snaplift.workflow.profiles import resolve_cluster

        # profile names resolve against the current folder here; load_workflow resolves
        # them against the workflow file's folder before validation
        return resolve_cluster(value, None)

    @model_validator(mode="after")
    def _combinations(self) -> Workflow:
        if self.fit.coefficients is not None and self.fit.coefficients > self.compress.rank:
            raise ValueError(f"fit.coefficients ({self.fit.coefficients}) cannot exceed compress.rank "
                             f"({self.compress.rank})")
        # for edmd, rank truncates the lifted data, which may have more terms than coefficients
        if (not FIT_METHODS[self.fit.method].dictionary and isinstance(self.fit.rank, int)
                and self.fit.rank > self.compress.rank):
            raise ValueError(
                f"fit.rank ({self.fit.rank}) cannot exceed compress.rank ({self.compress.rank})"
            )
        check_lift(list(self.lift), list(self.archive.fields), self.fit.method)
        _check_formula_names(self)
        if isinstance(self.prepare.scale, dict):
            expected = set(self.archive.fields) | set(scaled_lifted_names(self))
            missing = sorted(expected - set(self.prepare.scale))
            extra = sorted(set(self.prepare.scale) - expected)
            if missing or extra:
                raise ValueError(
                    "prepare.scale must give one positive number per archive field and pointwise term "
                    f"{sorted(expected)}; missing {missing}, unknown {extra}"
                )
        return self

    @property
    def field_lift(self) -> Any:
        """The raw-field lifting (:class:`~snaplift.lifting.FieldLift`) or None."""
        return field_lift(list(self.lift))

    @property
    def state_source(self) -> str | None:
        """``"coefficients"`` / ``"state"`` for a state dictionary (EDMD), else None."""
        return state_source(list(self.lift))


def scaled_lifted_names(workflow: Workflow) -> list[str]:
    """Lifted field names (other than the fields themselves) a ``prepare.scale`` mapping must give.

    Delay copies share the scale of the undelayed field.
    """
    lift = field_lift(list(workflow.lift))
    if lift is None:
        return []
    return [f.name for f in lift.lifted(list(workflow.archive.fields)) if f.block == 0 and f.term != "x"]


def scale_of(scale: dict[str, float], name: str) -> float:
    """The ``prepare.scale`` value of a lifted field: its own name, else without the delay suffix."""
    if name in scale:
        return float(scale[name])
    base = re.sub(r"_delay\d+$", "", name)
    return float(scale[base])


def _check_formula_names(workflow: Any) -> None:
    """Formulas on the coefficients may use only ``c0 .. c{k-1}``: checked now, not after compress."""
    from snaplift.lifting.expressions import check_variables, parse_formulas

    count = workflow.fit.coefficients or workflow.compress.rank
    for index, entry in enumerate(workflow.lift):
        if entry.kind == "expressions" and entry.on == "coefficients":
            try:
                check_variables(parse_formulas(entry.formulas), [f"c{i}" for i in range(count)])
            except ConfigError as error:
                raise ValueError(f"lift[{index}]: {error}") from None


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
        if not key:  # a rule across sections: its message names the keys
            parts.append(message)
            continue
        value = shown(given)
        parts.append(f"{shorten(key)} = {value}: {shorten(message, MAX_MESSAGE // 2)}")
    return shorten(f"invalid workflow {source}: " + "; ".join(parts), MAX_MESSAGE)


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


def parse_workflow(data: Any, *, source: str = "<text>", folder: Path | None = None) -> Workflow:
    """Validate a mapping (the parsed YAML) into a :class:`Workflow`.

    ``folder`` is where cluster profile files and names are looked up (see
    :mod:`snaplift.workflow.profiles`); default: the current folder.
    """
    if not isinstance(data, dict):
        raise ConfigError(f"invalid workflow {source}: expected a mapping of sections, got {type(data).__name__}")
    if "cluster" in data:
        from snaplift.workflow.profiles import resolve_cluster

        data = {**data, "cluster": resolve_cluster(data["cluster"], folder)}
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
        size = path.stat().st_size
        if path.is_file() and size > MAX_WORKFLOW_BYTES:
            raise ConfigError(f"workflow file {path} is {size} bytes; a workflow file may have at most "
                              f"{MAX_WORKFLOW_BYTES} bytes (1 MiB): is this the right file?")
        text = path.read_text()
    except OSError as error:
        raise ConfigError(f"cannot read workflow file {path}: {error.strerror}") from None
    except UnicodeDecodeError as error:
        raise ConfigError(f"workflow file {path} is not UTF-8 text (byte {error.start}); is this the right file?") \
            from None
    try:
        data = safe_load(text, path)
    except yaml.YAMLError as error:
        mark = getattr(error, "problem_mark", None)
        where = f" line {mark.line + 1}, column {mark.column + 1}" if mark else ""
        raise ConfigError(f"workflow {path}{where} is not valid YAML: {getattr(error, 'problem', error)}") from None
    folder = path.resolve().parent
    return parse_workflow(data, source=str(path), folder=folder), text, folder


def resolve_path(folder: Path, value: Any) -> Any:
    """Resolve a path (or glob, or a list of them) from the workflow against the workflow file's folder."""
    if isinstance(value, list):
        return [resolve_path(folder, v) for v in value]
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
