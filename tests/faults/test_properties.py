"""Issue 11: property tests (hypothesis) over the workflow schema and the formula evaluator.

Any input gives a valid result or a clean one-line SnapliftError within a time limit
(hypothesis' per-example deadline): never another exception, never a hang.
"""

from __future__ import annotations

import datetime
import math
from pathlib import Path
from typing import Any

import numpy as np
import yaml
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from snaplift.errors import ConfigError, SnapliftError, one_line
from snaplift.lifting.expressions import FUNCTIONS, parse_formula
from snaplift.workflow.schema import Workflow, load_workflow, parse_workflow

LIMIT = settings(max_examples=150, deadline=datetime.timedelta(seconds=2),
                 suppress_health_check=[HealthCheck.too_slow, HealthCheck.function_scoped_fixture])

VALID: dict[str, Any] = {"archive": {"path": "a.h5", "fields": ["u"], "time": "t"},
                         "compress": {"method": "randomized", "rank": 6}, "fit": {"rank": 4},
                         "output": {"path": "r.zarr"}, "cluster": "threads"}

scalars = st.one_of(st.none(), st.booleans(), st.integers(), st.floats(allow_nan=True), st.text(max_size=30))
values = st.recursive(scalars, lambda inner: st.one_of(st.lists(inner, max_size=4),
                                                       st.dictionaries(st.text(max_size=12), inner, max_size=4)),
                      max_leaves=20)
keys = st.sampled_from(["archive", "prepare", "lift", "compress", "fit", "output", "cluster", "extra"])
inner_keys = st.sampled_from(["path", "fields", "time", "step", "rank", "method", "oversample", "memory",
                              "power_iterations", "seed", "kind", "scale", "center", "holdout", "weights",
                              "missing_chunks", "snapshots", "coefficients", "debias", "bogus"])


def _clean(outcome: Any) -> None:
    assert isinstance(outcome, Workflow)


def _check_error(error: SnapliftError) -> None:
    line = one_line(error)
    assert line and "Traceback" not in line and len(line) <= 2100


@LIMIT
@given(data=values)
def test_any_mapping_is_a_workflow_or_a_clean_error(data: Any) -> None:
    try:
        _clean(parse_workflow(data))
    except SnapliftError as error:
        _check_error(error)


@LIMIT
@given(section=keys, key=inner_keys, value=values)
def test_one_changed_setting_is_a_workflow_or_a_clean_error(section: str, key: str, value: Any) -> None:
    data = {name: (dict(v) if isinstance(v, dict) else v) for name, v in VALID.items()}
    if isinstance(data.get(section), dict):
        data[section][key] = value
    else:
        data[section] = {key: value}
    try:
        _clean(parse_workflow(data))
    except SnapliftError as error:
        _check_error(error)


@LIMIT
@given(text=st.text(alphabet=st.sampled_from(list("&*ab:[]{}, -\n'\"!|>#0123456789")), max_size=200))
def test_any_yaml_text_is_a_workflow_or_a_clean_error(tmp_path: Path, text: str) -> None:
    path = tmp_path / "w.yaml"
    path.write_text(text)
    try:
        _clean(load_workflow(path)[0])
    except SnapliftError as error:
        _check_error(error)


# -- the formula evaluator ------------------------------------------------------------------
VARIABLES = ("c0", "c1", "c2")
formula_characters = st.sampled_from(list("c012 +-*/().,e") + ["sin", "arctan2", "pi", "**", "1e308", "9" * 20,
                                                                 "__", "import", "[", "]", "'", "lambda", "="])


@LIMIT
@given(parts=st.lists(formula_characters, max_size=40))
def test_any_formula_text_parses_or_fails_cleanly(parts: list[str]) -> None:
    text = "".join(parts)
    rng = np.random.default_rng(0)
    state = {name: rng.standard_normal(5) for name in VARIABLES}
    try:
        formula = parse_formula("f", text)
    except ConfigError as error:
        _check_error(error)
        return
    try:
        result = formula.evaluate(state, n_samples=5)
    except ConfigError as error:  # a name the state does not have
        _check_error(error)
        return
    assert result.shape == (5,)


def _trees(depth: int) -> st.SearchStrategy[tuple[str, Any]]:
    """(formula text, reference function of the state): the reference is plain numpy."""
    leaves = st.one_of(
        st.sampled_from(VARIABLES).map(lambda name: (name, lambda s, n=name: s[n])),
        st.floats(min_value=-1e3, max_value=1e3, allow_nan=False).map(lambda v: (repr(v), lambda s, v=v: v)),
    )
    if depth == 0:
        return leaves
    child = _trees(depth - 1)
    unary = st.tuples(st.sampled_from(["sin", "cos", "tanh", "abs", "exp"]), child).map(
        lambda t: (f"{t[0]}({t[1][0]})", lambda s, f=FUNCTIONS[t[0]][0], g=t[1][1]: f(g(s))))
    binary = st.tuples(st.sampled_from(["+", "-", "*"]), child, child).map(
        lambda t: (f"({t[1][0]}) {t[0]} ({t[2][0]})",
                   lambda s, op=t[0], a=t[1][1], b=t[2][1]: {"+": np.add, "-": np.subtract,
                                                              "*": np.multiply}[op](a(s), b(s))))
    chain = st.lists(child, min_size=2, max_size=30).map(
        lambda items: (" + ".join(f"({text})" for text, _ in items),
                       lambda s, fs=tuple(f for _, f in items): _left_sum([f(s) for f in fs])))
    return st.one_of(leaves, unary, binary, chain)


def _left_sum(terms: list[Any]) -> Any:
    total = terms[0]
    for term in terms[1:]:
        total = np.add(total, term)
    return total


@LIMIT
@given(tree=_trees(3))
def test_generated_formulas_evaluate_like_numpy(tree: tuple[str, Any]) -> None:
    text, reference = tree
    if len(text) > 2000:
        return  # longer formulas are refused by design (MAX_LENGTH)
    rng = np.random.default_rng(1)
    state = {name: rng.standard_normal(4) for name in VARIABLES}
    with np.errstate(all="ignore"):
        expected = np.broadcast_to(np.asarray(reference(state), dtype=np.float64), (4,))
        got = parse_formula("f", text).evaluate(state, n_samples=4)
    # reference: numpy applied to the same tree (the evaluator is numpy; same order of operations)
    finite = np.isfinite(expected)
    np.testing.assert_array_equal(np.isfinite(got), finite)
    np.testing.assert_allclose(got[finite], expected[finite], rtol=1e-12, atol=0)
    assert all(math.isnan(a) == math.isnan(b) for a, b in zip(got[~finite], expected[~finite]))


def test_yaml_dump_of_the_valid_example_round_trips(tmp_path: Path) -> None:
    # the baseline the properties perturb is itself valid
    path = tmp_path / "w.yaml"
    path.write_text(yaml.safe_dump(VALID))
    assert isinstance(load_workflow(path)[0], Workflow)
