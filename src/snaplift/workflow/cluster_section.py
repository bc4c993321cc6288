"""The ``cluster`` section of a workflow: where the work runs (frozen pydantic model).

:class:`ClusterSection` is validated here; the runner turns it into the plain
:class:`snaplift.cluster.ClusterOptions` the scheduler takes. Each key applies to some
kinds only (``_CLUSTER_KEYS``): a key given for another kind is an error, not ignored.
"""

from __future__ import annotations

from typing import Literal

from pydantic import BaseModel, ConfigDict, Field, field_validator, model_validator

from snaplift.units import parse_bytes, parse_duration, parse_walltime

__all__ = ["ClusterSection"]

_BATCH_KINDS = ("slurm", "pbs")
#: which keys apply to which kinds (a key given for another kind is an error, not ignored)
_CLUSTER_KEYS: dict[str, tuple[str, ...]] = {
    "workers": ("threads", "local", "slurm", "pbs", "allocation"),
    "threads_per_worker": ("local", "allocation"),
    "memory_per_worker": ("threads", "local", "address", "allocation"),
    "address": ("address",),
    "queue": _BATCH_KINDS, "account": _BATCH_KINDS, "walltime": _BATCH_KINDS,
    "cores": _BATCH_KINDS, "memory": _BATCH_KINDS, "processes": _BATCH_KINDS,
    "job_extra_directives": _BATCH_KINDS, "job_script_prologue": _BATCH_KINDS,
    "worker_lifetime": _BATCH_KINDS, "lifetime_stagger": _BATCH_KINDS,
    "log_directory": _BATCH_KINDS, "python": _BATCH_KINDS,
    "interface": ("local", "slurm", "pbs", "allocation"),
    "local_directory": ("local", "slurm", "pbs", "allocation"),
    "launcher": ("allocation",),
}


class ClusterSection(BaseModel):
    """Where the work runs; see :mod:`snaplift.cluster` and the profiles in ``configs/``.

    ``threads`` (dask's threaded scheduler, no scheduler process), ``local`` (a
    LocalCluster sized to the machine), ``address`` (an existing scheduler), ``slurm`` /
    ``pbs`` (worker jobs submitted through dask-jobqueue) and ``allocation`` (workers
    started inside the batch allocation this run is already in).
    """

    model_config = ConfigDict(extra="forbid", frozen=True)

    # default: threads, which snaplift bench measured faster than local worker processes on a
    # workstation for both HDF5 and zarr archives (README, "cluster")
    kind: Literal["threads", "local", "address", "slurm", "pbs", "allocation"] = "threads"
    profile: str | None = Field(None, description="where the settings came from (set by the loader)")
    workers: int | None = Field(None, ge=1, description="worker processes in all (batch: jobs x processes)")
    threads_per_worker: int | None = Field(None, ge=1)
    memory_per_worker: str | None = None
    address: str | None = Field(None, description="scheduler address, e.g. tcp://10.0.0.5:8786")
    queue: str | None = None
    account: str | None = None
    walltime: str | None = Field(None, description="per worker job, HH:MM:SS")
    cores: int | None = Field(None, ge=1, description="cores per worker job")
    memory: str | None = Field(None, description="memory per worker job, e.g. 64GiB")
    processes: int | None = Field(None, ge=1, description="worker processes per job (cores shared)")
    job_extra_directives: list[str] = Field(default_factory=list)
    job_script_prologue: list[str] = Field(default_factory=list)
    worker_lifetime: str | None = Field(None, description="retire workers before the walltime, e.g. 55m")
    lifetime_stagger: str | None = Field(None, description="spread retirements, e.g. 4m")
    log_directory: str | None = None
    python: str | None = Field(None, description="python on the compute nodes (default: this one)")
    interface: str | None = Field(None, description="network interface for workers, e.g. ib0")
    local_directory: str | None = Field(None, description="node-local scratch for spilling")
    launcher: Literal["auto", "srun", "local"] = "auto"
    start_timeout: float = Field(600.0, gt=0, description="seconds to wait for the workers to start")

    @field_validator("memory_per_worker", "memory")
    @classmethod
    def _sizes(cls, value: str | None) -> str | None:
        if value is not None:
            parse_bytes(value)
        return value

    @field_validator("worker_lifetime", "lifetime_stagger")
    @classmethod
    def _durations(cls, value: str | None) -> str | None:
        if value is not None:
            parse_duration(value)
        return value

    @field_validator("walltime")
    @classmethod
    def _walltime(cls, value: str | None) -> str | None:
        if value is not None:
            parse_walltime(value)
        return value

    @model_validator(mode="after")
    def _keys_fit_kind(self) -> ClusterSection:
        given = self.model_fields_set - {"kind", "profile", "start_timeout"}
        for key in sorted(given):
            kinds = _CLUSTER_KEYS.get(key, ())
            value = getattr(self, key)
            if value in (None, []) or self.kind in kinds:
                continue
            raise ValueError(
                f"cluster.{key} does not apply to kind {self.kind!r}; it applies to kinds {', '.join(kinds)}"
            )
        if self.kind == "address" and not self.address:
            raise ValueError("cluster kind 'address' needs cluster.address, e.g. tcp://10.0.0.5:8786")
        if self.kind in _BATCH_KINDS:
            if self.cores is None or self.memory is None:
                raise ValueError(
                    f"cluster kind {self.kind!r} needs cluster.cores and cluster.memory (per worker job), "
                    "e.g. cores: 8, memory: 32GiB"
                )
            if self.processes and self.cores and self.processes > self.cores:
                raise ValueError(f"cluster.processes ({self.processes}) cannot exceed cluster.cores ({self.cores})")
            if (self.worker_lifetime and self.walltime
                    and parse_duration(self.worker_lifetime) >= parse_walltime(self.walltime)):
                raise ValueError(
                    f"cluster.worker_lifetime ({self.worker_lifetime}) must be shorter than the "
                    f"walltime ({self.walltime}) so workers retire before the job is killed"
                )
        return self
