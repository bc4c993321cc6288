"""Lifting: dictionaries of observables.

Two places, one vocabulary (see README.md, "Lifting"):

- on the raw field, as pure per-tile kernels fused into the archive read and never
  stored: :func:`pointwise_terms` and the delay (Hankel) plan :func:`delay_columns`
  (:func:`hankel` for in-memory matrices);
- on a small state (reduced coefficients, or a raw state of at most a few hundred
  values): :func:`monomials`, :func:`fourier`, :func:`rbf`, :func:`expressions` and
  :func:`identity`, composed in order by :class:`Dictionary`.

All arrays have one column per sample (snapshot): a state is ``(n_state, n_samples)``,
its lifted matrix ``(n_terms, n_samples)``.
"""

from __future__ import annotations

from snaplift.lifting._base import BYTES_PER_VALUE, Description, DictionaryPart
from snaplift.lifting.dictionary import Dictionary, as_dictionary
from snaplift.lifting.expressions import (
    CONSTANTS,
    FUNCTIONS,
    Expressions,
    Formula,
    expressions,
    parse_formula,
)
from snaplift.lifting.fields import (
    POINTWISE,
    FieldLift,
    LiftedField,
    delay_columns,
    delayed_run_lengths,
    hankel,
    pointwise_size,
    pointwise_terms,
)
from snaplift.lifting.polynomial import (
    Fourier,
    Identity,
    Monomials,
    fourier,
    identity,
    monomial_count,
    monomials,
)
from snaplift.lifting.radial import RadialBasis, kmeans, rbf

__all__ = [
    "BYTES_PER_VALUE",
    "Description",
    "DictionaryPart",
    "Dictionary",
    "as_dictionary",
    "monomials",
    "monomial_count",
    "identity",
    "fourier",
    "rbf",
    "expressions",
    "kmeans",
    "parse_formula",
    "Monomials",
    "Identity",
    "Fourier",
    "RadialBasis",
    "Expressions",
    "Formula",
    "FUNCTIONS",
    "CONSTANTS",
    "POINTWISE",
    "FieldLift",
    "LiftedField",
    "pointwise_terms",
    "pointwise_size",
    "delay_columns",
    "delayed_run_lengths",
    "hankel",
]
