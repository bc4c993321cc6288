"""What every state dictionary part shares: its description and its input checks.

A part maps a small state array ``(n_state, n_samples)`` (one column per sample, the
project's columns-are-snapshots convention) to its terms ``(n_terms, n_samples)``.
"""

from __future__ import annotations

import abc
from collections.abc import Sequence
from dataclasses import dataclass
from typing import Any

import numpy as np
from numpy.typing import ArrayLike

from snaplift.errors import ConfigError, FitError

__all__ = ["Description", "DictionaryPart", "default_variables", "state_matrix", "BYTES_PER_VALUE"]

#: bytes per lifted value: complex128, the widest type the fit works in
BYTES_PER_VALUE = 16


@dataclass(frozen=True)
class Description:
    """What the terms of a dictionary (or of one part) are.

    Attributes
    ----------
    names : tuple of str
        One name per term (row of the lifted matrix), e.g. ``"1"``, ``"x0"``,
        ``"x0^2*x1"``, ``"sin(2*x1)"``.
    constant_row : int or None
        Row of the constant term, None if there is none.
    identity_rows : tuple of (int or None)
        For each state variable, the row holding that variable itself (the identity /
        linear term), None where it is absent.
    """

    names: tuple[str, ...]
    constant_row: int | None
    identity_rows: tuple[int | None, ...]

    @property
    def n_terms(self) -> int:
        return len(self.names)

    @property
    def has_constant(self) -> bool:
        return self.constant_row is not None

    @property
    def has_identity(self) -> bool:
        """True when every state variable is itself a term: the way back is exact."""
        return bool(self.identity_rows) and all(row is not None for row in self.identity_rows)

    def as_dict(self) -> dict[str, Any]:
        """JSON-friendly form (for the result store's operator attributes)."""
        return {
            "names": list(self.names),
            "constant_row": self.constant_row,
            "identity_rows": list(self.identity_rows),
        }


class DictionaryPart(abc.ABC):
    """One kind of observables. Subclasses are frozen dataclasses (picklable, hashable)."""

    #: the name of the kind in a workflow file's ``lift:`` list
    kind: str = ""

    @abc.abstractmethod
    def size(self, n_state: int) -> int:
        """Number of terms for a state of ``n_state`` variables (known before any data)."""

    @abc.abstractmethod
    def describe(self, variables: Sequence[str]) -> Description:
        """Term names, constant and identity rows for the named state variables."""

    @abc.abstractmethod
    def _terms(self, state: np.ndarray, variables: Sequence[str]) -> np.ndarray:
        """The lifted rows for a checked float64 state."""

    @property
    def needs_fit(self) -> bool:
        """True while a data-dependent part (centres, ranges) has not been fitted."""
        return False

    def fit(self, state: ArrayLike) -> DictionaryPart:
        """A copy with its data-dependent parameters set from ``state``; self if none."""
        state_matrix(state)
        return self

    def settings(self) -> dict[str, Any]:
        """JSON-friendly settings (and fitted parameters) that rebuild this part."""
        return {"kind": self.kind}

    def evaluate(self, state: ArrayLike, variables: Sequence[str] | None = None) -> np.ndarray:
        """Terms of ``state`` (n_state, n_samples) as a (n_terms, n_samples) float64 array."""
        data = state_matrix(state)
        names = _variables_for(data.shape[0], variables)
        if self.needs_fit:
            raise FitError(
                f"dictionary part {self.kind!r} depends on the data and has not been fitted; "
                "call fit(state) first"
            )
        return self._terms(data, names)

    def __call__(self, state: ArrayLike) -> np.ndarray:
        return self.evaluate(state)


def default_variables(n_state: int) -> tuple[str, ...]:
    """``("x0", "x1", ...)``: names used when the caller gives none."""
    return tuple(f"x{i}" for i in range(n_state))


def _variables_for(n_state: int, variables: Sequence[str] | None) -> tuple[str, ...]:
    if variables is None:
        return default_variables(n_state)
    names = tuple(variables)
    if len(names) != n_state:
        raise FitError(
            f"the state has {n_state} variables (rows) but {len(names)} variable names were "
            f"given: {', '.join(names)}"
        )
    return names


def check_variable_names(variables: Sequence[str]) -> tuple[str, ...]:
    """Variable names as a tuple: identifiers, unique, not a function or constant name."""
    from snaplift.lifting.expressions import CONSTANTS, FUNCTIONS

    names = tuple(variables)
    for index, name in enumerate(names):
        if not isinstance(name, str) or not name.isidentifier():
            raise ConfigError(
                f"variable name {index} is {name!r}; names must be identifiers such as 'theta'"
            )
        if name in FUNCTIONS or name in CONSTANTS:
            raise ConfigError(
                f"variable name {name!r} is reserved (a function or constant of expressions)"
            )
    repeated = [name for i, name in enumerate(names) if name in names[:i]]
    if repeated:
        raise ConfigError(f"variable name {repeated[0]!r} is given twice")
    return names


def state_matrix(state: ArrayLike) -> np.ndarray:
    """``state`` as a finite real 2-D float64 array (rows: variables, columns: samples)."""
    array = np.asarray(state)
    if array.ndim != 2:
        raise FitError(
            "a state to lift must be a 2-D array (variable x sample, one column per sample); "
            f"got shape {array.shape}"
        )
    if np.iscomplexobj(array):
        raise FitError(
            "state dictionaries need a real state; got complex values (lift the real and "
            "imaginary parts as separate variables)"
        )
    if not np.issubdtype(array.dtype, np.number) or np.issubdtype(array.dtype, np.bool_):
        raise FitError(f"a state to lift must hold real numbers; got dtype {array.dtype}")
    array = array.astype(np.float64, copy=False)
    if array.shape[0] == 0:
        raise FitError("a state to lift needs at least one variable (row); got 0")
    finite = np.isfinite(array)
    if not finite.all():
        row, column = np.argwhere(~finite)[0]
        raise FitError(
            f"state[{row}, {column}] is {array[row, column]}; dictionaries need finite values"
        )
    return array


def positive_int(value: object, name: str, minimum: int = 1) -> int:
    """``value`` as an int >= minimum, or a ConfigError naming the option."""
    if isinstance(value, bool) or not isinstance(value, (int, np.integer)) or value < minimum:
        raise ConfigError(f"{name} must be an integer >= {minimum}; got {value!r}")
    return int(value)
