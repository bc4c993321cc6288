"""Optimized DMD by variable projection (Askham & Kutz 2018), for any time steps.

Model: ``x(t) = sum_i modes[:, i] amplitude_i exp(rate_i (t - t_0))``. With ``X`` the
snapshots (n x m, columns at times ``t_j``) and ``Phi(rate)[j, i] = exp(rate_i (t_j - t_0))``
(m x k), the fit minimises ``||X^T - Phi C||_F`` over the continuous-time rates and the
linear coefficients ``C`` (k x n). Variable projection eliminates ``C = Phi^+ X^T`` and
leaves ``min over rate of ||(I - Phi Phi^+) X^T||_F`` (Golub & Pereyra 1973), a nonlinear
least-squares problem in k complex numbers only, solved here with
:func:`scipy.optimize.least_squares` (Levenberg-Marquardt) on the real and imaginary
parts of the rates, with Kaufman's (1975) Jacobian ``d r / d rate_i ~=
-(I - Phi Phi^+) (tau * phi_i) C_i`` (``tau = t - t_0``).

The rates start from exact DMD of the snapshots (for uneven steps, after cubic-spline
interpolation onto a uniform grid with the median step). With ``n > rank`` the snapshots
are first projected onto their ``rank`` leading POD modes (Askham & Kutz 2018, sec. 3),
which keeps the problem at ``m x rank`` residuals; modes and amplitudes are then fitted
to the full snapshots.
"""

from __future__ import annotations

import numbers
from dataclasses import dataclass

import numpy as np
import scipy.linalg
from numpy.typing import ArrayLike

from snaplift.errors import FitError
from snaplift.fitting import spectrum
from snaplift.fitting._checks import finite_vector, snapshot_matrix
from snaplift.fitting._spectral import freeze_arrays
from snaplift.fitting.dmd import fit_dmd, normalize_modes

__all__ = ["OptimizedDMDFit", "fit_optimized_dmd", "optimized_reconstruct"]

#: largest dense Jacobian (bytes) the solver may build
JACOBIAN_BYTES = 1 << 30


@dataclass(frozen=True, eq=False)
class OptimizedDMDFit:
    """Result of :func:`fit_optimized_dmd` (arrays are read-only).

    Attributes
    ----------
    rate : ndarray, shape (k,), complex
        Continuous-time eigenvalues ``omega_i`` (1/s): ``growth + 2 pi i frequency``.
    modes : ndarray, shape (n, k), complex
        Unit norm, largest entry real positive.
    amplitude : ndarray, shape (k,), complex
        ``x(t) = modes @ (amplitude * exp(rate (t - times[0])))``.
    times : ndarray, shape (m,)
        Snapshot times used.
    dt : float
        Median time step: ``eigenvalue = exp(rate dt)`` for the spectrum helpers.
    initial_rate : ndarray, shape (k,)
        Starting rates (from exact DMD).
    relative_error : float
        ``||X - model||_F / ||X||_F`` on the snapshots.
    evaluations : int
        Residual evaluations used by the solver.
    converged : bool
        Whether the solver met its tolerance.
    message : str
        The solver's message.
    """

    rate: np.ndarray
    modes: np.ndarray
    amplitude: np.ndarray
    times: np.ndarray
    dt: float
    initial_rate: np.ndarray
    relative_error: float
    evaluations: int
    converged: bool
    message: str

    def __post_init__(self) -> None:
        freeze_arrays(self)

    def __repr__(self) -> str:
        return (
            f"OptimizedDMDFit(rank={self.rank}, snapshots={self.times.size}, "
            f"relative_error={self.relative_error:.3g}, converged={self.converged})"
        )

    @property
    def rank(self) -> int:
        return self.rate.size

    @property
    def eigenvalue(self) -> np.ndarray:
        """``exp(rate dt)``: the discrete eigenvalue per median step."""
        return np.exp(self.rate * self.dt)

    @property
    def frequency(self) -> np.ndarray:
        """Signed frequency ``Im(rate) / (2 pi)`` in Hz."""
        return self.rate.imag / (2.0 * np.pi)

    @property
    def growth(self) -> np.ndarray:
        """``Re(rate)`` in 1/s."""
        return self.rate.real

    @property
    def period(self) -> np.ndarray:
        magnitude = np.abs(self.frequency)
        with np.errstate(divide="ignore"):
            return np.where(magnitude > 0, 1.0 / np.where(magnitude > 0, magnitude, 1.0), np.inf)

    @property
    def partner(self) -> np.ndarray:
        return spectrum.conjugate_pairs(self.eigenvalue)


def fit_optimized_dmd(
    snapshots: ArrayLike,
    times: ArrayLike,
    rank: int,
    *,
    initial_rate: ArrayLike | None = None,
    max_evaluations: int = 2000,
    tolerance: float = 1e-15,
) -> OptimizedDMDFit:
    """Fit ``x(t) = sum modes amplitude exp(rate t)`` by variable projection.

    Parameters
    ----------
    snapshots : array_like, shape (n, m)
        One run of snapshots (e.g. reduced coefficients), one column per time.
    times : array_like, shape (m,)
        Strictly increasing snapshot times; any spacing.
    rank : int
        Number of exponentials k (at most the numerical rank of the snapshots).
    initial_rate : array_like, shape (k,), optional
        Starting continuous-time rates; default from exact DMD (module docstring).
    max_evaluations : int
        Budget of residual evaluations for the solver.
    tolerance : float
        ``ftol``, ``xtol`` and ``gtol`` of :func:`scipy.optimize.least_squares`.

    Returns
    -------
    OptimizedDMDFit
        Modes ordered by ``|amplitude|`` descending.

    Raises
    ------
    FitError
        Bad times, rank out of range, or a problem too large for a dense Jacobian.

    References
    ----------
    Askham, T. & Kutz, J. N. (2018), "Variable projection methods for an optimized
    dynamic mode decomposition", SIAM J. Appl. Dyn. Syst. 17(1), 380-416.
    Golub, G. H. & Pereyra, V. (1973), SIAM J. Numer. Anal. 10(2), 413-432.
    Kaufman, L. (1975), "A variable projection method for solving separable nonlinear
    least squares problems", BIT 15, 49-57.

    Examples
    --------
    >>> t = np.sort(np.random.default_rng(0).uniform(0, 10, 60))
    >>> x = np.vstack([np.exp(-0.1 * t) * np.cos(2 * t), np.exp(-0.1 * t) * np.sin(2 * t)])
    >>> fit = fit_optimized_dmd(x, t, rank=2)
    >>> np.round(np.sort_complex(fit.rate), 8).tolist()
    [(-0.1-2j), (-0.1+2j)]
    """
    data = snapshot_matrix(snapshots, "snapshots")
    clock = _times(times, data.shape[1])
    if isinstance(rank, bool) or not isinstance(rank, numbers.Integral):
        raise FitError(f"rank must be a positive integer (number of exponentials); got {rank!r}")
    k = int(rank)
    if not 1 <= k <= min(data.shape[0], data.shape[1] - 1):
        raise FitError(
            f"rank {k} is not available for {data.shape[0]} x {data.shape[1]} snapshots; "
            f"choose 1 <= rank <= {min(data.shape[0], data.shape[1] - 1)}"
        )
    if (
        isinstance(max_evaluations, bool)
        or not isinstance(max_evaluations, numbers.Integral)
        or (max_evaluations < 1)
    ):
        raise FitError(f"max_evaluations must be a positive integer; got {max_evaluations!r}")
    if not (isinstance(tolerance, numbers.Real) and tolerance > 0):
        raise FitError(f"tolerance must be a positive number; got {tolerance!r}")
    tau = clock - clock[0]
    steps = np.diff(clock)
    dt = float(np.median(steps))

    # Project onto the leading POD modes: the varpro problem then has m x k residuals.
    left, _, _ = scipy.linalg.svd(data, full_matrices=False, lapack_driver="gesdd")
    reduced = (left[:, :k].conj().T @ data) if data.shape[0] > k else data
    target = reduced.T  # (m, p): one row per snapshot
    needed = 2 * target.size * 2 * k * 8
    if needed > JACOBIAN_BYTES:
        raise FitError(
            f"optimized DMD would build a {needed / 2**30:.1f} GiB Jacobian ({data.shape[1]} "
            f"snapshots x rank {k}); use fewer snapshots (archive.snapshots every) or a lower rank"
        )

    if initial_rate is None:
        start = _initial_rate(reduced, clock, dt, k)
    else:
        start = finite_vector(initial_rate, "initial_rate", size=k).astype(np.complex128)

    def residual(parameters: np.ndarray) -> np.ndarray:
        rate = parameters[:k] + 1j * parameters[k:]
        _, miss = _project(rate, tau, target)
        return np.concatenate([miss.real.ravel(), miss.imag.ravel()])

    def jacobian(parameters: np.ndarray) -> np.ndarray:
        rate = parameters[:k] + 1j * parameters[k:]
        basis, coefficient, orthonormal = _project(rate, tau, target, full=True)
        derivative = tau[:, None] * basis  # d Phi[:, i] / d rate_i
        projected = derivative - orthonormal @ (orthonormal.conj().T @ derivative)
        # Column i: -(P_perp d_i) outer C_i, flattened like the residual (row-major m x p).
        block = -(projected[:, None, :] * coefficient.T[None, :, :]).reshape(-1, k)
        return np.block([[block.real, -block.imag], [block.imag, block.real]])

    from scipy import optimize  # here: importing it costs ~0.2 s of every run's startup

    solution = optimize.least_squares(
        residual,
        np.concatenate([start.real, start.imag]),
        jac=jacobian,
        method="lm",
        ftol=tolerance,
        xtol=tolerance,
        gtol=tolerance,
        max_nfev=int(max_evaluations),
        x_scale="jac",
    )
    rate = solution.x[:k] + 1j * solution.x[k:]
    exponentials = np.exp(tau[:, None] * rate[None, :])
    # columns scaled to unit norm first: a fast-growing exponential would otherwise push
    # every other column below the solver's rank cut-off
    column = np.linalg.norm(exponentials, axis=0)
    column = np.where(column > 0, column, 1.0)
    coefficient, *_ = scipy.linalg.lstsq(
        exponentials / column, data.T.astype(np.complex128), lapack_driver="gelsd"
    )
    raw = (coefficient / column[:, None]).T  # (n, k): modes times amplitudes
    modes = normalize_modes(raw)
    # modes = raw conj(p) / (|p| ||raw||) with p the reference entry, so raw = modes * a:
    norm = np.linalg.norm(raw, axis=0)
    pivot = raw[np.argmax(np.abs(modes), axis=0), np.arange(k)]
    phase = np.where(pivot != 0, pivot / np.where(pivot != 0, np.abs(pivot), 1.0), 0.0)
    amplitude = norm * phase
    model = modes @ (amplitude[:, None] * exponentials.T)
    size = np.linalg.norm(data)
    error = float(np.linalg.norm(data - model) / size) if size > 0 else 0.0
    order = spectrum.spectrum_order(np.exp(rate * dt), amplitude, dt, "amplitude")
    return OptimizedDMDFit(
        rate=rate[order],
        modes=np.ascontiguousarray(modes[:, order]),
        amplitude=amplitude[order],
        times=clock,
        dt=dt,
        initial_rate=start,
        relative_error=error,
        evaluations=int(solution.nfev),
        converged=bool(solution.status > 0),
        message=str(solution.message),
    )


def optimized_reconstruct(fit: OptimizedDMDFit, times: ArrayLike) -> np.ndarray:
    """Model states at any ``times`` (same clock as ``fit.times``): shape (n, len(times))."""
    clock = finite_vector(times, "times")
    if np.iscomplexobj(clock):
        raise FitError("times must be real")
    tau = clock - fit.times[0]
    return fit.modes @ (fit.amplitude[:, None] * np.exp(fit.rate[:, None] * tau[None, :]))


def _times(times: ArrayLike, n_snapshots: int) -> np.ndarray:
    clock = finite_vector(times, "times", size=n_snapshots)
    if np.iscomplexobj(clock):
        raise FitError("times must be real")
    steps = np.diff(clock)
    bad = np.flatnonzero(steps <= 0)
    if bad.size:
        j = int(bad[0])
        raise FitError(
            f"times must increase strictly; times[{j + 1}] = {clock[j + 1]} follows "
            f"times[{j}] = {clock[j]}"
        )
    return clock


def _project(
    rate: np.ndarray, tau: np.ndarray, target: np.ndarray, full: bool = False
) -> tuple[np.ndarray, ...]:
    """Exponential basis, and the part of ``target`` it misses (or basis, C, Q)."""
    basis = np.exp(tau[:, None] * rate[None, :])
    orthonormal, triangle = scipy.linalg.qr(basis, mode="economic")
    projected = orthonormal.conj().T @ target
    if not full:
        return basis, target - orthonormal @ projected
    coefficient, *_ = scipy.linalg.lstsq(triangle, projected, lapack_driver="gelsd")
    return basis, coefficient, orthonormal


def _initial_rate(reduced: np.ndarray, clock: np.ndarray, dt: float, k: int) -> np.ndarray:
    """Rates of exact DMD, on a uniform grid (cubic spline) if the steps are uneven."""
    steps = np.diff(clock)
    uniform = np.allclose(steps, dt, rtol=1e-9, atol=0.0)
    if uniform:
        grid_data = reduced
    else:
        grid = clock[0] + dt * np.arange(int(np.floor((clock[-1] - clock[0]) / dt)) + 1)
        from scipy import interpolate  # here: it imports scipy.optimize, ~0.2 s of every run's startup

        grid_data = interpolate.CubicSpline(clock, reduced, axis=1)(grid)
    fit = fit_dmd(grid_data, dt, rank=min(k, grid_data.shape[0], grid_data.shape[1] - 1))
    rate = spectrum.continuous_rate(fit.eigenvalue, dt)
    if rate.size < k:
        raise FitError(
            f"exact DMD of the interpolated snapshots gives only {rate.size} eigenvalues for "
            f"rank {k}; give initial_rate or a lower rank"
        )
    return rate[:k]
