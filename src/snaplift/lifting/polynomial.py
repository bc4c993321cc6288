"""Monomials, the identity and Fourier features of a small state.

Term order of :func:`monomials` (documented because stored operators refer to it): by
total degree 0, 1, ..., p; within one degree d, the exponent tuples in the order of
``itertools.combinations_with_replacement(range(n_state), d)``, i.e. lexicographic in the
variable indices. For two variables and p = 2: ``1, x0, x1, x0^2, x0*x1, x1^2``. There are
``C(n_state + p, p)`` terms; the constant is row 0 and variable i is row ``1 + i``.
"""

from __future__ import annotations

import itertools
import math
from collections.abc import Sequence
from dataclasses import dataclass
from typing import Any

import numpy as np
from numpy.typing import ArrayLike

from snaplift.errors import ConfigError
from snaplift.lifting._base import Description, DictionaryPart, positive_int, state_matrix

__all__ = ["Monomials", "Identity", "Fourier", "monomials", "identity", "fourier", "monomial_count"]


def monomial_count(n_state: int, degree: int) -> int:
    """``C(n_state + degree, degree)``: all monomials of total degree <= ``degree``."""
    return math.comb(n_state + degree, degree)


def _exponent_tuples(n_state: int, degree: int) -> list[tuple[int, ...]]:
    """Variable-index tuples in the documented order (empty tuple = the constant)."""
    return [
        combo
        for d in range(degree + 1)
        for combo in itertools.combinations_with_replacement(range(n_state), d)
    ]


def _monomial_name(combo: tuple[int, ...], variables: Sequence[str]) -> str:
    if not combo:
        return "1"
    factors = []
    for index, group in itertools.groupby(combo):
        power = len(list(group))
        factors.append(variables[index] if power == 1 else f"{variables[index]}^{power}")
    return "*".join(factors)


@dataclass(frozen=True)
class Monomials(DictionaryPart):
    """All monomials of the state variables up to a total degree (see module docstring)."""

    degree: int
    kind = "monomials"

    def __post_init__(self) -> None:
        positive_int(self.degree, "monomials degree", minimum=0)

    def size(self, n_state: int) -> int:
        return monomial_count(n_state, self.degree)

    def describe(self, variables: Sequence[str]) -> Description:
        combos = _exponent_tuples(len(variables), self.degree)
        identity = tuple(1 + i if self.degree >= 1 else None for i in range(len(variables)))
        return Description(
            names=tuple(_monomial_name(c, variables) for c in combos),
            constant_row=0,
            identity_rows=identity,
        )

    def _terms(self, state: np.ndarray, variables: Sequence[str]) -> np.ndarray:
        combos = _exponent_tuples(state.shape[0], self.degree)
        out = np.empty((len(combos), state.shape[1]))
        row_of: dict[tuple[int, ...], int] = {}
        for row, combo in enumerate(combos):
            # Each term is a lower-degree term times one variable: one multiply per term.
            out[row] = 1.0 if not combo else out[row_of[combo[:-1]]] * state[combo[-1]]
            row_of[combo] = row
        return out

    def settings(self) -> dict[str, Any]:
        return {"kind": self.kind, "degree": self.degree}


@dataclass(frozen=True)
class Identity(DictionaryPart):
    """The state variables themselves (the linear terms; makes the way back exact)."""

    kind = "identity"

    def size(self, n_state: int) -> int:
        return n_state

    def describe(self, variables: Sequence[str]) -> Description:
        return Description(tuple(variables), None, tuple(range(len(variables))))

    def _terms(self, state: np.ndarray, variables: Sequence[str]) -> np.ndarray:
        return state.copy()


@dataclass(frozen=True)
class Fourier(DictionaryPart):
    """``sin(k a_i)`` and ``cos(k a_i)``, k = 1 .. harmonics, for every variable i.

    Without scaling ``a_i = x_i`` (period 2 pi: natural for angles). With ``scale=True``
    the argument is ``a_i = pi (x_i - lo_i) / (hi_i - lo_i)`` with ``lo_i``, ``hi_i`` the
    range of variable i in the data given to :meth:`fit`, so that the cosine terms are the
    cosine series of the data interval (complete on it without a jump at the ends, unlike
    a period equal to the range). Term order: variable 0 (sin k=1, cos k=1, sin k=2, ...),
    then variable 1, ... No constant and no identity terms.
    """

    harmonics: int
    scale: bool = False
    low: tuple[float, ...] | None = None
    high: tuple[float, ...] | None = None
    kind = "fourier"

    def __post_init__(self) -> None:
        positive_int(self.harmonics, "fourier harmonics")
        if not isinstance(self.scale, bool):
            raise ConfigError(f"fourier scale must be true or false; got {self.scale!r}")

    @property
    def needs_fit(self) -> bool:
        return self.scale and self.low is None

    def size(self, n_state: int) -> int:
        return 2 * self.harmonics * n_state

    def fit(self, state: ArrayLike) -> Fourier:
        data = state_matrix(state)
        if not self.scale:
            return self
        low, high = data.min(axis=1), data.max(axis=1)
        flat = np.flatnonzero(high <= low)
        if flat.size:
            raise ConfigError(
                f"fourier scale=true needs a range of values; variable {flat[0]} is constant "
                f"({low[flat[0]]}) in the data"
            )
        return Fourier(self.harmonics, True, tuple(map(float, low)), tuple(map(float, high)))

    def describe(self, variables: Sequence[str]) -> Description:
        names = []
        for name in variables:
            argument = f"u({name})" if self.scale else name
            for k in range(1, self.harmonics + 1):
                names += [f"sin({k}*{argument})", f"cos({k}*{argument})"]
        return Description(tuple(names), None, tuple(None for _ in variables))

    def _terms(self, state: np.ndarray, variables: Sequence[str]) -> np.ndarray:
        argument = state
        if self.scale:
            assert self.low is not None and self.high is not None
            if len(self.low) != state.shape[0]:
                raise ConfigError(
                    f"fourier part was fitted to {len(self.low)} variables; got {state.shape[0]}"
                )
            low, high = np.array(self.low)[:, None], np.array(self.high)[:, None]
            argument = np.pi * (state - low) / (high - low)
        k = np.arange(1, self.harmonics + 1)[None, :, None]
        phase = k * argument[:, None, :]  # (variable, harmonic, sample)
        out = np.empty((state.shape[0], self.harmonics, 2, state.shape[1]))
        out[:, :, 0], out[:, :, 1] = np.sin(phase), np.cos(phase)
        return out.reshape(-1, state.shape[1])

    def settings(self) -> dict[str, Any]:
        found: dict[str, Any] = {
            "kind": self.kind,
            "harmonics": self.harmonics,
            "scale": self.scale,
        }
        if self.low is not None:
            found.update(low=list(self.low), high=list(self.high or ()))
        return found


def monomials(degree: int) -> Monomials:
    """All ``C(n + degree, degree)`` monomials up to total ``degree``, constant and linear included.

    Examples
    --------
    >>> part = monomials(2)
    >>> part.describe(["x", "y"]).names
    ('1', 'x', 'y', 'x^2', 'x*y', 'y^2')
    >>> part(np.array([[2.0], [3.0]])).ravel().tolist()
    [1.0, 2.0, 3.0, 4.0, 6.0, 9.0]
    """
    return Monomials(degree)


def identity() -> Identity:
    """The state itself (use it beside rbf or fourier terms to make the way back exact)."""
    return Identity()


def fourier(harmonics: int, *, scale: bool = False) -> Fourier:
    """Sine and cosine harmonics of each variable (see :class:`Fourier`).

    Examples
    --------
    >>> fourier(1).describe(["theta"]).names
    ('sin(1*theta)', 'cos(1*theta)')
    """
    return Fourier(harmonics, scale)
