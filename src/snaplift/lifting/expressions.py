"""User formulas over named state variables, parsed by a whitelist evaluator.

A formula such as ``"sin(theta) * omega**2"`` is parsed with :func:`ast.parse` into a
syntax tree only; nothing in the user's text is ever executed (no ``eval``, ``exec`` or
``compile`` to code). The tree is checked against a whitelist and turned into a small
tree of our own nodes that evaluates with numpy functions:

- numbers (int or float literals; kept as float64 so that ``9**9**9`` is ``inf``, not a
  Python integer that takes hours to compute), the constants ``pi`` and ``e``;
- variable names of the state;
- ``+ - * / **``, unary ``-`` and ``+``, parentheses;
- calls of the functions in :data:`FUNCTIONS` with positional arguments only.

Anything else (attributes, subscripts, keywords, comparisons, strings, lambdas, ...) is a
:class:`~snaplift.errors.ConfigError` naming the formula, the character position
(counted from 1) and what is wrong.
"""

from __future__ import annotations

import ast
from collections.abc import Callable, Mapping, Sequence
from dataclasses import dataclass
from typing import Any

import numpy as np

from snaplift.errors import ConfigError
from snaplift.lifting._base import Description, DictionaryPart, check_variable_names

__all__ = ["FUNCTIONS", "CONSTANTS", "Formula", "Expressions", "parse_formula", "expressions"]

#: allowed functions: name -> (numpy function, number of arguments)
FUNCTIONS: dict[str, tuple[Callable[..., np.ndarray], int]] = {
    "sin": (np.sin, 1),
    "cos": (np.cos, 1),
    "tan": (np.tan, 1),
    "arcsin": (np.arcsin, 1),
    "arccos": (np.arccos, 1),
    "arctan": (np.arctan, 1),
    "sinh": (np.sinh, 1),
    "cosh": (np.cosh, 1),
    "tanh": (np.tanh, 1),
    "exp": (np.exp, 1),
    "log": (np.log, 1),
    "log10": (np.log10, 1),
    "sqrt": (np.sqrt, 1),
    "abs": (np.abs, 1),
    "sign": (np.sign, 1),
    "arctan2": (np.arctan2, 2),
    "minimum": (np.minimum, 2),
    "maximum": (np.maximum, 2),
}

#: named constants a formula may use
CONSTANTS: dict[str, float] = {"pi": float(np.pi), "e": float(np.e)}

#: longest formula accepted, and deepest nesting: keeps parsing and evaluation bounded
MAX_LENGTH = 2000
MAX_DEPTH = 60

_BINARY: dict[type[ast.operator], Callable[[np.ndarray, np.ndarray], np.ndarray]] = {
    ast.Add: np.add,
    ast.Sub: np.subtract,
    ast.Mult: np.multiply,
    ast.Div: np.divide,
    ast.Pow: np.power,
}
_UNARY: dict[type[ast.unaryop], Callable[[np.ndarray], np.ndarray]] = {
    ast.USub: np.negative,
    ast.UAdd: np.positive,
}
_SYMBOL = {ast.Add: "+", ast.Sub: "-", ast.Mult: "*", ast.Div: "/", ast.Pow: "**"}
_BY_SYMBOL: dict[str, Callable[..., Any]] = {_SYMBOL[k]: f for k, f in _BINARY.items()}


# Our own evaluation tree: tuples of plain values, picklable, no Python code objects.
@dataclass(frozen=True)
class _Number:
    value: float


@dataclass(frozen=True)
class _Variable:
    name: str


@dataclass(frozen=True)
class _Apply:
    function: str  # key of _BINARY / _UNARY symbol, "sum" (a chain of + and -), or of FUNCTIONS
    arguments: tuple[_Node, ...]


_Node = _Number | _Variable | _Apply


@dataclass(frozen=True)
class Formula:
    """A parsed formula: evaluate it with ``formula.evaluate({"x0": array, ...})``.

    Attributes
    ----------
    name : str
        Name of the term the formula defines.
    text : str
        The formula as written.
    variables : tuple of str
        Variable names the formula uses, in order of first appearance.
    """

    name: str
    text: str
    variables: tuple[str, ...]
    _tree: _Node

    @property
    def identity_of(self) -> str | None:
        """The variable name if the formula is just that variable, else None."""
        return self._tree.name if isinstance(self._tree, _Variable) else None

    @property
    def is_constant(self) -> bool:
        """True if the formula uses no variable (its value is the same for every sample)."""
        return not self.variables

    def evaluate(
        self, values: Mapping[str, np.ndarray], n_samples: int | None = None
    ) -> np.ndarray:
        """Value of the formula on every sample.

        Parameters
        ----------
        values : mapping of str to ndarray, each shape (n_samples,)
            The state variables by name.
        n_samples : int, optional
            Length of the result when the formula uses no variable.

        Returns
        -------
        ndarray, shape (n_samples,)
        """
        missing = [name for name in self.variables if name not in values]
        if missing:
            raise ConfigError(
                f"expression {self.name!r} = {self.text!r} uses variable {missing[0]!r}, "
                f"which the state does not have; variables: {', '.join(values) or '(none)'}"
            )
        with np.errstate(all="ignore"):  # non-finite results are reported by the caller
            result = np.asarray(_evaluate(self._tree, values))
        if result.ndim == 0:
            size = n_samples if n_samples is not None else _common_size(values)
            result = np.full(size, result)
        return result


def parse_formula(name: str, text: str) -> Formula:
    """Parse one formula through the whitelist (see the module docstring).

    Parameters
    ----------
    name : str
        Name of the term (used in error messages and in the dictionary description).
    text : str
        The formula, a single-line arithmetic expression.

    Returns
    -------
    Formula

    Raises
    ------
    ConfigError
        Naming the formula, the 1-based character position and what is not allowed.

    Examples
    --------
    >>> f = parse_formula("energy", "0.5 * omega**2 - cos(theta)")
    >>> f.variables
    ('omega', 'theta')
    >>> float(f.evaluate({"theta": np.array([0.0]), "omega": np.array([2.0])})[0])
    1.0
    """
    if not isinstance(text, str):
        raise ConfigError(f"expression {name!r} must be a formula string; got {text!r}")
    if not text.strip():
        raise ConfigError(f"expression {name!r} is empty; write a formula such as 'x0 * x1'")
    if len(text) > MAX_LENGTH:
        raise ConfigError(
            f"expression {name!r} is {len(text)} characters long; at most {MAX_LENGTH} are allowed"
        )
    if "\n" in text or "\r" in text:
        position = min(i for i in (text.find("\n"), text.find("\r")) if i >= 0) + 1
        raise ConfigError(
            f"expression {name!r} = {text!r}, position {position}: line break; "
            "a formula is a single line"
        )
    try:
        tree = ast.parse(text.strip(), mode="eval")
    except SyntaxError as error:
        lead = len(text) - len(text.lstrip())
        stripped = text.strip()
        if not error.offset or error.offset > len(stripped):
            position, what = lead + len(stripped) + 1, "unexpected end of formula"
        else:
            position, what = lead + error.offset, "invalid syntax"
        raise ConfigError(
            f"expression {name!r} = {text!r}, position {position}: {what} ({error.msg})"
        ) from None
    except (ValueError, RecursionError, MemoryError) as error:  # e.g. null bytes, deep nesting
        raise ConfigError(f"expression {name!r} = {text!r} cannot be parsed: {error}") from None
    context = _Context(name, text, len(text) - len(text.lstrip()))
    node = context.convert(tree.body, depth=0)
    return Formula(name=name, text=text, variables=tuple(context.variables), _tree=node)


class _Context:
    """Converts a checked :mod:`ast` tree into our nodes, collecting variable names."""

    def __init__(self, name: str, text: str, lead: int) -> None:
        self.name, self.text, self.lead = name, text, lead
        self.variables: list[str] = []

    def fail(self, node: ast.AST, what: str) -> ConfigError:
        stripped = self.text.strip()
        offset = getattr(node, "col_offset", 0)
        # col_offset counts UTF-8 bytes; report characters.
        position = len(stripped.encode("utf-8")[:offset].decode("utf-8", "ignore")) + 1 + self.lead
        return ConfigError(f"expression {self.name!r} = {self.text!r}, position {position}: {what}")

    def convert(self, node: ast.AST, depth: int) -> _Node:
        if depth > MAX_DEPTH:
            raise self.fail(node, f"nesting deeper than {MAX_DEPTH} levels")
        if isinstance(node, ast.Constant):
            value = node.value
            if isinstance(value, bool) or not isinstance(value, (int, float)):
                raise self.fail(node, f"constant {_short(value)} is not allowed (only real numbers)")
            try:
                return _Number(float(value))
            except OverflowError:
                raise self.fail(node, f"the number {_short(value)} is too large for a float (at most about "
                                      "1.8e308)") from None
        if isinstance(node, ast.Name):
            if node.id in FUNCTIONS:
                raise self.fail(node, f"function {node.id!r} used without a call")
            if node.id in CONSTANTS:
                return _Number(CONSTANTS[node.id])
            if node.id not in self.variables:
                self.variables.append(node.id)
            return _Variable(node.id)
        if isinstance(node, ast.BinOp) and isinstance(node.op, (ast.Add, ast.Sub)):
            # a chain a + b - c + ... is one level, however long (summed left to right,
            # a - c as a + (-c): the same numbers as the nested form)
            terms: list[tuple[bool, ast.AST]] = []
            head: ast.AST = node
            while isinstance(head, ast.BinOp) and isinstance(head.op, (ast.Add, ast.Sub)):
                terms.append((isinstance(head.op, ast.Sub), head.right))
                head = head.left
            converted = [self.convert(head, depth + 1)]
            for negative, term in reversed(terms):
                operand = self.convert(term, depth + 1)
                converted.append(_Apply("neg", (operand,)) if negative else operand)
            return _Apply("sum", tuple(converted))
        if isinstance(node, ast.BinOp):
            kind = type(node.op)
            if kind not in _BINARY:
                raise self.fail(
                    node, f"operator {type(node.op).__name__} is not allowed (allowed: + - * / **)"
                )
            left = self.convert(node.left, depth + 1)
            right = self.convert(node.right, depth + 1)
            return _Apply(_SYMBOL[kind], (left, right))
        if isinstance(node, ast.UnaryOp):
            if type(node.op) not in _UNARY:
                raise self.fail(
                    node, f"operator {type(node.op).__name__} is not allowed (allowed unary: - +)"
                )
            symbol = "neg" if isinstance(node.op, ast.USub) else "pos"
            return _Apply(symbol, (self.convert(node.operand, depth + 1),))
        if isinstance(node, ast.Call):
            if not isinstance(node.func, ast.Name):
                raise self.fail(node, "only plain function names may be called, as in sin(x)")
            function = node.func.id
            if function not in FUNCTIONS:
                raise self.fail(
                    node, f"function {function!r} is not allowed; allowed: {', '.join(FUNCTIONS)}"
                )
            if node.keywords:
                raise self.fail(node.keywords[0].value, "keyword arguments are not allowed")
            count = FUNCTIONS[function][1]
            starred = [a for a in node.args if isinstance(a, ast.Starred)]
            if starred:
                raise self.fail(starred[0], f"argument unpacking (*) is not allowed; write {function}(x)"
                                if count == 1 else f"argument unpacking (*) is not allowed; write "
                                f"{function}(x, y)")
            if len(node.args) != count:
                raise self.fail(
                    node, f"{function}() takes {count} argument(s); got {len(node.args)}"
                )
            return _Apply(function, tuple(self.convert(a, depth + 1) for a in node.args))
        raise self.fail(node, f"{_describe(node)} is not allowed")


def _short(value: object, limit: int = 40) -> str:
    """A literal as written, cut to ``limit`` characters (a 300-digit number is not echoed whole)."""
    try:
        text = repr(value)
    except ValueError:  # an int too long to print
        return "(a number too long to print)"
    return text if len(text) <= limit else f"{text[:limit]}... ({len(text)} characters)"


def _describe(node: ast.AST) -> str:
    names = {
        ast.Attribute: "attribute access",
        ast.Subscript: "indexing",
        ast.Compare: "a comparison",
        ast.BoolOp: "a boolean operator",
        ast.Lambda: "a lambda",
        ast.IfExp: "an if-expression",
        ast.List: "a list",
        ast.Tuple: "a tuple",
        ast.Dict: "a dict",
        ast.Set: "a set",
        ast.JoinedStr: "a string",
        ast.ListComp: "a comprehension",
        ast.GeneratorExp: "a comprehension",
        ast.NamedExpr: "an assignment",
    }
    return names.get(type(node), f"syntax {type(node).__name__}")


def _evaluate(node: _Node, values: Mapping[str, np.ndarray]) -> np.ndarray | float:
    if isinstance(node, _Number):
        return np.float64(node.value)
    if isinstance(node, _Variable):
        return values[node.name]
    arguments = [_evaluate(a, values) for a in node.arguments]
    if node.function == "neg":
        return np.negative(arguments[0])
    if node.function == "pos":
        return np.positive(arguments[0])
    if node.function == "sum":
        total = arguments[0]
        for term in arguments[1:]:
            total = np.add(total, term)
        return total
    if node.function in _BY_SYMBOL:
        return _BY_SYMBOL[node.function](*arguments)
    return FUNCTIONS[node.function][0](*arguments)


def _common_size(values: Mapping[str, np.ndarray]) -> int:
    for array in values.values():
        return int(np.shape(array)[0])
    raise ConfigError("a formula without variables needs the number of samples")


def parse_formulas(formulas: Mapping[str, str]) -> tuple[Formula, ...]:
    """Parse ``{name: formula}`` in order; names must be non-empty strings."""
    if not isinstance(formulas, Mapping) or not formulas:
        raise ConfigError(
            f"expressions must be a non-empty mapping of term name to formula; got {formulas!r}"
        )
    parsed = []
    for name, text in formulas.items():
        if not isinstance(name, str) or not name.strip():
            raise ConfigError(f"expression names must be non-empty strings; got {name!r}")
        parsed.append(parse_formula(name, text))
    return tuple(parsed)


def check_variables(formulas: Sequence[Formula], variables: Sequence[str]) -> None:
    """ConfigError if a formula uses a name that is not a state variable."""
    known = set(variables)
    for formula in formulas:
        for name in formula.variables:
            if name not in known:
                position = _first_position(formula.text, name)
                raise ConfigError(
                    f"expression {formula.name!r} = {formula.text!r}, position {position}: "
                    f"unknown name {name!r}; state variables: {', '.join(variables)}; "
                    f"constants: {', '.join(CONSTANTS)}; functions: {', '.join(FUNCTIONS)}"
                )


def _first_position(text: str, name: str) -> int:
    """1-based position of ``name`` as a whole word in ``text`` (1 if not found)."""
    start = 0
    while True:
        index = text.find(name, start)
        if index < 0:
            return 1
        before = text[index - 1] if index > 0 else " "
        after = text[index + len(name)] if index + len(name) < len(text) else " "
        if not (before.isalnum() or before == "_") and not (after.isalnum() or after == "_"):
            return index + 1
        start = index + 1


@dataclass(frozen=True)
class Expressions(DictionaryPart):
    """User formulas over named state variables, one term per formula.

    Variable names come from ``variables`` if given, else from the enclosing
    :class:`~snaplift.lifting.Dictionary`, else they are ``x0, x1, ...``. A formula that
    is just a variable name (``"theta"``) counts as that variable's identity term; one
    without variables (``"1"``) counts as a constant.
    """

    formulas: tuple[Formula, ...]
    variables: tuple[str, ...] | None = None
    kind = "expressions"

    def size(self, n_state: int) -> int:
        return len(self.formulas)

    def describe(self, variables: Sequence[str]) -> Description:
        names = self._names(variables)
        check_variables(self.formulas, names)
        constant = next((i for i, f in enumerate(self.formulas) if f.is_constant), None)
        identity = tuple(
            next((i for i, f in enumerate(self.formulas) if f.identity_of == name), None)
            for name in names
        )
        return Description(tuple(f.name for f in self.formulas), constant, identity)

    def _names(self, variables: Sequence[str]) -> tuple[str, ...]:
        if self.variables is None:
            return tuple(variables)
        if len(self.variables) != len(variables):
            raise ConfigError(
                f"expressions were given {len(self.variables)} variable names "
                f"({', '.join(self.variables)}) but the state has {len(variables)} variables"
            )
        return self.variables

    def _terms(self, state: np.ndarray, variables: Sequence[str]) -> np.ndarray:
        names = self._names(variables)
        check_variables(self.formulas, names)
        values = {name: state[i] for i, name in enumerate(names)}
        out = np.empty((len(self.formulas), state.shape[1]))
        for row, formula in enumerate(self.formulas):
            result = formula.evaluate(values, state.shape[1])
            if np.iscomplexobj(result):
                raise ConfigError(
                    f"expression {formula.name!r} = {formula.text!r} gives complex values"
                )
            bad = np.flatnonzero(~np.isfinite(result))
            if bad.size:
                at = ", ".join(f"{n}={values[n][bad[0]]:.6g}" for n in formula.variables)
                raise ConfigError(
                    f"expression {formula.name!r} = {formula.text!r} is {result[bad[0]]} at "
                    f"sample {bad[0]} ({at}); {bad.size} non-finite values in all: change "
                    "the formula (e.g. log(abs(x) + 1)) or the data range"
                )
            out[row] = result
        return out

    def settings(self) -> dict[str, Any]:
        found: dict[str, Any] = {
            "kind": self.kind,
            "formulas": {f.name: f.text for f in self.formulas},
        }
        if self.variables is not None:
            found["variables"] = list(self.variables)
        return found


def expressions(
    formulas: Mapping[str, str], *, variables: Sequence[str] | None = None
) -> Expressions:
    """Terms defined by user formulas ``{name: formula}`` (see the module docstring).

    Parameters
    ----------
    formulas : mapping of str to str
        Term name to formula, in the order the terms should appear.
    variables : sequence of str, optional
        Names of the state variables (rows of the state), e.g. ``["theta", "omega"]``.

    Raises
    ------
    ConfigError
        For a formula outside the whitelist (with its position) or bad variable names.

    Examples
    --------
    >>> part = expressions({"energy": "0.5*omega**2 - cos(theta)"}, variables=["theta", "omega"])
    >>> part(np.array([[0.0], [2.0]])).tolist()
    [[1.0]]
    """
    parsed = parse_formulas(formulas)
    names = None if variables is None else check_variable_names(variables)
    if names is not None:
        check_variables(parsed, names)
    repeated = [f.name for i, f in enumerate(parsed) if f.name in {g.name for g in parsed[:i]}]
    if repeated:
        raise ConfigError(f"expression name {repeated[0]!r} is given twice")
    return Expressions(parsed, names)
