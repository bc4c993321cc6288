"""From discrete-time eigenvalues to rates, frequencies, growth rates and periods.

A discrete eigenvalue ``lambda`` advances a mode by one time step ``dt``; its continuous
rate is ``omega = log(lambda) / dt`` on the principal branch (imaginary part in
``(-pi/dt, pi/dt]``), so ``lambda = exp(omega dt)``. Then

- ``frequency = Im(omega) / (2 pi)`` in Hz (cycles per unit of ``dt``), signed; the
  principal branch keeps it within the Nyquist band ``|f| <= 1 / (2 dt)``;
- ``growth = Re(omega)`` in 1/s (negative: decay);
- ``period = 1 / |frequency|`` (``inf`` for a non-oscillating mode).
"""

from __future__ import annotations

from typing import Literal, Protocol

import numpy as np
from numpy.typing import ArrayLike

from snaplift.errors import FitError
from snaplift.fitting._checks import finite_vector, positive_step

__all__ = [
    "continuous_rate",
    "frequency",
    "growth",
    "period",
    "near_nyquist",
    "conjugate_pairs",
    "spectrum_order",
    "spectrum_table",
]

SortKey = Literal["amplitude", "frequency", "growth", "index"]
TableSort = Literal["amplitude", "frequency", "growth", "index", "residual"]

#: relative resolution below which two amplitudes count as tied (then frequency decides)
AMPLITUDE_TIE = 1e-9


class _HasSpectrum(Protocol):
    @property
    def eigenvalue(self) -> np.ndarray: ...
    @property
    def amplitude(self) -> np.ndarray: ...
    @property
    def dt(self) -> float: ...


def continuous_rate(eigenvalue: ArrayLike, dt: float) -> np.ndarray:
    """Continuous-time rate ``log(lambda) / dt`` (principal branch), complex.

    ``lambda = 0`` (a mode that vanishes after one step) gives ``-inf + 0j``.

    Examples
    --------
    >>> continuous_rate([np.exp(-0.5 + 1j)], 0.5)
    array([-1.+2.j])
    """
    step = positive_step(dt)
    values = np.asarray(eigenvalue, dtype=np.complex128)
    zero = values == 0
    # log(0) is kept out of the division (complex -inf / dt gives nan); its phase is taken as 0.
    rate = np.log(np.where(zero, 1.0, values)) / step
    if np.any(zero):
        rate = np.where(zero, complex(-np.inf, 0.0), rate)
    return rate


def frequency(eigenvalue: ArrayLike, dt: float) -> np.ndarray:
    """Signed frequency ``Im(log(lambda) / dt) / (2 pi)`` in Hz (cycles per time unit)."""
    return np.imag(continuous_rate(eigenvalue, dt)) / (2.0 * np.pi)


def growth(eigenvalue: ArrayLike, dt: float) -> np.ndarray:
    """Growth rate ``Re(log(lambda) / dt) = log|lambda| / dt`` in 1/s (negative: decay)."""
    return np.real(continuous_rate(eigenvalue, dt))


def period(eigenvalue: ArrayLike, dt: float) -> np.ndarray:
    """Period ``1 / |frequency|``; ``inf`` where the frequency is exactly 0."""
    magnitude = np.abs(frequency(eigenvalue, dt))
    with np.errstate(divide="ignore"):
        return np.where(magnitude > 0, 1.0 / np.where(magnitude > 0, magnitude, 1.0), np.inf)


def near_nyquist(frequency: ArrayLike, dt: float, fraction: float = 0.9) -> np.ndarray:
    """True where ``|frequency| >= fraction * 1 / (2 dt)``: possibly aliased, warn about it.

    A frequency close to the Nyquist frequency ``1 / (2 dt)`` is poorly resolved by the
    sampling and may be an alias of a faster motion (Shannon sampling theorem).

    Examples
    --------
    >>> near_nyquist([0.0, 4.6, -5.0], 0.1)
    array([False,  True,  True])
    """
    step = positive_step(dt)
    if not 0 < fraction <= 1:
        raise FitError(f"fraction of the Nyquist frequency must be in (0, 1]; got {fraction!r}")
    values = np.asarray(frequency, dtype=np.float64)
    return np.abs(values) >= fraction * 0.5 / step


def conjugate_pairs(eigenvalue: ArrayLike, tol: float = 1e-8) -> np.ndarray:
    """Index of each eigenvalue's complex-conjugate partner, ``-1`` if real or unpaired.

    An eigenvalue is real when ``|Im(lambda)| <= tol * max(1, |lambda|)``. Two complex
    eigenvalues are partners when ``|lambda_i - conj(lambda_j)| <= tol * max(1, |lambda_i|)``;
    closest candidates are matched first, each index at most once, so the result is
    symmetric: ``partner[partner[i]] == i`` wherever ``partner[i] >= 0``.

    Examples
    --------
    >>> conjugate_pairs([1 + 2j, 0.5, 1 - 2j, 3j])
    array([ 2, -1,  0, -1])
    """
    if not tol >= 0:
        raise FitError(f"tol must be >= 0; got {tol!r}")
    values = finite_vector(eigenvalue, "eigenvalue").astype(np.complex128)
    scale = np.maximum(1.0, np.abs(values))
    partner = np.full(values.size, -1, dtype=np.int64)
    upper = np.flatnonzero(values.imag > tol * scale)
    lower = np.flatnonzero(values.imag < -tol * scale)
    if upper.size == 0 or lower.size == 0:
        return partner
    distance = np.abs(values[upper][:, None] - np.conj(values[lower])[None, :])
    close = distance <= tol * scale[upper][:, None]
    rows, cols = np.nonzero(close)
    # Stable sort on distance, then index: deterministic when distances tie.
    for k in np.lexsort((cols, rows, distance[rows, cols])):
        i, j = upper[rows[k]], lower[cols[k]]
        if partner[i] < 0 and partner[j] < 0:
            partner[i], partner[j] = j, i
    return partner


def spectrum_order(
    eigenvalue: ArrayLike,
    amplitude: ArrayLike,
    dt: float,
    sort: SortKey = "amplitude",
) -> np.ndarray:
    """Deterministic permutation of the modes.

    - ``"amplitude"``: ``|amplitude|`` descending; ties (within a relative
      :data:`AMPLITUDE_TIE`) by frequency descending (so a conjugate pair is listed
      ``+f`` then ``-f``), then growth descending, then index;
    - ``"frequency"``: ``|frequency|`` ascending, then ``+f`` before ``-f``, then
      ``|amplitude|`` descending;
    - ``"growth"``: growth descending, then ``|amplitude|`` descending;
    - ``"index"``: unchanged.
    """
    values = np.asarray(eigenvalue, dtype=np.complex128)
    magnitude = np.abs(np.asarray(amplitude, dtype=np.complex128))
    if magnitude.shape != values.shape:
        raise FitError(
            f"amplitude must have the shape of eigenvalue {values.shape}; got {magnitude.shape}"
        )
    index = np.arange(values.size)
    if sort == "index":
        return index
    freq = frequency(values, dt)
    grow = growth(values, dt)
    top = magnitude.max() if magnitude.size else 0.0
    # Quantised amplitude so that rounding-level differences (conjugate pairs) tie.
    level = np.round(magnitude / top / AMPLITUDE_TIE) if top > 0 else np.zeros_like(magnitude)
    if sort == "amplitude":
        keys = (index, -grow, -freq, -level)
    elif sort == "frequency":
        keys = (index, -level, -freq, np.abs(freq))
    elif sort == "growth":
        keys = (index, -freq, -level, -grow)
    else:
        raise FitError(
            f"sort must be one of 'amplitude', 'frequency', 'growth', 'index'; got {sort!r}"
        )
    return np.lexsort(keys)


def spectrum_table(
    fit: _HasSpectrum,
    *,
    sort: TableSort = "amplitude",
    pair_tol: float = 1e-8,
    nyquist_fraction: float = 0.9,
    residual: ArrayLike | None = None,
    trusted: ArrayLike | None = None,
) -> dict[str, np.ndarray]:
    """One row per mode: the columns a spectrum report or the result store needs.

    Parameters
    ----------
    fit : DMDFit
        Any object with ``eigenvalue``, ``amplitude`` (complex) and ``dt``.
    sort : {"amplitude", "frequency", "growth", "index", "residual"}
        Row order, see :func:`spectrum_order`; ``"residual"`` sorts by residual
        ascending (ties: amplitude order) and needs residuals.
    pair_tol : float
        Tolerance of :func:`conjugate_pairs`.
    nyquist_fraction : float
        Fraction of the Nyquist frequency from which ``near_nyquist`` is True.
    residual, trusted : array_like, optional
        Per-mode residuals and trust flags in the fit's mode order (e.g. from a
        ``ResidualReport``); taken from ``fit.residual`` / ``fit.trusted`` when the fit
        has them (EDMD). When present they become columns of the table.

    Returns
    -------
    dict of str to ndarray
        ``index`` (mode index in ``fit``), ``eigenvalue`` (complex), ``rate`` (complex,
        1/s), ``frequency`` (Hz), ``growth`` (1/s), ``period`` (s), ``amplitude``
        (``|b|``), ``phase`` (``angle(b)``, rad), ``partner`` (mode index in ``fit`` of
        the conjugate partner, -1 if none), ``near_nyquist`` (bool); plus ``residual``
        and ``trusted`` when available.

    Examples
    --------
    >>> from types import SimpleNamespace
    >>> fit = SimpleNamespace(eigenvalue=np.array([0.9, 1j]), amplitude=np.array([1, 2]), dt=1.0)
    >>> spectrum_table(fit)["index"]
    array([1, 0])
    """
    eigenvalue = np.asarray(fit.eigenvalue, dtype=np.complex128)
    amplitude = np.asarray(fit.amplitude, dtype=np.complex128)
    residual = getattr(fit, "residual", None) if residual is None else residual
    trusted = getattr(fit, "trusted", None) if trusted is None else trusted
    extra: dict[str, np.ndarray] = {}
    for name, values, kind in (("residual", residual, np.float64), ("trusted", trusted, np.bool_)):
        if values is not None:
            column = np.asarray(values, dtype=kind)
            if column.shape != eigenvalue.shape:
                raise FitError(
                    f"{name} must have one value per mode {eigenvalue.shape}; got {column.shape}"
                )
            extra[name] = column
    if sort == "residual":
        if "residual" not in extra:
            raise FitError("sort='residual' needs residuals (residual= or a fit that has them)")
        by_amplitude = spectrum_order(eigenvalue, amplitude, fit.dt, "amplitude")
        order = by_amplitude[np.argsort(extra["residual"][by_amplitude], kind="stable")]
    else:
        order = spectrum_order(eigenvalue, amplitude, fit.dt, sort)  # type: ignore[arg-type]
    freq = frequency(eigenvalue, fit.dt)
    table = {
        "index": np.arange(eigenvalue.size),
        "eigenvalue": eigenvalue,
        "rate": continuous_rate(eigenvalue, fit.dt),
        "frequency": freq,
        "growth": growth(eigenvalue, fit.dt),
        "period": period(eigenvalue, fit.dt),
        "amplitude": np.abs(amplitude),
        "phase": np.angle(amplitude),
        "partner": conjugate_pairs(eigenvalue, pair_tol),
        "near_nyquist": near_nyquist(freq, fit.dt, nyquist_fraction),
        **extra,
    }
    return {name: column[order] for name, column in table.items()}
