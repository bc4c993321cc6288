"""The fit methods: one registry of what each method is and what it needs.

Every place that needs to know the fit methods asks this module: the workflow schema
(the allowed values of ``fit.method`` and which ``fit:`` keys apply to which method),
the scan (whether uneven time steps are allowed), the command line (the help of
``snaplift run``) and the fit stage. The fits themselves (arrays in, one
:class:`~snaplift.fitting.methods.FitResult` out) are bound to the names by
:data:`snaplift.fitting.methods.FIT_METHODS`, one layer up, since they need numpy and
scipy; ``tests/fitting/test_fit_method_conformance.py`` runs every method of
:data:`FIT_METHODS` against a linear system whose eigenvalues are known.

Like :mod:`snaplift.compress_methods` the module is plain data (no numpy), so the
command line can list the methods without importing the numerics.

References
----------
- dmd: Schmid (2010), J. Fluid Mech. 656; Tu, Rowley, Luchtenburg, Brunton & Kutz (2014),
  J. Comput. Dyn. 1(2); affine term: Hirsh, Harris, Kutz & Brunton (2020), SIAM J. Appl.
  Dyn. Syst. 19(3); debiasing: Dawson, Hemati, Williams & Rowley (2016), Exp. Fluids 57;
  Hemati, Rowley, Deem & Cattafesta (2017), Theor. Comput. Fluid Dyn. 31.
- edmd: Williams, Kevrekidis & Rowley (2015), J. Nonlinear Sci. 25.
- optimized: Askham & Kutz (2018), SIAM J. Appl. Dyn. Syst. 17(1).
- residuals of every method: Colbrook & Townsend (2024), Comm. Pure Appl. Math. 77(1).
"""

from __future__ import annotations

from collections.abc import Mapping
from dataclasses import dataclass

from snaplift.errors import ConfigError

__all__ = ["FIT_METHODS", "FIT_METHOD_NAMES", "FitMethodInfo", "fit_methods_help", "get_fit_method"]


@dataclass(frozen=True)
class FitMethodInfo:
    """What a fit method is and needs (its fit: :data:`snaplift.fitting.methods.FIT_METHODS`).

    ``uniform_steps``: the snapshots must be evenly spaced in time; ``single_run``: it fits
    one run only; ``real_data``: complex data are refused; ``dictionary``: it lifts the
    state with the ``lift:`` dictionary; ``integer_rank``: ``fit.rank`` can only be a
    count (not an energy fraction or ``optimal``); ``options``: the ``fit:`` keys beyond
    ``rank``, ``holdout``, ``seed`` and ``trust_threshold`` that apply to it.
    """

    name: str
    summary: str
    uniform_steps: bool
    single_run: bool
    real_data: bool
    dictionary: bool
    integer_rank: bool
    options: tuple[str, ...]

    def needs(self) -> str:
        """What the method asks of the data, in words (``"evenly spaced snapshots, ..."``)."""
        words = ["evenly spaced snapshots" if self.uniform_steps else "any time steps",
                 "one run" if self.single_run else "one or more runs",
                 "real data" if self.real_data else "real or complex data"]
        if self.dictionary:
            words.append("a dictionary (lift:)")
        return ", ".join(words)


#: every fit method by name, in the order the help lists them
FIT_METHODS: Mapping[str, FitMethodInfo] = {info.name: info for info in (
    FitMethodInfo("dmd", "DMD of the coefficients, affine when centred, optional debiasing (Schmid 2010; "
                  "Tu et al. 2014)", uniform_steps=True, single_run=False, real_data=False, dictionary=False,
                  integer_rank=False, options=("debias",)),
    FitMethodInfo("edmd", "EDMD of a dictionary of the coefficients or the state (Williams et al. 2015)",
                  uniform_steps=True, single_run=False, real_data=True, dictionary=True, integer_rank=False,
                  options=("coefficients",)),
    FitMethodInfo("optimized", "optimized DMD by variable projection, any time steps (Askham & Kutz 2018)",
                  uniform_steps=False, single_run=True, real_data=False, dictionary=False, integer_rank=True,
                  options=("coefficients",)),
)}
FIT_METHOD_NAMES: tuple[str, ...] = tuple(FIT_METHODS)


def get_fit_method(name: str, *, key: str = "fit.method") -> FitMethodInfo:
    """The method called ``name``; a :class:`~snaplift.errors.ConfigError` naming the choices otherwise."""
    try:
        return FIT_METHODS[name]
    except (KeyError, TypeError):
        raise ConfigError(f"{key} {name!r} is not one of {', '.join(FIT_METHOD_NAMES)}") from None


def fit_methods_help() -> str:
    """One line per method for ``--help`` texts: ``dmd: DMD of ...; edmd: ...``."""
    return "; ".join(f"{info.name}: {info.summary}" for info in FIT_METHODS.values())
