"""Invented demo archive: cooling air in a duct flowing past a heated rectangular fin.

The data are made up by the small lattice-Boltzmann model of :mod:`snaplift.demo.lbm`;
they look like a real archive (time-major HDF5, SI units, a solid mask, cell areas) and
show a von Karman vortex street with a clear shedding frequency, but they are not a
validated simulation and are labelled so in the file.

Scenario. A two-dimensional duct of height 0.05 m carries air (kinematic viscosity
1.5e-5 m^2/s, Prandtl number 0.71) with a parabolic inlet profile at 293.15 K. A plate
("fin") normal to the flow, with height one fifth of the duct and held at 353.15 K,
sits a little above the centre line so that shedding starts by itself; a tiny seeded
noise field seeds it further. Duct walls are adiabatic (zero heat flux). The Reynolds
number, mean inlet speed x fin height / viscosity, is 100 for every size.

Sizes. Grids count fluid cells ``(ny, nx)``; the fin is ``height x thickness`` cells;
``s`` is the refinement factor of the default grid. Times were measured on one core of
the development machine (the solver is single-threaded numpy).

=========== ============ ======== ========= ============== ========= ======== ========
size        grid         fin      snapshots steps/snapshot transient lattice  time
=========== ============ ======== ========= ============== ========= ======== ========
"small"     30 x 150     6 x 2    100       11             3500      float64  ~3 s
"default"   50 x 250     10 x 3   300       24             8000      float64  ~16 s
"500MB"     100 x 500    20 x 6   833       48             16000     float32  ~2 min
"2GB"       150 x 750    30 x 9   1481      72             24000     float32  ~12 min
"4GiB"      150 x 750    30 x 9   3181      72             24000     float32  ~25 min*
=========== ============ ======== ========= ============== ========= ======== ========

(* estimated from the step time; the others were measured.) The shedding Strouhal
number (fin height, mean inlet speed) came out at about 0.27 (small), 0.295 (default)
and 0.30 (500MB, 2GB): it converges with the grid; the files do not record it.

For a byte size the refinement is ``s = round((bytes / default_bytes) ** (1/4))`` (at
least 1): bigger archives get both a finer grid and more snapshots, and the snapshot
count fills the requested bytes (three float32 fields; run time grows like
``s * bytes``). Steps per snapshot and the transient scale with ``s`` because the
shedding period in steps does, so every size keeps about 20 snapshots per shedding
period. Small and default sizes cover about 5 and 15 shedding periods.

Known artefact: the thermal boundary layer on the fin is under-resolved (cell Peclet
number about 10-20), so the temperature shows small dispersive undershoots next to the
fin corners, down to about 2 K below the inlet temperature at the default size (5 K at
the small size).
"""

from __future__ import annotations

import json
import math
import os
import secrets
from collections.abc import Callable
from dataclasses import asdict, dataclass, replace
from pathlib import Path

import h5py
import numpy as np
from numpy.typing import NDArray

from snaplift.demo.lbm import LatticeFlow, channel_walls, relaxation_time
from snaplift.errors import ConfigError
from snaplift.units import parse_bytes, size_label

__all__ = [
    "FinDuctPlan",
    "plan_fin_duct",
    "fin_duct_geometry",
    "generate_fin_duct",
    "default_cache_path",
    "ensure_fin_duct",
]

# Bumped whenever the generated data change, so that cached archives are remade.
GENERATOR_VERSION = 1
SOURCE = "snaplift demo: invented data from a lattice-Boltzmann model, not a validated simulation"

DUCT_HEIGHT = 0.05  # m
VISCOSITY = 1.5e-5  # m^2/s, air near 20 C (from memory)
PRANDTL = 0.71  # air (from memory)
T_INLET = 293.15  # K
T_FIN = 353.15  # K
REYNOLDS = 100.0
FIELD_BYTES = 3 * 4  # u, v, T as float32 per cell and snapshot


@dataclass(frozen=True)
class FinDuctPlan:
    """Every parameter of one demo run (lattice units unless the name says otherwise)."""

    size: str
    ny: int  # fluid rows across the duct
    nx: int  # columns along the duct
    fin_height: int
    fin_thickness: int
    fin_x: int  # first fin column
    fin_offset: int  # rows the fin centre sits above the duct centre
    inlet_mean_speed: float  # lattice
    n_snapshots: int
    save_every: int
    ramp_steps: int  # smooth start of the inlet from rest
    transient_steps: int  # steps (ramp included) before the first saved snapshot
    dtype: str = "float64"  # lattice arithmetic; float32 halves the time of big runs

    def __post_init__(self) -> None:
        counts = ("ny", "nx", "fin_height", "fin_thickness", "n_snapshots", "save_every")
        for name in counts:
            value = getattr(self, name)
            if not (isinstance(value, int) and value > 0):
                raise ConfigError(f"demo plan {name} must be a positive integer, got {value!r}")
        if not 0 <= self.ramp_steps <= self.transient_steps:
            raise ConfigError(
                f"demo plan needs 0 <= ramp_steps <= transient_steps, got {self.ramp_steps} "
                f"and {self.transient_steps}"
            )
        bottom = (self.ny - self.fin_height) // 2 + self.fin_offset
        inside = 0 < bottom and bottom + self.fin_height < self.ny
        if not (inside and 1 < self.fin_x < self.fin_x + self.fin_thickness < self.nx - 2):
            raise ConfigError(
                f"demo plan fin ({self.fin_height} x {self.fin_thickness} cells at column "
                f"{self.fin_x}, offset {self.fin_offset}) must lie inside the "
                f"{self.ny} x {self.nx} duct, clear of walls, inlet and outlet"
            )
        if self.dtype not in ("float32", "float64"):
            raise ConfigError(f"demo plan dtype must be 'float32' or 'float64', got {self.dtype!r}")

    @property
    def viscosity(self) -> float:
        return self.inlet_mean_speed * self.fin_height / REYNOLDS

    @property
    def spacing(self) -> float:
        """Lattice spacing in metres."""
        return DUCT_HEIGHT / self.ny

    @property
    def time_step(self) -> float:
        """Lattice time step in seconds (from matching the viscosity)."""
        return self.viscosity * self.spacing**2 / VISCOSITY

    @property
    def total_steps(self) -> int:
        return self.transient_steps + self.n_snapshots * self.save_every

    @property
    def nbytes(self) -> int:
        """Bytes of the three snapshot fields (the bulk of the file)."""
        return FIELD_BYTES * self.ny * self.nx * self.n_snapshots


# Steps per snapshot were chosen from trial runs so that about 20 snapshots fall in one
# shedding period; the transient was chosen so that the shedding amplitude has settled.
# The small grid uses a faster lattice flow (fewer steps per period) at the same Re.
_SMALL = FinDuctPlan(
    size="small", ny=30, nx=150, fin_height=6, fin_thickness=2, fin_x=24, fin_offset=1,
    inlet_mean_speed=0.1, n_snapshots=100, save_every=11, ramp_steps=1500,
    transient_steps=3500,
)  # fmt: skip
_DEFAULT = FinDuctPlan(
    size="default", ny=50, nx=250, fin_height=10, fin_thickness=3, fin_x=40, fin_offset=1,
    inlet_mean_speed=0.07, n_snapshots=300, save_every=24, ramp_steps=2000,
    transient_steps=8000,
)  # fmt: skip
_MIN_SNAPSHOTS = 20


def plan_fin_duct(size: str = "default") -> FinDuctPlan:
    """Parameters for a named size ("small", "default") or a byte size ("500MB", "4GiB").

    Raises
    ------
    ConfigError
        If ``size`` is neither a known name nor a byte count big enough for
        20 snapshots of the default grid.

    Examples
    --------
    >>> plan_fin_duct("small").n_snapshots
    100
    >>> plan = plan_fin_duct("2GB")
    >>> (plan.ny, abs(plan.nbytes / 2e9 - 1) < 0.01)
    (150, True)
    """
    if not isinstance(size, str):
        raise ConfigError(f"demo size must be a string such as 'default' or '2GB', got {size!r}")
    key = size.strip().lower()
    if key in ("small", "default"):
        return _SMALL if key == "small" else _DEFAULT
    try:
        label, target = size_label(size), parse_bytes(size)
    except ValueError:
        raise ConfigError(
            f"demo size {size!r} not understood; expected 'small', 'default' or a byte "
            "size such as '500MB', '2GB', '4GiB'"
        ) from None
    scale = max(1, round((target / _DEFAULT.nbytes) ** 0.25))
    base = _DEFAULT
    ny, nx = base.ny * scale, base.nx * scale
    n_snapshots = round(target / (FIELD_BYTES * ny * nx))
    if n_snapshots < _MIN_SNAPSHOTS:
        smallest = _MIN_SNAPSHOTS * FIELD_BYTES * ny * nx
        raise ConfigError(
            f"demo size {size!r} holds only {n_snapshots} snapshots of the {ny} x {nx} grid; "
            f"ask for at least {smallest / 1e6:.1f}MB or use size='small'"
        )
    return replace(
        base,
        size=label,
        ny=ny,
        nx=nx,
        fin_height=base.fin_height * scale,
        fin_thickness=base.fin_thickness * scale,
        fin_x=base.fin_x * scale,
        fin_offset=base.fin_offset * scale,
        n_snapshots=n_snapshots,
        save_every=base.save_every * scale,
        ramp_steps=base.ramp_steps * scale,
        transient_steps=base.transient_steps * scale,
        dtype="float32",
    )


def fin_duct_geometry(plan: FinDuctPlan) -> tuple[NDArray[np.bool_], NDArray[np.bool_]]:
    """Lattice masks ``(solid, fin)``, both ``(ny + 2, nx)``: wall rows included in ``solid``.

    The archive keeps only the ``ny`` fluid rows, so ``fin[1:-1]`` is its ``solid`` mask.
    """
    solid = channel_walls(plan.ny, plan.nx)
    bottom = 1 + (plan.ny - plan.fin_height) // 2 + plan.fin_offset
    fin = np.zeros_like(solid)
    fin[bottom : bottom + plan.fin_height, plan.fin_x : plan.fin_x + plan.fin_thickness] = True
    return solid | fin, fin


def _inlet_profile(plan: FinDuctPlan) -> NDArray[np.float64]:
    """Parabolic duct profile (lattice units) at the cell centres, zero in the wall rows."""
    y = np.arange(plan.ny) + 0.5
    profile = np.zeros(plan.ny + 2)
    profile[1:-1] = 6.0 * plan.inlet_mean_speed * y * (plan.ny - y) / plan.ny**2
    return profile


def _simulate(
    plan: FinDuctPlan,
    seed: int,
    save: Callable[[int, NDArray, NDArray, NDArray], None],
    progress: Callable[[int, int], None] | None,
) -> None:
    """Run the lattice and hand each saved snapshot (lattice units, fluid rows) to ``save``."""
    solid, fin = fin_duct_geometry(plan)
    profile = _inlet_profile(plan)
    flow = LatticeFlow(
        solid,
        viscosity=plan.viscosity,
        diffusivity=plan.viscosity / PRANDTL,
        fixed_scalar=fin,
        fixed_value=1.0,
        inlet_velocity=0.0 * profile,
        inlet_scalar=0.0,
        dtype=np.dtype(plan.dtype),
    )
    rng = np.random.default_rng(seed)
    # Tiny transverse noise breaks the symmetry together with the fin offset.
    noise = 1e-3 * plan.inlet_mean_speed * rng.standard_normal(solid.shape)
    flow.initialise(np.zeros(solid.shape), noise)

    # A smooth start avoids the pressure shock of switching the inlet on at full speed.
    ramp_chunk = 10
    for start in range(0, plan.ramp_steps, ramp_chunk):
        factor = 0.5 * (1.0 - math.cos(math.pi * (start + ramp_chunk / 2) / plan.ramp_steps))
        flow.set_inlet_velocity(factor * profile)
        flow.step(min(ramp_chunk, plan.ramp_steps - start))
    flow.set_inlet_velocity(profile)
    done = plan.ramp_steps
    report_every = max(1, plan.n_snapshots // 50)
    while done < plan.transient_steps:
        n = min(plan.save_every * report_every, plan.transient_steps - done)
        flow.step(n)
        done += n
        if progress is not None:
            progress(done, plan.total_steps)
    for index in range(plan.n_snapshots):
        flow.step(plan.save_every)
        done += plan.save_every
        ux, uy = flow.velocity()
        theta = flow.scalar()
        if not (np.isfinite(ux).all() and np.isfinite(uy).all()):
            raise FloatingPointError(
                f"lattice-Boltzmann run diverged at step {done} of demo size {plan.size!r}"
            )
        save(index, ux[1:-1], uy[1:-1], theta[1:-1])
        if progress is not None and (index % report_every == 0 or index == plan.n_snapshots - 1):
            progress(done, plan.total_steps)


def _dataset(group, name, data, units, long_name, **kwargs):
    ds = group.create_dataset(name, data=data, **kwargs)
    ds.attrs["units"] = units
    ds.attrs["long_name"] = long_name
    return ds


def _write(handle, plan: FinDuctPlan, seed: int, progress) -> None:
    dx, dt = plan.spacing, plan.time_step
    speed = dx / dt  # lattice velocity unit in m/s
    ny, nx, n = plan.ny, plan.nx, plan.n_snapshots
    _, fin = fin_duct_geometry(plan)
    solid = fin[1:-1]

    x = _dataset(handle, "x", (np.arange(nx) + 0.5) * dx, "m", "streamwise cell-centre coordinate")
    y = _dataset(handle, "y", (np.arange(ny) + 0.5) * dx, "m", "wall-normal cell-centre coordinate")
    times = (plan.transient_steps + plan.save_every * (np.arange(n) + 1.0)) * dt
    t = _dataset(handle, "t", times, "s", "time since the inlet started ramping up")
    for scale in (t, y, x):
        scale.make_scale(scale.name.strip("/"))
    _dataset(handle, "cell_area", np.full((ny, nx), dx * dx), "m2", "area of each grid cell")
    mask = _dataset(handle, "solid", solid, "1", "solid fin cells (points to exclude)")
    fields = {}
    for name, units, long_name in (
        ("u", "m s-1", "streamwise air velocity"),
        ("v", "m s-1", "wall-normal air velocity"),
        ("T", "K", "air temperature"),
    ):
        ds = handle.create_dataset(name, shape=(n, ny, nx), dtype="f4", chunks=(1, ny, nx))
        ds.attrs["units"] = units
        ds.attrs["long_name"] = long_name
        for axis, scale in enumerate((t, y, x)):
            ds.dims[axis].attach_scale(scale)
        fields[name] = ds
    for axis, scale in enumerate((y, x)):
        mask.dims[axis].attach_scale(scale)

    def save(index, ux, uy, theta):
        # Solid cells: zero velocity (already) and the fin temperature.
        fields["u"][index] = (ux * speed).astype(np.float32)
        fields["v"][index] = (uy * speed).astype(np.float32)
        temperature = T_INLET + (T_FIN - T_INLET) * theta
        temperature[solid] = T_FIN
        fields["T"][index] = temperature.astype(np.float32)

    _simulate(plan, seed, save, progress)

    attrs = handle.attrs
    attrs["title"] = "Cooling air in a duct past a heated fin (invented demo data)"
    attrs["source"] = SOURCE
    attrs["snaplift_demo_size"] = plan.size
    attrs["snaplift_demo_version"] = GENERATOR_VERSION
    attrs["seed"] = seed
    attrs["reynolds_number"] = REYNOLDS
    attrs["reynolds_number_definition"] = "mean inlet speed * fin height / kinematic viscosity"
    attrs["duct_height_m"] = DUCT_HEIGHT
    attrs["duct_length_m"] = nx * dx
    attrs["fin_height_m"] = plan.fin_height * dx
    attrs["fin_thickness_m"] = plan.fin_thickness * dx
    attrs["fin_leading_face_x_m"] = plan.fin_x * dx
    rows = np.flatnonzero(solid.any(axis=1))
    attrs["fin_centre_y_m"] = (rows[0] + rows[-1] + 1) / 2 * dx
    attrs["inlet_mean_speed_m_s"] = plan.inlet_mean_speed * speed
    attrs["inlet_profile"] = "parabolic, 1.5 * mean speed on the centre line"
    attrs["kinematic_viscosity_m2_s"] = VISCOSITY
    attrs["prandtl_number"] = PRANDTL
    attrs["inlet_temperature_K"] = T_INLET
    attrs["fin_temperature_K"] = T_FIN
    attrs["duct_walls"] = "no-slip, adiabatic"
    attrs["saving_interval_s"] = plan.save_every * dt
    attrs["saving_interval_steps"] = plan.save_every
    attrs["transient_steps_skipped"] = plan.transient_steps
    attrs["lattice"] = "D2Q9 BGK flow, D2Q5 BGK temperature, half-way bounce-back"
    attrs["lattice_spacing_m"] = dx
    attrs["lattice_time_step_s"] = dt
    attrs["lattice_inlet_mean_speed"] = plan.inlet_mean_speed
    attrs["lattice_viscosity"] = plan.viscosity
    attrs["lattice_tau"] = relaxation_time(plan.viscosity)
    attrs["lattice_tau_temperature"] = relaxation_time(plan.viscosity / PRANDTL)
    attrs["lattice_plan"] = json.dumps(asdict(plan))
    # Written last: a reader (and ensure_fin_duct) trusts only files that carry it.
    attrs["complete"] = True


def generate_fin_duct(
    path: str | os.PathLike,
    *,
    size: str | FinDuctPlan = "default",
    seed: int = 0,
    overwrite: bool = False,
    progress: Callable[[int, int], None] | None = None,
) -> Path:
    """Write the invented fin-in-a-duct archive to ``path`` (HDF5) and return its path.

    Parameters
    ----------
    path : path-like
        Target file; parent folders are created.
    size : str or FinDuctPlan
        ``"small"`` (a few seconds, for tests), ``"default"`` (about 15 s), a byte size
        such as ``"500MB"``, ``"2GB"``, ``"4GiB"`` (finer grid, more snapshots; minutes
        to hours), or a plan made with :func:`plan_fin_duct` and ``dataclasses.replace``.
    seed : int
        Seed of the initial noise; same seed, same file contents.
    overwrite : bool
        Replace an existing file at ``path``.
    progress : callable, optional
        Called as ``progress(steps_done, steps_total)`` from time to time.

    Returns
    -------
    pathlib.Path
        ``path``. The file is written to a temporary name in the same folder and renamed
        into place only when complete, so an interrupted run leaves no file at ``path``.

    Raises
    ------
    ConfigError
        If ``size`` is not understood, or ``path`` exists and ``overwrite`` is false.

    Examples
    --------
    >>> import tempfile, h5py
    >>> target = generate_fin_duct(tempfile.mkdtemp() + "/fin.h5", size="small")
    >>> with h5py.File(target) as handle:
    ...     handle["u"].shape
    (100, 30, 150)
    """
    plan = size if isinstance(size, FinDuctPlan) else plan_fin_duct(size)
    target = Path(path)
    if target.exists() and not overwrite:
        raise ConfigError(
            f"demo archive {target} already exists; pass overwrite=True to replace it"
        )
    target.parent.mkdir(parents=True, exist_ok=True)
    # A unique hidden name beside the target (same file system, so os.replace is atomic);
    # not mkstemp, whose 0600 mode would stick to the finished archive.
    temporary = target.parent / f".{target.name}.{os.getpid()}-{secrets.token_hex(4)}.partial"
    try:
        with h5py.File(temporary, "x") as handle:
            _write(handle, plan, int(seed), progress)
        os.replace(temporary, target)
    except BaseException:
        temporary.unlink(missing_ok=True)
        raise
    return target


def default_cache_path(size: str = "default", *, seed: int = 0) -> Path:
    """Where :func:`ensure_fin_duct` keeps the archive of ``size``.

    ``$SNAPLIFT_CACHE/demo/`` if that variable is set, else
    ``$XDG_CACHE_HOME/snaplift/demo/`` (``~/.cache/snaplift/demo/``), file
    ``fin-duct-<size>.h5`` (``fin-duct-<size>-seed<seed>.h5`` for a non-zero seed).
    """
    label = plan_fin_duct(size).size
    root = os.environ.get("SNAPLIFT_CACHE")
    if root:
        folder = Path(root).expanduser() / "demo"
    else:
        cache = os.environ.get("XDG_CACHE_HOME") or Path.home() / ".cache"
        folder = Path(cache).expanduser() / "snaplift" / "demo"
    name = f"fin-duct-{label}" + (f"-seed{seed}" if seed else "") + ".h5"
    return folder / name


def _is_complete(path: Path, label: str, seed: int) -> bool:
    try:
        with h5py.File(path, "r") as handle:
            attrs = handle.attrs
            return (
                bool(attrs.get("complete", False))
                and attrs.get("snaplift_demo_size") == label
                and int(attrs.get("seed", -1)) == seed
                and int(attrs.get("snaplift_demo_version", -1)) == GENERATOR_VERSION
            )
    except (OSError, KeyError, ValueError, TypeError):
        return False


def ensure_fin_duct(
    size: str = "default",
    *,
    seed: int = 0,
    progress: Callable[[int, int], None] | None = None,
) -> Path:
    """Path of a complete cached demo archive of ``size``, generating it the first time.

    A cached file that is incomplete, from another generator version or for another
    size or seed is regenerated.

    Examples
    --------
    >>> path = ensure_fin_duct("small")  # doctest: +SKIP
    """
    label = plan_fin_duct(size).size
    path = default_cache_path(size, seed=seed)
    if path.exists() and _is_complete(path, label, seed):
        return path
    return generate_fin_duct(path, size=size, seed=seed, overwrite=True, progress=progress)
