"""A compact, vectorised 2-D lattice-Boltzmann solver (D2Q9 flow, D2Q5 passive scalar).

It exists to *invent* demo data for snaplift; it is not a validated simulation code.
Everything is in lattice units (spacing 1, time step 1, reference density 1).

Layout: arrays are ``(ny, nx)`` with axis 0 the wall-normal ``y`` direction and axis 1
the streamwise ``x`` direction; populations are stacked first, ``f.shape == (9, ny, nx)``.

Pieces, each a small pure function so that tests can check them one by one:

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

from snaplift.errors import ConfigError

__all__ = [
    "VELOCITIES", "WEIGHTS", "OPPOSITE", "SCALAR_VELOCITIES", "SCALAR_WEIGHTS",
    "equilibrium", "moments", "collide", "stream", "scalar_equilibrium", "collide_scalar",
    "channel_walls", "relaxation_time", "LatticeFlow",
]  # fmt: skip

FloatArray = NDArray[np.floating]

# D2Q9 as (cx, cy): rest, E, N, W, S, NE, NW, SW, SE.
VELOCITIES = np.array(
    [[0, 0], [1, 0], [0, 1], [-1, 0], [0, -1], [1, 1], [-1, 1], [-1, -1], [1, -1]], dtype=np.int64
)
WEIGHTS = np.array([4 / 9] + [1 / 9] * 4 + [1 / 36] * 4)
OPPOSITE = np.array([0, 3, 4, 1, 2, 7, 8, 5, 6])

# D2Q5 for the scalar: rest, E, N, W, S; speed of sound squared 1/3 as for D2Q9, so that
# the diffusivity is (tau_g - 1/2) / 3.
SCALAR_VELOCITIES = VELOCITIES[:5]
SCALAR_WEIGHTS = np.array([1 / 3] + [1 / 6] * 4)

_CX = VELOCITIES[:, 0].astype(float)[:, None, None]
_CY = VELOCITIES[:, 1].astype(float)[:, None, None]
_W = WEIGHTS[:, None, None]
_SCX = _CX[:5]
_SCY = _CY[:5]
_SW = SCALAR_WEIGHTS[:, None, None]


def relaxation_time(diffusivity: float) -> float:
    """Relaxation time for a lattice viscosity or scalar diffusivity: ``(tau - 1/2) / 3``.

    Holds for D2Q9 momentum (Qian, d'Humieres, Lallemand 1992) and for the D2Q5 scalar
    with the weights used here (Krueger et al. 2017, chapter 8).
    """
    return 3.0 * diffusivity + 0.5


# Opposite pairs (i, opposite(i)) with c_i = E, N, NE, NW; the first of each pair carries
# the odd part with a plus sign. Working pairwise halves the arithmetic of the
# equilibrium and turns TRT into its natural even/odd form.
_PAIRS = ((1, 3, 1), (2, 4, 1), (5, 7, 2), (6, 8, 2))  # (i, opposite, weight class)


def _equilibrium_parts(rho: FloatArray, ux: FloatArray, uy: FloatArray):
    """Rest population and, per opposite pair, the even and odd parts of the equilibrium.

    ``feq_i = even + odd`` and ``feq_opposite(i) = even - odd`` with
    ``even = w rho (1 + 9/2 (c.u)^2 - 3/2 u.u)`` and ``odd = 3 w rho c.u``.
    """
    base = ux * ux
    base += uy * uy
    base *= -1.5
    base += 1.0
    rest = (4.0 / 9.0) * rho * base
    weighted = {1: rho * (1.0 / 9.0), 2: rho * (1.0 / 36.0)}
    parts = []
    for (i, j, cls), cu in zip(_PAIRS, (ux, uy, ux + uy, uy - ux)):
        even = cu * cu
        even *= 4.5
        even += base
        even *= weighted[cls]
        odd = cu * weighted[cls]
        odd *= 3.0
        parts.append((i, j, even, odd))
    return rest, parts


def equilibrium(rho: FloatArray, ux: FloatArray, uy: FloatArray) -> FloatArray:
    """Second-order D2Q9 equilibrium ``w_i rho (1 + 3 c.u + 9/2 (c.u)^2 - 3/2 u.u)``.

    Parameters
    ----------
    rho, ux, uy : ndarray
        Density and velocity, same shape ``(ny, nx)``.

    Returns
    -------
    ndarray
        ``(9, ny, nx)`` equilibrium populations.

    Examples
    --------
    >>> import numpy as np
    >>> feq = equilibrium(np.ones((2, 3)), np.full((2, 3), 0.1), np.zeros((2, 3)))
    >>> bool(np.allclose(feq.sum(axis=0), 1.0))
    True
    """
    rest, parts = _equilibrium_parts(rho, ux, uy)
    feq = np.empty((9, *np.shape(rest)), dtype=np.result_type(rest))
    feq[0] = rest
    for i, j, even, odd in parts:
        np.add(even, odd, out=feq[i])
        np.subtract(even, odd, out=feq[j])
    return feq


def moments(
    f: FloatArray, force: tuple[float, float] = (0.0, 0.0)
) -> tuple[FloatArray, FloatArray, FloatArray]:
    """Density and velocity of D2Q9 populations.

    With a body force the velocity is shifted by half the force (Guo, Zheng, Shi 2002),
    which is what makes the forced scheme second-order accurate.
    """
    rho = f.sum(axis=0)
    diagonal, anti_diagonal = f[5] - f[7], f[6] - f[8]
    jx = f[1] - f[3] + diagonal - anti_diagonal + 0.5 * force[0]
    jy = f[2] - f[4] + diagonal + anti_diagonal + 0.5 * force[1]
    jx /= rho
    jy /= rho
    return rho, jx, jy


def collide(
    f: FloatArray,
    rho: FloatArray,
    ux: FloatArray,
    uy: FloatArray,
    tau: float,
    *,
    magic: float | None = None,
    force: tuple[float, float] = (0.0, 0.0),
    out: FloatArray | None = None,
) -> FloatArray:
    """Relax populations towards equilibrium; returns the post-collision populations.

    Parameters
    ----------
    f : ndarray
        ``(9, ny, nx)`` populations (not modified).
    rho, ux, uy : ndarray
        Moments of ``f`` (from :func:`moments`, with the same ``force``).
    tau : float
        Relaxation time of the even part; sets the viscosity ``(tau - 1/2) / 3``.
    magic : float or None
        ``None`` for BGK (one relaxation time). Otherwise the two-relaxation-time scheme
        (Ginzburg, Verhaeghe, d'Humieres 2008) with ``(tau+ - 1/2)(tau- - 1/2) = magic``;
        3/16 puts half-way bounce-back walls exactly mid-link for Poiseuille flow.
    force : (float, float)
        Uniform body force per unit volume, Guo forcing (Guo, Zheng, Shi 2002).
    out : ndarray, optional
        Buffer for the result (must not be ``f``).

    Returns
    -------
    ndarray
        Post-collision populations.
    """
    omega_even = 1.0 / tau
    omega_odd = omega_even if magic is None else 1.0 / (magic / (tau - 0.5) + 0.5)
    post = np.empty_like(f) if out is None else out
    rest, parts = _equilibrium_parts(rho, ux, uy)
    np.subtract(f[0], rest, out=post[0])
    post[0] *= -omega_even
    post[0] += f[0]
    for i, j, even, odd in parts:
        # even <- omega+ (f+ - feq+), odd <- omega- (f- - feq-), with f+- = (f_i +- f_j)/2
        even -= 0.5 * (f[i] + f[j])
        even *= -omega_even
        odd -= 0.5 * (f[i] - f[j])
        odd *= -omega_odd
        np.subtract(f[i], even, out=post[i])
        post[i] -= odd
        np.subtract(f[j], even, out=post[j])
        post[j] += odd
    if force[0] or force[1]:
        fx, fy = force
        cx, cy = _CX, _CY
        cu = cx * ux + cy * uy
        source = _W * (3.0 * ((cx - ux) * fx + (cy - uy) * fy) + 9.0 * cu * (cx * fx + cy * fy))
        even_source = 0.5 * (source + source[OPPOSITE])
        odd_source = source - even_source
        post += (1.0 - 0.5 * omega_even) * even_source + (1.0 - 0.5 * omega_odd) * odd_source
    return post


def _shift_slices(shift: int, n: int) -> list[tuple[slice, slice]]:
    """(destination, source) slice pairs of a periodic shift by -1, 0 or +1 along one axis."""
    if shift == 0:
        return [(slice(None), slice(None))]
    if shift == 1:
        return [(slice(1, None), slice(0, n - 1)), (slice(0, 1), slice(n - 1, n))]
    return [(slice(0, n - 1), slice(1, None)), (slice(n - 1, n), slice(0, 1))]


def _stream_plan(velocities: NDArray[np.int64], ny: int, nx: int) -> list[list[tuple]]:
    plan = []
    for cx, cy in velocities:
        copies = []
        for dy, sy in _shift_slices(int(cy), ny):
            for dx, sx in _shift_slices(int(cx), nx):
                copies.append(((dy, dx), (sy, sx)))
        plan.append(copies)
    return plan


def stream(
    f: FloatArray, out: FloatArray | None = None, *, _plan: list | None = None
) -> FloatArray:
    """Move each population one link along its velocity, periodic at all edges.

    Equivalent to ``np.roll(f[i], (cy_i, cx_i), axis=(0, 1))`` per direction, written as
    slice copies into ``out`` to avoid temporary arrays in the time loop.
    """
    q, ny, nx = f.shape
    if out is None:
        out = np.empty_like(f)
    plan = _plan if _plan is not None else _stream_plan(VELOCITIES[:q], ny, nx)
    for i, copies in enumerate(plan):
        src, dst = f[i], out[i]
        for d, s in copies:
            dst[d] = src[s]
    return out


def scalar_equilibrium(theta: FloatArray, ux: FloatArray, uy: FloatArray) -> FloatArray:
    """D2Q5 equilibrium ``w_i theta (1 + 3 c.u)`` of a passive scalar (Krueger et al. 2017)."""
    geq = _SCX * ux + _SCY * uy
    geq *= 3.0
    geq += 1.0
    geq *= _SW * theta
    return geq


def collide_scalar(
    g: FloatArray,
    ux: FloatArray,
    uy: FloatArray,
    tau: float,
    *,
    out: FloatArray | None = None,
) -> tuple[FloatArray, FloatArray]:
    """BGK relaxation of the D2Q5 scalar populations; returns ``(post, theta)``.

    Relaxing towards :func:`scalar_equilibrium` with time ``tau`` gives the
    advection-diffusion equation with diffusivity ``(tau - 1/2) / 3`` (Krueger et al.
    2017, chapter 8). (A two-relaxation-time variant was tried for the duct demo and gave
    larger over- and undershoots next to the heated fin, so it is not offered.)
    """
    omega = 1.0 / tau
    post = np.empty_like(g) if out is None else out
    theta = g.sum(axis=0)
    np.subtract(theta * (1.0 / 3.0), g[0], out=post[0])
    post[0] *= omega
    post[0] += g[0]
    even = theta * (1.0 / 6.0)
    for i, j, u in ((1, 3, ux), (2, 4, uy)):
        odd = u * theta
        odd *= 0.5
        for k, target in ((i, even + odd), (j, even - odd)):
            target -= g[k]
            target *= omega
            np.add(g[k], target, out=post[k])
    return post, theta


def channel_walls(ny_fluid: int, nx: int) -> NDArray[np.bool_]:
    """Solid mask ``(ny_fluid + 2, nx)`` with one wall row at the bottom and one at the top.

    With half-way bounce-back the walls sit half a cell outside the first and last fluid
    rows, so the fluid height is exactly ``ny_fluid`` lattice spacings.
    """
    solid = np.zeros((ny_fluid + 2, nx), dtype=bool)
    solid[0] = solid[-1] = True
    return solid


def _links(solid: NDArray[np.bool_], velocities: NDArray[np.int64], wall: NDArray[np.bool_]):
    """Flat indices for half-way reflection at fluid cells whose neighbour is in ``wall``.

    Returns (destination, source) flat indices into the ``(q, ny, nx)`` population array:
    population ``opposite(i)`` at a fluid cell ``x`` is replaced after streaming by the
    post-collision population ``i`` at ``x`` when ``x + c_i`` is in ``wall``.
    """
    n = solid.size
    q = len(velocities)
    opposite = OPPOSITE[:q]
    fluid = ~solid
    destination, source = [], []
    for i, (cx, cy) in enumerate(velocities):
        if cx == 0 and cy == 0:
            continue
        neighbour_is_wall = np.roll(wall, (-int(cy), -int(cx)), axis=(0, 1))
        cells = np.flatnonzero(fluid & neighbour_is_wall)
        destination.append(opposite[i] * n + cells)
        source.append(i * n + cells)
    if not destination:
        empty = np.zeros(0, dtype=np.intp)
        return empty, empty
    return np.concatenate(destination), np.concatenate(source)


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
