"""The pure pieces of the demo's lattice-Boltzmann solver (:mod:`snaplift.demo.lbm`): the
D2Q9 / D2Q5 lattices, equilibria, moments, BGK/TRT collision with a body force, streaming,
scalar collision, channel walls and the solid links bounce-back needs. References are in
:mod:`snaplift.demo.lbm`. It exists to invent demo data; it is not a validated code.
"""

from __future__ import annotations

import numpy as np
from numpy.typing import NDArray

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
