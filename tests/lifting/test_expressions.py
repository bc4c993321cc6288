"""The whitelist formula evaluator: values, and errors that name the position."""

from __future__ import annotations

import pickle

import numpy as np
import pytest

from snaplift.errors import ConfigError
from snaplift.lifting import Dictionary, expressions, parse_formula

STATE = np.array([[0.3, -1.1, 2.0], [1.5, 0.2, -0.7]])


def test_values_match_numpy():
    part = expressions(
        {
            "energy": "0.5 * omega**2 - cos(theta)",
            "mix": "arctan2(theta, omega) + maximum(theta, omega) - minimum(theta, 0)",
            "other": "exp(-theta**2) * sqrt(abs(omega)) / (1 + tanh(omega)**2) + log(2)",
            "neg": "-(theta - +omega) * pi + e",
        },
        variables=["theta", "omega"],
    )
    theta, omega = STATE
    expected = [
        0.5 * omega**2 - np.cos(theta),
        np.arctan2(theta, omega) + np.maximum(theta, omega) - np.minimum(theta, 0),
        np.exp(-(theta**2)) * np.sqrt(np.abs(omega)) / (1 + np.tanh(omega) ** 2) + np.log(2),
        -(theta - omega) * np.pi + np.e,
    ]
    np.testing.assert_allclose(part(STATE), expected, rtol=1e-15)  # numpy is the reference


def test_description_finds_identity_and_constant_terms():
    part = expressions(
        {"t": "theta", "one": "1.0", "s": "sin(omega)"}, variables=["theta", "omega"]
    )
    description = part.describe(["theta", "omega"])
    assert description.identity_rows == (0, None) and description.constant_row == 1
    np.testing.assert_array_equal(part(STATE)[1], np.ones(3))


@pytest.mark.parametrize(
    ("formula", "position", "words"),
    [
        ("x0 +* 2", 5, "invalid syntax"),
        ("x0.real", 1, "attribute"),
        ("__import__('os').system('true')", 1, "may be called"),
        ("__import__('os')", 1, "'__import__' is not allowed"),
        ("(lambda: 1)()", 1, "may be called"),
        ("x0 if x0 else x1", 1, "if-expression"),
        ("x0 < 1", 1, "comparison"),
        ("sin(x0, x1)", 1, "takes 1 argument"),
        ("exp(x=x0)", 7, "keyword"),
        ("x0 // 2", 1, "FloorDiv"),
        ("x0 + 'a'", 6, "constant 'a'"),
        ("x1 + [1]", 6, "a list"),
        ("2 * sin", 5, "without a call"),
        ("  x0 ** ", 8, "unexpected end of formula"),
        ("(x0", 1, "never closed"),
        ("not x0", 1, "Not"),
        ("1j * x0", 1, "only real numbers"),
    ],
)
def test_bad_formulas_name_the_formula_and_position(formula, position, words):
    with pytest.raises(ConfigError) as caught:
        parse_formula("term", formula)
    message = str(caught.value)
    assert "'term'" in message and repr(formula) in message
    assert f"position {position}:" in message
    assert words in message


def test_unknown_variable_is_reported_with_its_position():
    with pytest.raises(ConfigError, match=r"position 7: unknown name 'phi'"):
        expressions({"t": "theta*phi"}, variables=["theta", "omega"])
    part = expressions({"t": "x0 + y"})
    with pytest.raises(ConfigError, match="unknown name 'y'"):
        part(STATE)


def test_no_code_is_run_and_huge_powers_stay_cheap():
    # A Python-integer power tower would take forever; floats overflow to inf at once.
    assert np.isinf(parse_formula("big", "9**9**9").evaluate({}, 2)).all()
    with pytest.raises(ConfigError, match="non-finite|is inf"):
        Dictionary([expressions({"big": "9**9**9 * x0"})])(STATE)


def test_domain_errors_name_the_sample():
    with pytest.raises(ConfigError, match=r"'l' = 'log\(x0\)' is nan at sample 1 \(x0=-1\.1\)"):
        expressions({"l": "log(x0)"})(STATE)


def test_formulas_pickle_and_compare():
    part = expressions({"a": "x0 * x1"})
    clone = pickle.loads(pickle.dumps(part))
    assert clone == part
    np.testing.assert_array_equal(clone(STATE), part(STATE))


def test_structure_errors():
    with pytest.raises(ConfigError, match="non-empty mapping"):
        expressions({})
    with pytest.raises(ConfigError, match="empty"):
        expressions({"a": "  "})
    with pytest.raises(ConfigError, match="line break"):
        expressions({"a": "x0 +\n x1"})
    with pytest.raises(ConfigError, match="reserved"):
        expressions({"a": "x0"}, variables=["sin", "x1"])
    with pytest.raises(ConfigError, match="given twice"):
        expressions({"a": "x0"}, variables=["x", "x"])
    with pytest.raises(ConfigError, match="at most"):
        expressions({"a": "+".join(["x0"] * 1500)})
