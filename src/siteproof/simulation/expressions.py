"""The scenario expression language: safe arithmetic over covariates, parameters and helpers, never Python eval.

A scenario file writes distribution parameters, truncation bounds, helpers, μ₀(x), τ(x) and the cost as
expression strings.  They are parsed with :mod:`ast` and only a whitelist is accepted: numbers, names in
scope, ``+ − * / **``, comparisons, ``and``/``or``/``not``, ``a if c else b``, the functions in
:data:`FUNCTIONS`, and level comparisons of a categorical covariate (``home_language == "other"``,
``name in ["a", "b"]``).  :func:`check_expression` validates an expression against the names
defined before it when the scenario is loaded; :func:`evaluate` computes it on ``n`` units (numpy arrays,
element-wise; truth values are 0/1 floats).
"""

from __future__ import annotations

import ast
from typing import Any, Callable, Mapping

import numpy as np
from scipy import special

from ..core.errors import SiteproofError


def _where(cond: np.ndarray, a: np.ndarray, b: np.ndarray) -> np.ndarray:
    """``a`` where ``cond`` is non-zero, else ``b`` (element-wise)."""
    return np.where(np.asarray(cond) != 0, a, b)


#: function name → (numpy implementation, number of arguments)
FUNCTIONS: dict[str, tuple[Callable[..., Any], int]] = {
    "exp": (np.exp, 1), "log": (np.log, 1), "log1p": (np.log1p, 1), "sqrt": (np.sqrt, 1),
    "abs": (np.abs, 1), "floor": (np.floor, 1), "ceil": (np.ceil, 1), "tanh": (np.tanh, 1),
    "expit": (special.expit, 1), "logit": (special.logit, 1),
    "minimum": (np.minimum, 2), "maximum": (np.maximum, 2), "clip": (np.clip, 3), "where": (_where, 3),
}
_BINARY: dict[type, Callable[[Any, Any], Any]] = {
    ast.Add: np.add, ast.Sub: np.subtract, ast.Mult: np.multiply, ast.Div: np.divide, ast.Pow: np.power,
}
_COMPARE: dict[type, Callable[[Any, Any], Any]] = {
    ast.Lt: np.less, ast.LtE: np.less_equal, ast.Gt: np.greater, ast.GtE: np.greater_equal,
    ast.Eq: np.equal, ast.NotEq: np.not_equal,
}
_EXPR_FIX = ("write arithmetic (+ − * / **, comparisons, and/or/not, `a if c else b`) over numbers, covariate "
             "names, parameters, helpers and the functions " + ", ".join(FUNCTIONS)
             + "; compare a categorical covariate with a level, e.g. home_language == \"other\"")


class Scope:
    """Names an expression may use: numeric ones and categorical covariates with their levels."""

    def __init__(self, numeric: set[str], categorical: dict[str, tuple[str, ...]]) -> None:
        self.numeric = set(numeric)
        self.categorical = dict(categorical)

    def names(self) -> list[str]:
        """Every name in scope, sorted (for error messages)."""
        return sorted(self.numeric | set(self.categorical))


def _parse_expression(text: str, key: str) -> ast.expr:
    """The AST of ``text``; a syntax error names ``key``."""
    try:
        return ast.parse(f"(\n{text.strip()}\n)", mode="eval").body  # parentheses allow line breaks
    except SyntaxError as exc:
        raise SiteproofError(f"{key}: cannot read the expression {text!r} ({exc.msg})", _EXPR_FIX) from None


def check_expression(text: str, key: str, scope: Scope) -> None:
    """Reject anything but the documented arithmetic; unknown names and unknown levels name ``key``."""
    _check_node(_parse_expression(text, key), key, scope)


def _check_node(node: ast.AST, key: str, scope: Scope) -> None:
    """Walk ``node`` and raise on the first construct outside the language."""
    if isinstance(node, ast.Constant):
        if isinstance(node.value, bool) or not isinstance(node.value, (int, float)):
            raise SiteproofError(f"{key}: the constant {node.value!r} is not a number", _EXPR_FIX)
    elif isinstance(node, ast.Name):
        if node.id in scope.categorical:
            raise SiteproofError(f"{key}: the categorical covariate '{node.id}' is used as a number",
                                 f"compare it with one of its levels {list(scope.categorical[node.id])}")
        if node.id not in scope.numeric:
            raise SiteproofError(f"{key}: unknown name '{node.id}'",
                                 f"use one of the names defined before this point: {', '.join(scope.names())}")
    elif isinstance(node, ast.BinOp) and type(node.op) in _BINARY:
        _check_node(node.left, key, scope)
        _check_node(node.right, key, scope)
    elif isinstance(node, ast.UnaryOp) and isinstance(node.op, (ast.USub, ast.UAdd, ast.Not)):
        _check_node(node.operand, key, scope)
    elif isinstance(node, ast.BoolOp):
        for value in node.values:
            _check_node(value, key, scope)
    elif isinstance(node, ast.IfExp):
        for part in (node.test, node.body, node.orelse):
            _check_node(part, key, scope)
    elif isinstance(node, ast.Compare):
        _check_compare(node, key, scope)
    elif isinstance(node, ast.Call):
        _check_call(node, key, scope)
    else:
        raise SiteproofError(f"{key}: '{ast.unparse(node)}' is not allowed in an expression", _EXPR_FIX)


def _check_compare(node: ast.Compare, key: str, scope: Scope) -> None:
    """A level comparison of a categorical covariate, or a (chained) numeric comparison."""
    if isinstance(node.left, ast.Name) and node.left.id in scope.categorical:
        levels = scope.categorical[node.left.id]
        if len(node.ops) != 1:
            raise SiteproofError(f"{key}: chained comparison of categorical '{node.left.id}'", _EXPR_FIX)
        op, right = node.ops[0], node.comparators[0]
        if isinstance(op, (ast.Eq, ast.NotEq)):
            wanted = [right]
        elif isinstance(op, (ast.In, ast.NotIn)) and isinstance(right, (ast.List, ast.Tuple, ast.Set)):
            wanted = list(right.elts)
        else:
            raise SiteproofError(f"{key}: '{ast.unparse(node)}' is not a valid level comparison",
                                 f"write {node.left.id} == \"level\" or {node.left.id} in [\"a\", \"b\"]")
        for item in wanted:
            if not (isinstance(item, ast.Constant) and isinstance(item.value, str) and item.value in levels):
                raise SiteproofError(f"{key}: {ast.unparse(item)} is not a level of '{node.left.id}'",
                                     f"use one of {list(levels)}")
        return
    for op in node.ops:
        if type(op) not in _COMPARE:
            raise SiteproofError(f"{key}: '{ast.unparse(node)}' is not a numeric comparison", _EXPR_FIX)
    for part in (node.left, *node.comparators):
        _check_node(part, key, scope)


def _check_call(node: ast.Call, key: str, scope: Scope) -> None:
    """A call of a whitelisted function with its number of positional arguments."""
    if not isinstance(node.func, ast.Name) or node.func.id not in FUNCTIONS or node.keywords:
        raise SiteproofError(f"{key}: '{ast.unparse(node)}' calls an unknown function", _EXPR_FIX)
    arity = FUNCTIONS[node.func.id][1]
    if len(node.args) != arity:
        raise SiteproofError(f"{key}: {node.func.id}() takes {arity} argument(s), got {len(node.args)}",
                             _EXPR_FIX)
    for arg in node.args:
        _check_node(arg, key, scope)


def evaluate(text: str | float, env: Mapping[str, Any], n: int, key: str) -> np.ndarray:
    """Evaluate a checked expression (or a plain number) on ``n`` units; non-finite results name ``key``."""
    if isinstance(text, (int, float)):
        return np.full(n, float(text))
    with np.errstate(all="ignore"):
        value = np.asarray(_eval_node(_parse_expression(text, key), env), dtype=float)
    out = np.broadcast_to(value, (n,)).astype(float)
    if not np.all(np.isfinite(out)):
        raise SiteproofError(f"{key}: the expression {text!r} gives non-finite values for some units",
                             "guard logs, roots and divisions, e.g. log(maximum(x, 0.1))")
    return out


def _eval_node(node: ast.AST, env: Mapping[str, Any]) -> Any:
    """Value of a checked node: numbers and arrays; truth values as 0/1."""
    if isinstance(node, ast.Constant):
        return float(node.value)
    if isinstance(node, ast.Name):
        return env[node.id]
    if isinstance(node, ast.BinOp):
        return _BINARY[type(node.op)](_eval_node(node.left, env), _eval_node(node.right, env))
    if isinstance(node, ast.UnaryOp):
        operand = _eval_node(node.operand, env)
        if isinstance(node.op, ast.Not):
            return (np.asarray(operand) == 0).astype(float)
        return -operand if isinstance(node.op, ast.USub) else operand
    if isinstance(node, ast.BoolOp):
        truth = [np.asarray(_eval_node(v, env)) != 0 for v in node.values]
        combine = np.logical_and if isinstance(node.op, ast.And) else np.logical_or
        result = truth[0]
        for item in truth[1:]:
            result = combine(result, item)
        return result.astype(float)
    if isinstance(node, ast.IfExp):
        return np.where(np.asarray(_eval_node(node.test, env)) != 0,
                        _eval_node(node.body, env), _eval_node(node.orelse, env))
    if isinstance(node, ast.Compare):
        return _eval_compare(node, env)
    if isinstance(node, ast.Call):
        return FUNCTIONS[node.func.id][0](*(_eval_node(arg, env) for arg in node.args))  # type: ignore[union-attr]
    raise AssertionError(f"unchecked expression node {ast.dump(node)}")


def _eval_compare(node: ast.Compare, env: Mapping[str, Any]) -> np.ndarray:
    """0/1 result of a level test (``in``/``not in``) or a chained comparison a < b < c."""
    op = node.ops[0]
    if isinstance(op, (ast.In, ast.NotIn)):
        levels = [item.value for item in node.comparators[0].elts]  # type: ignore[attr-defined]
        found = np.isin(np.asarray(env[node.left.id], dtype=object), levels)  # type: ignore[attr-defined]
        return (found if isinstance(op, ast.In) else ~found).astype(float)
    left = _compare_operand(node.left, env)
    result: Any = True
    for op, right_node in zip(node.ops, node.comparators):
        right = _compare_operand(right_node, env)
        result = np.logical_and(result, _COMPARE[type(op)](left, right))
        left = right
    return np.asarray(result).astype(float)


def _compare_operand(node: ast.AST, env: Mapping[str, Any]) -> Any:
    """A level name (string constant) as is, anything else evaluated."""
    if isinstance(node, ast.Constant) and isinstance(node.value, str):
        return node.value
    return _eval_node(node, env)
