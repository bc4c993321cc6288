"""``lift:`` of the workflow file: an ordered list of dictionaries of observables.

Two kinds of entries (see README.md, "Lifting"):

- on the raw fields, fused into the tile read and never stored: ``delays`` (Hankel
  stacking: ``count`` copies ``spacing`` snapshots apart) and ``pointwise`` (``x``,
  ``square``, ``cube``, ``abs``, ``sin``, ``cos`` of every point of the chosen fields);
- on a small state, for ``fit.method: edmd``: ``monomials``, ``fourier``, ``rbf``,
  ``expressions`` and ``identity``, each with ``on: coefficients`` (the reduced
  coefficients of compress, variables ``c0, c1, ...``) or ``on: state`` (the raw values
  of the archive fields, at most :data:`STATE_LIMIT` of them per snapshot; a field of one
  point is the variable named like the field, a larger one gives ``<field>_<point>``).

Example::

    lift:
      - kind: pointwise
        terms: [x, square]
        fields: [T]
      - kind: delays
        count: 4
      - kind: monomials
        degree: 2
        on: coefficients
"""

from __future__ import annotations

from typing import Annotated, Any, Literal

from pydantic import BaseModel, ConfigDict, Field, field_validator, model_validator

from snaplift.errors import ConfigError
from snaplift.fit_methods import FIT_METHODS

__all__ = [
    "STATE_LIMIT",
    "LiftEntry",
    "DelaysEntry",
    "PointwiseEntry",
    "MonomialsEntry",
    "FourierEntry",
    "RadialEntry",
    "ExpressionsEntry",
    "IdentityEntry",
    "RAW_KINDS",
    "STATE_KINDS",
    "field_lift",
    "state_dictionary",
    "state_entries",
    "state_source",
]

#: most raw values per snapshot a state dictionary (``on: state``) may lift; larger
#: states are lifted on their reduced coefficients (common practice: a few hundred
#: variables already give tens of thousands of degree-2 monomials)
STATE_LIMIT = 500

RAW_KINDS = ("delays", "pointwise")
STATE_KINDS = ("monomials", "fourier", "rbf", "expressions", "identity")


class _Entry(BaseModel):
    model_config = ConfigDict(extra="forbid", frozen=True)


class DelaysEntry(_Entry):
    """Hankel stacking of the raw fields: ``count`` copies in all (the field and ``count - 1`` delayed
    copies: the window length), ``spacing`` selected snapshots apart."""

    kind: Literal["delays"]
    count: int = Field(ge=2, description="copies in the window, the undelayed one included (2 or more)")
    spacing: int = Field(1, ge=1, description="selected snapshots between copies")


class PointwiseEntry(_Entry):
    """Pointwise functions of every point of the raw fields."""

    kind: Literal["pointwise"]
    terms: list[Literal["x", "square", "cube", "abs", "sin", "cos"]] = Field(min_length=1)
    fields: list[str] | None = Field(None, description="archive fields lifted (default: all)")

    @field_validator("terms")
    @classmethod
    def _distinct(cls, value: list[str]) -> list[str]:
        repeated = [t for i, t in enumerate(value) if t in value[:i]]
        if repeated:
            raise ValueError(f"term {repeated[0]!r} is listed twice")
        return value


class _StateEntry(_Entry):
    on: Literal["coefficients", "state"] = "coefficients"

    @model_validator(mode="before")
    @classmethod
    def _yaml_on(cls, data: Any) -> Any:
        # YAML 1.1 (PyYAML) reads an unquoted key `on` as the boolean true
        if isinstance(data, dict) and True in data and "on" not in data:
            data = {("on" if key is True else key): value for key, value in data.items()}
        return data


class MonomialsEntry(_StateEntry):
    """All monomials up to ``degree`` (constant and linear terms included)."""

    kind: Literal["monomials"]
    degree: int = Field(ge=1, le=30)


class FourierEntry(_StateEntry):
    """``sin(k x), cos(k x)`` for k = 1..harmonics of every variable."""

    kind: Literal["fourier"]
    harmonics: int = Field(ge=1)
    scale: bool = Field(False, description="map each variable's range to [-pi, pi] first")


class RadialEntry(_StateEntry):
    """Radial basis functions around k-means centres, width from the median distance."""

    kind: Literal["rbf"]
    function: Literal["gaussian", "thin_plate"] = Field(
        "gaussian", description="the radial function; its width (the 'shape parameter') is the median distance")
    centres: int = Field(10, ge=1)
    seed: int = Field(0, ge=0)

    @model_validator(mode="before")
    @classmethod
    def _renamed(cls, data: Any) -> Any:
        # in RBF practice the "shape parameter" is the width: the choice of function is 'function'
        if isinstance(data, dict) and "shape" in data:
            raise ValueError(f"rbf key 'shape' ({data['shape']!r}) is now 'function': write "
                             f"function: {data['shape']} (gaussian | thin_plate)")
        return data


class ExpressionsEntry(_StateEntry):
    """User formulas over the state variables ``{name: formula}`` (whitelisted numpy functions)."""

    kind: Literal["expressions"]
    formulas: dict[str, str] = Field(min_length=1)

    @field_validator("formulas")
    @classmethod
    def _parse(cls, value: dict[str, str]) -> dict[str, str]:
        from snaplift.lifting.expressions import parse_formulas

        try:
            parse_formulas(value)
        except ConfigError as error:
            raise ValueError(str(error)) from None
        return value


class IdentityEntry(_StateEntry):
    """The state variables themselves (makes the way back to the state exact)."""

    kind: Literal["identity"]


LiftEntry = Annotated[
    DelaysEntry | PointwiseEntry | MonomialsEntry | FourierEntry | RadialEntry | ExpressionsEntry | IdentityEntry,
    Field(discriminator="kind"),
]


def check_lift(entries: list[Any], fields: list[str], fit_method: str) -> None:
    """Rules across entries (raises ValueError with the entry's position)."""
    seen: dict[str, int] = {}
    for index, entry in enumerate(entries):
        if entry.kind in RAW_KINDS:
            if entry.kind in seen:
                raise ValueError(f"lift[{index}]: only one '{entry.kind}' entry is allowed "
                                 f"(lift[{seen[entry.kind]}] is one already)")
            seen[entry.kind] = index
        if isinstance(entry, PointwiseEntry) and entry.fields is not None:
            unknown = [f for f in entry.fields if f not in fields]
            if unknown:
                raise ValueError(f"lift[{index}].fields: {unknown} not among archive.fields {fields}")
    states = state_entries(entries)
    sources = {entry.on for _, entry in states}
    if len(sources) > 1:
        raise ValueError("lift: every state dictionary entry must use the same 'on' (coefficients or state); "
                         f"got {sorted(sources)}")
    lifting = [info.name for info in FIT_METHODS.values() if info.dictionary]  # from the registry: edmd
    if states and fit_method not in lifting:
        index, entry = states[0]
        raise ValueError(f"lift[{index}] ({entry.kind}) is a dictionary on a state: it needs fit.method: "
                         f"{' or '.join(lifting)}, not {fit_method!r}")
    if fit_method in lifting and not states:
        raise ValueError(f"fit.method {fit_method} needs a dictionary in lift: at least one of "
                         f"{', '.join(STATE_KINDS)} (e.g. - kind: monomials, degree: 2)")
    if states and sources == {"state"} and any(e.kind in RAW_KINDS for e in entries):
        raise ValueError("lift: pointwise/delays entries lift the fields for compress; a dictionary "
                         "with on: state lifts the raw state instead; use on: coefficients with them")


def state_entries(entries: list[Any]) -> list[tuple[int, Any]]:
    return [(i, e) for i, e in enumerate(entries) if e.kind in STATE_KINDS]


def state_source(entries: list[Any]) -> str | None:
    """``"coefficients"``, ``"state"`` or None (no state dictionary)."""
    states = state_entries(entries)
    return states[0][1].on if states else None


def field_lift(entries: list[Any]) -> Any:
    """The :class:`~snaplift.lifting.FieldLift` of the raw-field entries, or None."""
    from snaplift.lifting import FieldLift

    pointwise = next((e for e in entries if isinstance(e, PointwiseEntry)), None)
    delays = next((e for e in entries if isinstance(e, DelaysEntry)), None)
    if pointwise is None and delays is None:
        return None
    return FieldLift(
        terms=tuple(pointwise.terms) if pointwise else ("x",),
        fields=tuple(pointwise.fields) if pointwise and pointwise.fields is not None else None,
        delays=delays.count if delays else 1,
        spacing=delays.spacing if delays else 1,
    )


def state_dictionary(entries: list[Any], variables: list[str]) -> Any:
    """The :class:`~snaplift.lifting.Dictionary` of the state entries over ``variables``."""
    from snaplift.lifting import Dictionary, expressions, fourier, identity, monomials, rbf
    from snaplift.lifting._base import DictionaryPart

    parts: list[DictionaryPart] = []
    for _, entry in state_entries(entries):
        if isinstance(entry, MonomialsEntry):
            parts.append(monomials(entry.degree))
        elif isinstance(entry, FourierEntry):
            parts.append(fourier(entry.harmonics, scale=entry.scale))
        elif isinstance(entry, RadialEntry):
            parts.append(rbf(entry.function, centres=entry.centres, seed=entry.seed))
        elif isinstance(entry, ExpressionsEntry):
            parts.append(expressions(entry.formulas, variables=variables))
        else:
            parts.append(identity())
    return Dictionary(parts, variables=variables)
