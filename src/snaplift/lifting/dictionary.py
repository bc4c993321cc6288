"""An ordered composition of dictionary parts, with its size and memory check.

The lifted matrix ``Psi`` stacks the terms of the parts in order, one column per sample
(``Psi[:, j] = psi(x_j)``). A constant term that a previous part already supplied is
dropped, and so is an identity term of a variable that is already a term: the copies
would only make ``Psi`` rank deficient.
"""

from __future__ import annotations

from collections.abc import Iterable, Sequence
from typing import Any

import numpy as np
from numpy.typing import ArrayLike

from snaplift.errors import ConfigError, FitError, SnapliftError
from snaplift.lifting._base import (
    BYTES_PER_VALUE,
    Description,
    DictionaryPart,
    check_variable_names,
    default_variables,
    state_matrix,
)
from snaplift.lifting.polynomial import Monomials
from snaplift.units import format_bytes

__all__ = ["Dictionary"]


class Dictionary:
    """Ordered list of parts -> concatenated terms (duplicate constants and identities dropped).

    Parameters
    ----------
    parts : sequence of DictionaryPart (or Dictionary, whose parts are inlined)
        In the order their terms should appear.
    variables : sequence of str, optional
        Names of the state variables (rows), used in term names and by expressions;
        default ``x0, x1, ...``.

    Notes
    -----
    Instances are immutable: :meth:`fit` returns a fitted copy, so a dictionary can be
    shipped to workers in a task graph.

    Examples
    --------
    >>> from snaplift.lifting import monomials, expressions
    >>> d = Dictionary([monomials(1), expressions({"s": "sin(x)", "one": "1"})], variables=["x"])
    >>> d.describe(1).names
    ('1', 'x', 's')
    >>> d(np.array([[0.0, 1.0]])).shape
    (3, 2)
    """

    def __init__(
        self, parts: Sequence[DictionaryPart | Dictionary], variables: Sequence[str] | None = None
    ) -> None:
        flat: list[DictionaryPart] = []
        for index, part in enumerate(parts):
            if isinstance(part, Dictionary):
                flat.extend(part.parts)
            elif isinstance(part, DictionaryPart):
                flat.append(part)
            else:
                raise ConfigError(
                    f"dictionary part {index} is {part!r}; expected a dictionary part such as "
                    "monomials(2), fourier(3), rbf(...), expressions({...})"
                )
        if not flat:
            raise ConfigError("a dictionary needs at least one part; got an empty list")
        self._parts = tuple(flat)
        self._variables = None if variables is None else check_variable_names(variables)

    @property
    def parts(self) -> tuple[DictionaryPart, ...]:
        return self._parts

    @property
    def variables(self) -> tuple[str, ...] | None:
        return self._variables

    @property
    def needs_fit(self) -> bool:
        """True while some part depends on data (rbf centres, fourier ranges) not yet fitted."""
        return any(part.needs_fit for part in self._parts)

    def __repr__(self) -> str:
        return f"Dictionary({list(self._parts)!r}, variables={self._variables!r})"

    def __eq__(self, other: object) -> bool:
        return (
            isinstance(other, Dictionary)
            and self._parts == other._parts
            and self._variables == other._variables
        )

    def __hash__(self) -> int:
        return hash((self._parts, self._variables))

    def names_for(self, n_state: int) -> tuple[str, ...]:
        """Variable names for a state of ``n_state`` rows."""
        if self._variables is None:
            return default_variables(n_state)
        if len(self._variables) != n_state:
            raise FitError(
                f"the dictionary names {len(self._variables)} variables "
                f"({', '.join(self._variables)}) but the state has {n_state} rows"
            )
        return self._variables

    def _layout(self, n_state: int) -> tuple[Description, list[np.ndarray]]:
        """Combined description and, per part, the rows of it that are kept."""
        variables = self.names_for(n_state)
        names: list[str] = []
        constant: int | None = None
        identity: list[int | None] = [None] * n_state
        keep: list[np.ndarray] = []
        for part in self._parts:
            own = part.describe(variables)
            rows = []
            for row, name in enumerate(own.names):
                if row == own.constant_row:
                    if constant is not None:
                        continue
                    constant = len(names)
                which = [i for i, r in enumerate(own.identity_rows) if r == row]
                if which:
                    if identity[which[0]] is not None:
                        continue
                    identity[which[0]] = len(names)
                rows.append(row)
                names.append(name)
            keep.append(np.array(rows, dtype=np.intp))
        return Description(tuple(names), constant, tuple(identity)), keep

    def describe(self, n_state: int) -> Description:
        """Term names, constant row and identity rows of the lifted matrix."""
        return self._layout(n_state)[0]

    def lifted_size(self, n_state: int) -> int:
        """Number of terms for a state of ``n_state`` variables (no data needed).

        Examples
        --------
        >>> from snaplift.lifting import monomials
        >>> Dictionary([monomials(10)]).lifted_size(2)
        66
        """
        return self.describe(n_state).n_terms

    def lifted_bytes(self, n_state: int, n_samples: int) -> int:
        """Bytes of the lifted matrix, ``terms x samples x 16`` (complex128)."""
        return self.lifted_size(n_state) * int(n_samples) * BYTES_PER_VALUE

    def check_budget(self, n_state: int, n_samples: int, budget_bytes: int) -> int:
        """Bytes of the lifted matrix, or a ConfigError with the numbers and a suggestion.

        Raises
        ------
        ConfigError
            When ``terms x samples x 16 bytes > budget_bytes``; the message suggests the
            largest monomial degree and the largest number of state variables
            (coefficients) that would fit.
        """
        if (
            isinstance(budget_bytes, bool)
            or not isinstance(budget_bytes, (int, np.integer))
            or (budget_bytes <= 0)
        ):
            raise ConfigError(
                f"memory budget must be a positive number of bytes; got {budget_bytes!r}"
            )
        terms = self.lifted_size(n_state)
        needed = terms * int(n_samples) * BYTES_PER_VALUE
        if needed <= budget_bytes:
            return needed
        hints = []
        degree_hint = self._degree_hint(n_state, n_samples, int(budget_bytes))
        if degree_hint:
            hints.append(degree_hint)
        for fewer in range(n_state - 1, 0, -1):
            try:
                smaller = self.lifted_size(fewer)
            except SnapliftError:  # named variables or expressions fix the state size
                break
            if smaller * int(n_samples) * BYTES_PER_VALUE <= budget_bytes:
                hints.append(
                    f"use at most {fewer} coefficients (state variables) ({smaller} terms)"
                )
                break
        hints.append("or fewer snapshots / a larger memory budget")
        raise ConfigError(
            f"the lifted matrix would be {terms} terms x {n_samples} samples x "
            f"{BYTES_PER_VALUE} bytes = {format_bytes(needed)}, above the memory budget of "
            f"{format_bytes(int(budget_bytes))}: " + "; ".join(hints)
        )

    def _degree_hint(self, n_state: int, n_samples: int, budget: int) -> str | None:
        degrees = [p.degree for p in self._parts if isinstance(p, Monomials)]
        if not degrees:
            return None
        for degree in range(max(degrees) - 1, 0, -1):
            lower = [
                Monomials(min(p.degree, degree)) if isinstance(p, Monomials) else p
                for p in self._parts
            ]
            terms = Dictionary(lower, self._variables).lifted_size(n_state)
            if terms * n_samples * BYTES_PER_VALUE <= budget:
                return f"lower the monomial degree to {degree} ({terms} terms)"
        return None

    def fit(self, state: ArrayLike) -> Dictionary:
        """A copy with every data-dependent part fitted to ``state`` (n_state, n_samples).

        Deterministic: the same data and seeds give the same dictionary.
        """
        data = state_matrix(state)
        self.names_for(data.shape[0])
        return Dictionary([part.fit(data) for part in self._parts], self._variables)

    def evaluate(self, state: ArrayLike) -> np.ndarray:
        """The lifted matrix ``Psi`` (n_terms, n_samples), float64; column j is ``psi(x_j)``."""
        data = state_matrix(state)
        description, keep = self._layout(data.shape[0])
        variables = self.names_for(data.shape[0])
        waiting = [p.kind for p in self._parts if p.needs_fit]
        if waiting:
            raise FitError(
                f"dictionary part {waiting[0]!r} depends on the data and has not been fitted; "
                "call dictionary.fit(state) first (fit_edmd does this on the fitting samples)"
            )
        blocks = [
            part.evaluate(data, variables)[rows]
            for part, rows in zip(self._parts, keep, strict=True)
        ]
        return np.concatenate(blocks, axis=0)

    def __call__(self, state: ArrayLike) -> np.ndarray:
        return self.evaluate(state)

    def settings(self) -> dict[str, Any]:
        """JSON-friendly description: the parts (with fitted values) and variable names."""
        return {
            "variables": None if self._variables is None else list(self._variables),
            "parts": [part.settings() for part in self._parts],
        }


def as_dictionary(value: DictionaryPart | Dictionary | Iterable[DictionaryPart]) -> Dictionary:
    """A :class:`Dictionary` from a dictionary, a single part or a list of parts."""
    if isinstance(value, Dictionary):
        return value
    if isinstance(value, DictionaryPart):
        return Dictionary([value])
    if isinstance(value, (list, tuple)):
        return Dictionary(value)
    raise ConfigError(
        f"expected a Dictionary, a dictionary part or a list of parts; got {type(value).__name__}"
    )
