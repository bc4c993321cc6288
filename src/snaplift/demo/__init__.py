"""Invented demo data: cooling air past a heated fin in a duct (lattice-Boltzmann model).

The archive is made-up data for trying snaplift out, not a validated simulation; see
:mod:`snaplift.demo.fin_duct` for the scenario and sizes and :mod:`snaplift.demo.lbm`
for the small solver behind it.
"""

from __future__ import annotations

from snaplift.demo.fin_duct import (
    FinDuctPlan,
    default_cache_path,
    ensure_fin_duct,
    fin_duct_geometry,
    generate_fin_duct,
    plan_fin_duct,
)

__all__ = [
    "FinDuctPlan",
    "default_cache_path",
    "ensure_fin_duct",
    "fin_duct_geometry",
    "generate_fin_duct",
    "plan_fin_duct",
]
