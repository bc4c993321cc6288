"""A compact, vectorised 2-D lattice-Boltzmann solver (D2Q9 flow, D2Q5 passive scalar).

It exists to *invent* demo data for snaplift; it is not a validated simulation code.
Everything is in lattice units (spacing 1, time step 1, reference density 1).

Layout: arrays are ``(ny, nx)`` with axis 0 the wall-normal ``y`` direction and axis 1
the streamwise ``x`` direction; populations are stacked first, ``f.shape == (9, ny, nx)``.

Pieces, each a small pure function so that tests can check them one by one (in
:mod:`snaplift.demo.lbm_kernels`, re-exported here):

- :func:`equilibrium`, :func:`moments`, :func:`collide` (BGK or two-relaxation-time) with
  optional uniform body force (Guo, Zheng, Shi 2002);
- :func:`stream` (periodic shift into a preallocated buffer);
- :func:`scalar_equilibrium`, :func:`collide_scalar` for an advected-diffused scalar;
- :class:`LatticeFlow`, which owns the state and applies the boundaries: half-way
  bounce-back on a boolean solid mask, anti-bounce-back (fixed value) or bounce-back
  (zero flux) for the scalar at solid cells, a velocity inlet at column 0 and an outflow
  (zero velocity gradient at the reference density) at the last column, both by
  non-equilibrium extrapolation. Without an inlet profile the lattice is periodic in
  ``x``; walls in ``y`` are simply solid rows of the mask (see :func:`channel_walls`).
  Geometry is an input: any boolean obstacle mask works (fin, cylinder, ...).

Collision defaults to BGK. TRT is available and exact for Poiseuille walls, but with the
extrapolated inlet/outlet at ``tau`` close to 1/2 (the duct demo at Re 100) it was seen
to blow up here within a few thousand steps, while BGK ran stably; hence the default.

References
----------
Qian, d'Humieres, Lallemand (1992), Lattice BGK models for Navier-Stokes equation,
Europhys. Lett. 17, 479 (D2Q9 lattice and BGK equilibrium).
Ginzburg, Verhaeghe, d'Humieres (2008), Two-relaxation-time lattice Boltzmann scheme,
Commun. Comput. Phys. 3, 427 (TRT; the "magic" parameter 3/16 places bounce-back walls
exactly half-way for Poiseuille flow).
Guo, Zheng, Shi (2002), Non-equilibrium extrapolation method for velocity and pressure
boundary conditions in the lattice Boltzmann method, Chin. Phys. 11, 366 (inlet, outlet).
Guo, Zheng, Shi (2002), Discrete lattice effects on the forcing term in the lattice
Boltzmann method, Phys. Rev. E 65, 046308 (body force).
Krueger, Kusumaatmadja, Kuzmin, Shardt, Silva, Viggen (2017), The Lattice Boltzmann
Method: Principles and Practice, Springer (advection-diffusion on D2Q5, anti-bounce-back
for a fixed scalar value at a wall, chapter 8).
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import numpy.typing as npt
from numpy.typing import NDArray

from snaplift.demo.lbm_kernels import (
    OPPOSITE,
    SCALAR_VELOCITIES,
    SCALAR_WEIGHTS,
    VELOCITIES,
    WEIGHTS,
    FloatArray,
    _links,
    _stream_plan,
    channel_walls,
    collide,
    collide_scalar,
    equilibrium,
    moments,
    relaxation_time,
    scalar_equilibrium,
    stream,
)
from snaplift.errors import ConfigError

__all__ = [
    "VELOCITIES", "WEIGHTS", "OPPOSITE", "SCALAR_VELOCITIES", "SCALAR_WEIGHTS",
    "equilibrium", "moments", "collide", "stream", "scalar_equilibrium", "collide_scalar",
    "channel_walls", "relaxation_time", "LatticeFlow",
]  # fmt: skip

@dataclass
class _Inlet:
    ux: FloatArray  # (n_rows,) inlet velocity at the fluid rows of column 0
    rows: NDArray[np.intp]
    theta: float


class LatticeFlow:
    """State and time loop of a D2Q9 flow with an optional D2Q5 passive scalar.

    Parameters
    ----------
    solid : ndarray of bool, (ny, nx)
        True at solid cells (walls and obstacles); half-way bounce-back at their faces.
    viscosity : float
        Lattice kinematic viscosity.
    diffusivity : float or None
        Lattice diffusivity of the scalar; ``None`` runs without a scalar.
    fixed_scalar : ndarray of bool, (ny, nx), optional
        Solid cells whose faces hold the scalar at ``fixed_value`` (anti-bounce-back);
        faces of the other solid cells are adiabatic (bounce-back: zero flux).
    fixed_value : float
        Scalar value at ``fixed_scalar`` faces.
    inlet_velocity : ndarray (ny,), optional
        Streamwise velocity at column 0 (no transverse velocity) and an outflow at the
        last column, both on the rows that are fluid in column 0. ``None``: periodic
        in ``x``.
    inlet_scalar : float
        Scalar value carried in at the inlet.
    magic : float or None
        TRT magic parameter of the flow, ``None`` for BGK (see :func:`collide`).
    force : (float, float)
        Uniform body force (lattice units).
    dtype : numpy dtype
        float64 (default) or float32 for speed on large grids.

    Examples
    --------
    >>> import numpy as np
    >>> flow = LatticeFlow(channel_walls(8, 4), viscosity=0.1, force=(1e-5, 0.0))
    >>> flow.step(10)
    >>> flow.velocity()[0].shape
    (10, 4)
    """

    def __init__(
        self,
        solid: NDArray[np.bool_],
        *,
        viscosity: float,
        diffusivity: float | None = None,
        fixed_scalar: NDArray[np.bool_] | None = None,
        fixed_value: float = 1.0,
        inlet_velocity: FloatArray | None = None,
        inlet_scalar: float = 0.0,
        magic: float | None = None,
        force: tuple[float, float] = (0.0, 0.0),
        dtype: npt.DTypeLike = np.float64,
    ) -> None:
        solid = np.asarray(solid, dtype=bool)
        if solid.ndim != 2:
            raise ConfigError(f"solid mask must be 2-D (ny, nx), got shape {solid.shape}")
        for name, value in (("viscosity", viscosity), ("diffusivity", diffusivity)):
            if value is not None and not value > 0:
                raise ConfigError(f"lattice {name} must be positive, got {value!r}")
        ny, nx = solid.shape
        self.solid = solid
        self.shape = (ny, nx)
        self.tau = relaxation_time(viscosity)
        self.magic = magic
        self.force = (float(force[0]), float(force[1]))
        self.dtype = np.dtype(dtype)
        self._solid_cells = np.flatnonzero(solid)
        self._plan9 = _stream_plan(VELOCITIES, ny, nx)
        self._bounce = _links(solid, VELOCITIES, solid)
        self.f = equilibrium(np.ones(self.shape), np.zeros(self.shape), np.zeros(self.shape))
        self.f = self.f.astype(self.dtype)
        self._f_next = np.empty_like(self.f)
        self._post = np.empty_like(self.f)

        self._inlet: _Inlet | None = None
        if inlet_velocity is not None:
            ux = np.asarray(inlet_velocity, dtype=float).reshape(ny)
            rows = np.flatnonzero(~solid[:, 0])
            self._inlet = _Inlet(ux=ux[rows].astype(self.dtype), rows=rows, theta=inlet_scalar)

        self.tau_scalar: float | None = None
        self.g: FloatArray | None = None
        if diffusivity is not None:
            self.tau_scalar = relaxation_time(diffusivity)
            fixed = np.zeros_like(solid) if fixed_scalar is None else np.asarray(fixed_scalar, bool)
            self.fixed_scalar = fixed & solid
            self.fixed_value = float(fixed_value)
            self._plan5 = _stream_plan(SCALAR_VELOCITIES, ny, nx)
            self._scalar_bounce = _links(solid, SCALAR_VELOCITIES, solid & ~fixed)
            dst, src = _links(solid, SCALAR_VELOCITIES, solid & fixed)
            self._scalar_anti = (dst, src, 2.0 * SCALAR_WEIGHTS[src // solid.size] * fixed_value)
            self.g = np.zeros((5, ny, nx), dtype=self.dtype)
            self._g_next = np.empty_like(self.g)
            self._g_post = np.empty_like(self.g)
        self.time = 0

    # -- state -----------------------------------------------------------------------
    def initialise(
        self,
        ux: FloatArray,
        uy: FloatArray,
        rho: FloatArray | None = None,
        theta: FloatArray | None = None,
    ) -> None:
        """Set populations to equilibrium at the given fields (zero velocity in solids)."""
        rho = np.ones(self.shape) if rho is None else np.asarray(rho, float)
        ux = np.where(self.solid, 0.0, ux)
        uy = np.where(self.solid, 0.0, uy)
        self.f[...] = equilibrium(rho, ux, uy)
        if self.g is not None:
            theta = np.zeros(self.shape) if theta is None else np.asarray(theta, float)
            self.g[...] = scalar_equilibrium(theta, ux, uy)
        self.time = 0

    def set_inlet_velocity(self, inlet_velocity: FloatArray) -> None:
        """Change the inlet profile (e.g. to ramp the flow up smoothly from rest)."""
        if self._inlet is None:
            raise ConfigError("this LatticeFlow has no inlet (built with inlet_velocity=None)")
        profile = np.asarray(inlet_velocity, dtype=float).reshape(self.shape[0])
        self._inlet.ux = profile[self._inlet.rows].astype(self.dtype)

    def velocity(self) -> tuple[FloatArray, FloatArray]:
        """Velocity ``(ux, uy)``, zero at solid cells."""
        _, ux, uy = moments(self.f, self.force)
        ux[self.solid] = 0.0
        uy[self.solid] = 0.0
        return ux, uy

    def density(self) -> FloatArray:
        """Density (1 at solid cells)."""
        return self.f.sum(axis=0)

    def scalar(self) -> FloatArray:
        """Scalar field: ``fixed_value`` at fixed-value solid cells, NaN at other solids."""
        if self.g is None:
            raise ConfigError("this LatticeFlow was built without a scalar (diffusivity=None)")
        theta = self.g.sum(axis=0)
        theta[self.solid] = np.nan
        theta[self.fixed_scalar] = self.fixed_value
        return theta

    # -- time loop -------------------------------------------------------------------
    def step(self, n: int = 1) -> None:
        """Advance ``n`` time steps."""
        for _ in range(n):
            self._step()

    def _step(self) -> None:
        f, f_next = self.f, self._f_next
        rho, ux, uy = moments(f, self.force)
        post = collide(
            f, rho, ux, uy, self.tau, magic=self.magic, force=self.force, out=self._post
        )
        stream(post, f_next, _plan=self._plan9)
        dst, src = self._bounce
        f_next.reshape(-1)[dst] = post.reshape(-1)[src]
        self._boundaries_x(f_next)
        # Solid cells carry no physics; pinning them keeps their values bounded.
        f_next.reshape(9, -1)[:, self._solid_cells] = WEIGHTS[:, None]
        self.f, self._f_next = f_next, f

        if self.g is not None:
            g, g_next = self.g, self._g_next
            assert self.tau_scalar is not None  # set together with self.g
            g_post, _ = collide_scalar(g, ux, uy, self.tau_scalar, out=self._g_post)
            stream(g_post, g_next, _plan=self._plan5)
            dst, src = self._scalar_bounce
            g_next.reshape(-1)[dst] = g_post.reshape(-1)[src]
            dst, src, value = self._scalar_anti
            g_next.reshape(-1)[dst] = value - g_post.reshape(-1)[src]
            self._scalar_boundaries_x(g_next)
            g_next.reshape(5, -1)[:, self._solid_cells] = 0.0
            self.g, self._g_next = g_next, g
        self.time += 1

    def _boundaries_x(self, f: FloatArray) -> None:
        inlet = self._inlet
        if inlet is None:
            return
        # Both ends use non-equilibrium extrapolation (Guo, Zheng, Shi 2002, Chin. Phys.):
        # the boundary column gets the equilibrium at the boundary state plus the
        # non-equilibrium part of its neighbour column. The Zou-He (1997) closure grew a
        # checkerboard at the inlet and blew up near tau = 1/2 in this duct.
        rows = inlet.rows
        inner = f[:, rows, 1]
        rho, ux, uy = moments(inner)
        non_equilibrium = inner - equilibrium(rho, ux, uy)
        # Inlet: prescribed velocity, density from the neighbour.
        f[:, rows, 0] = equilibrium(rho, inlet.ux, np.zeros_like(rho)) + non_equilibrium
        # Outflow: zero-gradient velocity at the reference density 1; a plain copy of the
        # populations lets the mean density drift upwards.
        inner = f[:, rows, -2]
        rho, ux, uy = moments(inner)
        feq = equilibrium(rho, ux, uy)
        f[:, rows, -1] = feq / rho + inner - feq

    def _scalar_boundaries_x(self, g: FloatArray) -> None:
        inlet = self._inlet
        if inlet is None:
            return
        rows = inlet.rows
        # Inlet: the one unknown population (E) enters at equilibrium with the inlet state.
        g[1, rows, 0] = SCALAR_WEIGHTS[1] * inlet.theta * (1.0 + 3.0 * inlet.ux)
        g[3, :, -1] = g[3, :, -2]
