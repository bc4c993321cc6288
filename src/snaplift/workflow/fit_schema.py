"""The ``lift`` and ``fit`` sections of the workflow file (part of the schema).

``lift:`` is an ordered list of dictionary parts, each a mapping with a ``kind``:

- on the raw field, fused into the archive read (never stored):
  ``{kind: delays, count: 8, spacing: 1}`` and
  ``{kind: pointwise, functions: [x, square], fields: [T]}``;
- on a small state, evaluated after compression: ``monomials``, ``fourier``, ``rbf``,
  ``identity``, ``expressions``, each with ``on: coefficients`` (the reduced coefficients,
  default) or ``on: state`` (the raw masked state, at most :data:`STATE_LIMIT` values).

``fit:`` keeps ``{method: dmd, rank: 20}`` valid and adds ``edmd`` and ``optimized``,
debiasing, the held-out fraction for residuals and the trust threshold.
"""

from __future__ import annotations

from typing import Annotated, Literal, Union

from pydantic import BaseModel, ConfigDict, Field, field_validator, model_validator

__all__ = [
    "STATE_LIMIT",
    "LiftEntry",
    "DelaysLift",
    "PointwiseLift",
    "MonomialsLift",
    "FourierLift",
    "RBFLift",
    "IdentityLift",
    "ExpressionsLift",
    "EnergyRank",
    "FitSection",
    "RAW_KINDS",
]

#: largest raw state (values per snapshot) that ``on: state`` accepts; beyond it the
#: dictionary grows too fast and the reduced coefficients are the right state
STATE_LIMIT = 500
RAW_KINDS = ("delays", "pointwise")


class _Entry(BaseModel):
    model_config = ConfigDict(extra="forbid", frozen=True)


class DelaysLift(_Entry):
    kind: Literal["delays"]
    count: int = Field(ge=2, description="number of shifted copies stacked (Hankel rows)")
    spacing: int = Field(1, ge=1, description="snapshots between consecutive copies")


class PointwiseLift(_Entry):
    kind: Literal["pointwise"]
    functions: list[Literal["x", "square", "cube", "abs", "sin", "cos"]] = Field(min_length=1)
    fields: list[str] | None = Field(None, description="fields to lift (default: all)")


class _StatePart(_Entry):
    on: Literal["coefficients", "state"] = "coefficients"


class MonomialsLift(_StatePart):
    kind: Literal["monomials"]
    degree: int = Field(ge=1, le=20)


class FourierLift(_StatePart):
    kind: Literal["fourier"]
    harmonics: int = Field(ge=1)
    scale: bool = False


class RBFLift(_StatePart):
    kind: Literal["rbf"]
    function: Literal["gaussian", "thin_plate"] = "gaussian"
    centres: int = Field(10, ge=1)
    seed: int = Field(0, ge=0)


class IdentityLift(_StatePart):
    kind: Literal["identity"]


class ExpressionsLift(_StatePart):
    kind: Literal["expressions"]
    formulas: dict[str, str] = Field(min_length=1)
    variables: list[str] | None = None

    @field_validator("formulas")
    @classmethod
    def _parse(cls, value: dict[str, str]) -> dict[str, str]:
        from snaplift.errors import ConfigError
        from snaplift.lifting import parse_formula

        for name, text in value.items():
            try:
                parse_formula(name, text)
            except ConfigError as error:
                raise ValueError(str(error)) from None
        return value


LiftEntry = Annotated[
    Union[DelaysLift, PointwiseLift, MonomialsLift, FourierLift, RBFLift, IdentityLift, ExpressionsLift],
    Field(discriminator="kind"),
]


class EnergyRank(_Entry):
    energy: float = Field(gt=0, lt=1, description="smallest rank keeping this fraction of the energy")


class FitSection(_Entry):
    method: Literal["dmd", "edmd", "optimized"] = "dmd"
    rank: int | Literal["optimal"] | EnergyRank | None = Field(
        None, description="a number, {energy: 0.999}, or optimal (Gavish & Donoho 2014)"
    )
    debias: Literal["none", "forward-backward", "total-least-squares"] = "none"
    holdout: float = Field(0.2, ge=0, lt=0.9, description="fraction of pairs held out for residuals")
    trust_threshold: float = Field(0.01, gt=0, description="residual below which an eigenvalue is trusted")
    seed: int = Field(0, ge=0, description="seed of the held-out pair choice")

    @field_validator("rank")
    @classmethod
    def _positive(cls, value):
        if isinstance(value, int) and not isinstance(value, bool) and value < 1:
            raise ValueError("must be at least 1")
        return value

    @model_validator(mode="after")
    def _method_options(self) -> FitSection:
        if self.debias != "none" and self.method != "dmd":
            raise ValueError(f"debias: {self.debias} applies to method dmd only, not {self.method}")
        if self.method == "optimized" and not isinstance(self.rank, int):
            raise ValueError("method optimized needs an integer rank (number of exponentials)")
        return self

    def rank_argument(self) -> int | float | str | None:
        """The ``rank`` argument of the fitting functions."""
        if isinstance(self.rank, EnergyRank):
            return float(self.rank.energy)
        return self.rank


def check_lift(entries: list, fields: list[str], method: str) -> None:
    """Order and combination rules of ``lift`` with ``fit.method`` (raises ValueError)."""
    seen_state = False
    places = set()
    for position, entry in enumerate(entries):
        if entry.kind in RAW_KINDS:
            if seen_state:
                raise ValueError(
                    f"lift[{position}] ({entry.kind}) acts on the raw field and must come before the "
                    "dictionary parts on the state"
                )
            if entry.kind == "pointwise" and entry.fields:
                unknown = sorted(set(entry.fields) - set(fields))
                if unknown:
                    raise ValueError(f"lift[{position}].fields {unknown} are not archive fields {fields}")
        else:
            seen_state = True
            places.add(entry.on)
    if len(places) > 1:
        raise ValueError("all dictionary parts on the state must use the same 'on' (coefficients or state)")
    if [e.kind for e in entries].count("delays") > 1:
        raise ValueError("lift may hold at most one delays entry")
    if seen_state and method != "edmd":
        raise ValueError(f"dictionary parts on the state need fit.method: edmd, not {method}")
    if method == "edmd" and not seen_state:
        raise ValueError("fit.method edmd needs at least one dictionary part on the state in lift "
                         "(monomials, fourier, rbf, identity or expressions)")
