"""Synthetic multi-site trials with a known truth: a declarative design (TOML) → data + truth.

A *design* describes a pooled multi-site randomized trial: its sites (size share, enrollment rule, assignment
rate), the covariates and how they depend on each other, the control-arm mean μ₀(x), the unit effect τ(x),
the outcome noise, an optional per-unit cost and an optional *hidden site effect* that no covariate can see.
The shipped designs live in the package ``siteproof.synthetic_sites`` (folder ``synthetic_sites/``); the file
format is documented in ``synthetic_sites/README.md`` and the demo story in ``docs/demo-scenario.md``.

Generative model for ``n`` units, in this order (each step has its own random stream, spawned from
``numpy.random.SeedSequence(seed)`` and fed to ``Generator(PCG64(...))``, so the same seed gives identical
frames and editing one part of a design does not reshuffle the others):

1. site S_i ~ Categorical(share_1, …, share_K), independently per unit (rows are therefore in random site
   order, and the unit id says nothing about the site);
2. covariates in their declared order, each drawn from its distribution given the earlier covariates, with the
   site's enrollment rule applied (location shift, truncation, category probabilities); every non-derived
   covariate consumes exactly one uniform U_i and is drawn by the inverse CDF, truncated draws included:
   X = F⁻¹(F(lo) + U·(F(hi) − F(lo)));
3. assignment by complete randomization inside each site: n₁ₛ = round(rate_s · n_s) treated units (Python
   rounding, halves to even), chosen uniformly at random without replacement;
4. outcome Y = μ₀(x) + h_S·[arm = both] + W·(τ(x) + h_S·[arm = treated]) + σ·ε, ε ~ N(0, 1);
5. cost (if declared) c(x) + σ_c·η, η ~ N(0, 1), floored at its lower bound;
6. missing values: each covariate value is blanked independently with its declared share (missing completely
   at random), after steps 2–5, so the outcome always depends on the true values.

The hidden site effect is h_s = strength · z_s with z_s = (rate_s − mean(rate)) / sd(rate) (unweighted over
sites, population SD) when it *tracks the rate*, or z_s declared per site. Added to both arms it shifts the
outcome level of whole sites in step with their assignment rate, so P(W = 1 | X, level) ≠ P(W = 1 | X) and
unconfoundedness given X fails although every site is a randomized experiment.

The truth frame holds, per unit: ``id``, ``site``, ``e_true`` (the site's declared rate, the unit's true
assignment probability), ``mu0`` (noise-free control mean incl. a hidden level), ``mu1`` = mu0 + tau, ``tau``
(τ(x) plus a hidden effect on the treated arm) and ``hidden`` (h_S).  Within each site the difference in
means is unbiased for the mean of ``tau`` over the site's units (Neyman 1923).
"""

from __future__ import annotations

import ast
import io
import math
import sys
from dataclasses import dataclass
from importlib import resources
from pathlib import Path
from typing import Any, Callable, Mapping

import numpy as np
import pandas as pd
from scipy import special, stats

from ..core.errors import SiteproofError
from ..core.outputs import atomic_write_bytes

if sys.version_info >= (3, 11):
    import tomllib
else:  # pragma: no cover - exercised on Python 3.10 only
    import tomli as tomllib

PACKAGE = "siteproof.synthetic_sites"
MIN_N = 20
_EPS = 1e-12

#: distribution parameters of each covariate kind (numbers or expressions over earlier covariates)
KIND_PARAMS: dict[str, tuple[str, ...]] = {
    "normal": ("mean", "sd"),
    "lognormal": ("meanlog", "sdlog"),
    "uniform": ("low", "high"),
    "beta": ("mean", "concentration"),
    "poisson": ("mean",),
    "bernoulli": ("p",),
    "categorical": (),  # levels + probs | logits, handled separately
    "derived": ("value",),
}
_BOUNDED_KINDS = ("normal", "lognormal", "uniform", "beta", "poisson")
_COMMON_COVARIATE_KEYS = {"name", "kind", "lower", "upper", "decimals", "missing", "unit", "meaning"}
_RULE_KEYS: dict[str, set[str]] = {
    **{kind: {"shift", "lower", "upper"} for kind in _BOUNDED_KINDS},
    "bernoulli": {"shift"},
    "categorical": {"probs", "tilt"},
    "derived": set(),
}
_TOP_KEYS = {"description", "default_n", "id_prefix", "extends", "roles", "parameters", "covariates", "helpers",
             "outcome", "effect", "cost", "hidden", "sites", "rates"}


# ── result and design objects ────────────────────────────────────────────────────────────────────────────


@dataclass(frozen=True)
class Roles:
    """Column names of the simulated data: outcome, treatment (0/1), site, unit id, optional cost, covariates."""

    outcome: str
    treatment: str
    site: str
    id: str
    cost: str | None
    covariates: tuple[str, ...]


@dataclass(frozen=True)
class Covariate:
    """One covariate: its kind, distribution parameters (numbers or expressions), bounds, rounding, missing share."""

    name: str
    kind: str
    params: tuple[tuple[str, Any], ...]
    levels: tuple[str, ...] = ()
    lower: float | None = None
    upper: float | None = None
    decimals: int | None = None
    missing: float = 0.0
    unit: str = ""
    meaning: str = ""

    def param(self, key: str) -> Any:
        """The declared value of distribution parameter ``key``."""
        return dict(self.params)[key]


@dataclass(frozen=True)
class EnrollRule:
    """How a site's enrollment shifts one covariate (see synthetic_sites/README.md for each kind).

    ``shift`` moves the location (normal mean, lognormal log-mean, uniform ends, logit of a beta mean or a
    Bernoulli p, log of a Poisson mean); ``lower``/``upper`` truncate (numbers or expressions over earlier
    covariates); ``probs`` replaces and ``tilt`` multiplies by exp(tilt) the category probabilities.
    """

    covariate: str
    shift: float = 0.0
    lower: float | str | None = None
    upper: float | str | None = None
    probs: tuple[float, ...] | None = None
    tilt: tuple[float, ...] | None = None


@dataclass(frozen=True)
class Site:
    """A site: normalized size share, declared assignment rate, enrollment rules, declared hidden z-value."""

    name: str
    share: float
    rate: float
    enroll: tuple[EnrollRule, ...] = ()
    hidden: float = 0.0
    note: str = ""

    def rule_for(self, covariate: str) -> EnrollRule | None:
        """The enrollment rule of this site for ``covariate``, if any."""
        return next((rule for rule in self.enroll if rule.covariate == covariate), None)


@dataclass(frozen=True)
class HiddenEffect:
    """Site effect invisible in the covariates: h_s = strength · z_s on both arms or on the treated arm only."""

    strength: float = 0.0
    tracks: str = "rate"  # "rate": z_s = standardized rate; "declared": z_s = the site's `hidden` value
    arm: str = "both"  # "both": outcome level of both arms; "treated": added to the effect


@dataclass(frozen=True)
class CostModel:
    """Per-unit cost c(x) + noise_sd · N(0, 1), floored at ``lower`` and rounded to ``decimals``."""

    value: str
    noise_sd: float = 0.0
    lower: float = 0.0
    decimals: int | None = 2


@dataclass(frozen=True)
class Design:
    """A synthetic multi-site trial, as loaded from a synthetic_sites TOML file."""

    name: str
    description: str
    default_n: int
    sites: tuple[Site, ...]
    covariates: tuple[Covariate, ...]
    parameters: tuple[tuple[str, float], ...]
    helpers: tuple[tuple[str, str], ...]
    baseline: str
    effect: str
    noise_sd: float
    hidden: HiddenEffect
    cost: CostModel | None
    roles: Roles
    id_prefix: str = "u"
    source: str = ""

    @property
    def rates(self) -> dict[str, float]:
        """Site → declared assignment rate."""
        return {site.name: site.rate for site in self.sites}

    def hidden_effects(self) -> dict[str, float]:
        """Site → hidden effect h_s in outcome units (see the module docstring)."""
        return dict(zip((s.name for s in self.sites), _hidden_values(self).tolist()))

    def to_dict(self) -> dict[str, Any]:
        """JSON-ready summary: name, roles, sites (share, rate, hidden effect), noise and hidden settings."""
        hidden = self.hidden_effects()
        return {
            "name": self.name,
            "description": self.description,
            "default_n": self.default_n,
            "roles": {**{k: getattr(self.roles, k) for k in ("outcome", "treatment", "site", "id", "cost")},
                      "covariates": list(self.roles.covariates)},
            "sites": [{"site": s.name, "share": s.share, "rate": s.rate, "hidden_effect": hidden[s.name]}
                      for s in self.sites],
            "noise_sd": self.noise_sd,
            "hidden": {"strength": self.hidden.strength, "tracks": self.hidden.tracks, "arm": self.hidden.arm},
            "baseline": self.baseline,
            "effect": self.effect,
        }


@dataclass(frozen=True)
class SimulatedTrial:
    """Simulated data (what a user would have) and the per-unit truth behind it."""

    design: Design
    data: pd.DataFrame
    truth: pd.DataFrame
    rates: dict[str, float]
    seed: int = 0

    @property
    def true_ate(self) -> float:
        """Sample average effect: mean of truth.tau over the simulated units."""
        return float(self.truth["tau"].mean())


# ── the expression language (a safe arithmetic AST, never Python eval) ─────────────────────────────────────


def _where(cond: np.ndarray, a: np.ndarray, b: np.ndarray) -> np.ndarray:
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


class _Scope:
    """Names an expression may use: numeric ones and categorical covariates with their levels."""

    def __init__(self, numeric: set[str], categorical: dict[str, tuple[str, ...]]) -> None:
        self.numeric = set(numeric)
        self.categorical = dict(categorical)

    def names(self) -> list[str]:
        return sorted(self.numeric | set(self.categorical))


def _parse_expression(text: str, key: str) -> ast.expr:
    try:
        return ast.parse(f"(\n{text.strip()}\n)", mode="eval").body  # parentheses allow line breaks
    except SyntaxError as exc:
        raise SiteproofError(f"{key}: cannot read the expression {text!r} ({exc.msg})", _EXPR_FIX) from None


def _check_expression(text: str, key: str, scope: _Scope) -> None:
    """Reject anything but the documented arithmetic; unknown names and unknown levels name ``key``."""
    _check_node(_parse_expression(text, key), key, scope)


def _check_node(node: ast.AST, key: str, scope: _Scope) -> None:
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


def _check_compare(node: ast.Compare, key: str, scope: _Scope) -> None:
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


def _check_call(node: ast.Call, key: str, scope: _Scope) -> None:
    if not isinstance(node.func, ast.Name) or node.func.id not in FUNCTIONS or node.keywords:
        raise SiteproofError(f"{key}: '{ast.unparse(node)}' calls an unknown function", _EXPR_FIX)
    arity = FUNCTIONS[node.func.id][1]
    if len(node.args) != arity:
        raise SiteproofError(f"{key}: {node.func.id}() takes {arity} argument(s), got {len(node.args)}",
                             _EXPR_FIX)
    for arg in node.args:
        _check_node(arg, key, scope)


def _evaluate(text: str | float, env: Mapping[str, Any], n: int, key: str) -> np.ndarray:
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
    if isinstance(node, ast.Constant) and isinstance(node.value, str):
        return node.value
    return _eval_node(node, env)


# ── loading designs ──────────────────────────────────────────────────────────────────────────────────────


def list_designs() -> list[str]:
    """Names (file stems) of the designs shipped in siteproof.synthetic_sites."""
    root = resources.files(PACKAGE)
    return sorted(entry.name[: -len(".toml")] for entry in root.iterdir() if entry.name.endswith(".toml"))


def load_design(name_or_path: str | Path) -> Design:
    """Load a shipped design by name (e.g. ``"demo"``) or a design TOML file by path.

    A string counts as a path when it ends in ``.toml`` or contains a path separator.  Unknown names raise a
    :class:`SiteproofError` listing the shipped names; every mistake in the file names the offending key.
    """
    name, text, origin, base = _locate(name_or_path)
    raw = _resolve_extends(_read_toml(text, origin), origin, base, seen=(origin,))
    return _build_design(raw, name, origin)


def _is_path(name_or_path: str | Path) -> bool:
    if isinstance(name_or_path, Path):
        return True
    return name_or_path.endswith(".toml") or "/" in name_or_path or "\\" in name_or_path


def _locate(name_or_path: str | Path, base: Path | None = None) -> tuple[str, str, str, Path | None]:
    """(design name, TOML text, origin label, folder for relative `extends`; None for shipped designs)."""
    if not isinstance(name_or_path, (str, Path)) or not str(name_or_path).strip():
        raise SiteproofError(f"design {name_or_path!r} is not a name or a path",
                             f"use one of {', '.join(list_designs())} or the path of a .toml design file")
    if _is_path(name_or_path):
        path = Path(name_or_path)
        if base is not None and not path.is_absolute():
            path = base / path
        if not path.is_file():
            raise SiteproofError(f"design file {path} does not exist",
                                 f"check the path, or use a shipped design: {', '.join(list_designs())}")
        return path.stem, path.read_text(encoding="utf-8"), str(path), path.parent
    resource = resources.files(PACKAGE).joinpath(f"{name_or_path}.toml")
    if not resource.is_file():
        raise SiteproofError(f"unknown design '{name_or_path}'",
                             f"use one of {', '.join(list_designs())} or the path of a .toml design file")
    return str(name_or_path), resource.read_text(encoding="utf-8"), f"design '{name_or_path}'", None


def _read_toml(text: str, origin: str) -> dict[str, Any]:
    try:
        return tomllib.loads(text)
    except tomllib.TOMLDecodeError as exc:
        raise SiteproofError(f"{origin} is not valid TOML ({exc})",
                             "fix the TOML syntax (see synthetic_sites/README.md)") from None


def _resolve_extends(raw: dict[str, Any], origin: str, base: Path | None, seen: tuple[str, ...]) -> dict[str, Any]:
    """Merge ``raw`` over the design it ``extends``: tables merge key by key, arrays and values replace."""
    parent_ref = raw.pop("extends", None)
    if parent_ref is None:
        return raw
    if not isinstance(parent_ref, str):
        raise SiteproofError(f"{origin}: 'extends' must be a design name or path", 'write extends = "demo"')
    _, text, parent_origin, parent_base = _locate(parent_ref, base)
    if parent_origin in seen:
        raise SiteproofError(f"{origin}: 'extends' forms a cycle ({' → '.join((*seen, parent_origin))})",
                             "let one design extend the other, not both")
    parent = _resolve_extends(_read_toml(text, parent_origin), parent_origin, parent_base,
                              (*seen, parent_origin))
    return _deep_merge(parent, raw)


def _deep_merge(parent: dict[str, Any], child: dict[str, Any]) -> dict[str, Any]:
    merged = dict(parent)
    for key, value in child.items():
        if isinstance(value, dict) and isinstance(merged.get(key), dict):
            merged[key] = _deep_merge(merged[key], value)
        else:
            merged[key] = value
    return merged


class _Reader:
    """Typed access to one TOML table; every error names the key path and the design."""

    def __init__(self, table: Any, where: str, origin: str) -> None:
        if not isinstance(table, dict):
            raise SiteproofError(f"{origin}: '{where}' must be a table", "see synthetic_sites/README.md")
        self.table, self.where, self.origin = table, where, origin

    def key(self, name: str) -> str:
        return f"{self.where}.{name}" if self.where else name

    def fail(self, name: str, what: str, fix: str) -> SiteproofError:
        return SiteproofError(f"{self.origin}: '{self.key(name)}' {what}", fix)

    def allow(self, allowed: set[str]) -> None:
        unknown = sorted(set(self.table) - allowed)
        if unknown:
            raise SiteproofError(f"{self.origin}: unknown key '{self.key(unknown[0])}'",
                                 f"use only {', '.join(sorted(allowed))}")

    def text(self, name: str, default: str | None = None) -> str:
        value = self.table.get(name, default)
        if not isinstance(value, str) or not value.strip():
            raise self.fail(name, "must be a non-empty string", f'write {name} = "..."')
        return value

    def number(self, name: str, default: float | None = None, low: float = -math.inf, high: float = math.inf,
               open_low: bool = False, open_high: bool = False) -> float:
        value = self.table.get(name, default)
        if isinstance(value, bool) or not isinstance(value, (int, float)) or not math.isfinite(value):
            raise self.fail(name, f"must be a number (got {value!r})", f"write {name} = <number>")
        too_low = value <= low if open_low else value < low
        too_high = value >= high if open_high else value > high
        if too_low or too_high:
            lo_b, hi_b = ("(" if open_low else "["), (")" if open_high else "]")
            raise self.fail(name, f"= {value} is outside {lo_b}{low}, {high}{hi_b}", "choose a value in that range")
        return float(value)

    def integer(self, name: str, default: int | None = None, low: int = 0) -> int:
        value = self.table.get(name, default)
        if isinstance(value, bool) or not isinstance(value, int) or value < low:
            raise self.fail(name, f"must be an integer ≥ {low} (got {value!r})", f"write {name} = <integer>")
        return value

    def expression(self, name: str) -> float | str:
        value = self.table.get(name)
        if isinstance(value, bool) or not isinstance(value, (int, float, str)) or value == "":
            raise self.fail(name, f"must be a number or an expression string (got {value!r})",
                            f"write {name} = 1.5 or {name} = 'an expression'")
        return float(value) if not isinstance(value, str) else value

    def identifier(self, name: str) -> str:
        value = self.text(name)
        if not value.isidentifier() or value in FUNCTIONS:
            raise self.fail(name, f"= {value!r} is not usable as a name in expressions",
                            "use letters, digits and underscores, not starting with a digit, "
                            "and not a function name")
        return value


def _build_design(raw: dict[str, Any], name: str, origin: str) -> Design:
    top = _Reader(raw, "", origin)
    top.allow(_TOP_KEYS)
    parameters = _parse_parameters(raw.get("parameters", {}), origin)
    covariates = _parse_covariates(raw.get("covariates"), origin)
    helpers = _parse_helpers(raw.get("helpers", {}), origin)
    sites = _parse_sites(raw.get("sites"), raw.get("rates", {}), covariates, origin)
    outcome = _Reader(raw.get("outcome"), "outcome", origin)
    outcome.allow({"baseline", "noise_sd"})
    effect = _Reader(raw.get("effect"), "effect", origin)
    effect.allow({"tau"})
    cost = _parse_cost(raw.get("cost"), origin)
    roles = _parse_roles(raw.get("roles"), covariates, cost is not None, origin)
    design = Design(
        name=name,
        description=top.text("description"),
        default_n=top.integer("default_n", low=MIN_N),
        sites=sites,
        covariates=covariates,
        parameters=parameters,
        helpers=helpers,
        baseline=_as_expression(outcome, "baseline"),
        effect=_as_expression(effect, "tau"),
        noise_sd=outcome.number("noise_sd", low=0.0),
        hidden=_parse_hidden(raw.get("hidden", {}), sites, origin),
        cost=cost,
        roles=roles,
        id_prefix=top.text("id_prefix", "u"),
        source=origin,
    )
    _check_names_unique(design, origin)
    _check_all_expressions(design, origin)
    return design


def _as_expression(reader: _Reader, name: str) -> str:
    value = reader.expression(name)
    return repr(value) if isinstance(value, float) else value


def _parse_parameters(table: Any, origin: str) -> tuple[tuple[str, float], ...]:
    reader = _Reader(table, "parameters", origin)
    out = []
    for key in table:
        if not key.isidentifier() or key in FUNCTIONS:
            raise reader.fail(key, "is not usable as a name in expressions", "rename it (letters, digits, _)")
        out.append((key, reader.number(key)))
    return tuple(out)


def _parse_helpers(table: Any, origin: str) -> tuple[tuple[str, str], ...]:
    reader = _Reader(table, "helpers", origin)
    out = []
    for key in table:
        if not key.isidentifier() or key in FUNCTIONS:
            raise reader.fail(key, "is not usable as a name in expressions", "rename it (letters, digits, _)")
        out.append((key, _as_expression(reader, key)))
    return tuple(out)


def _parse_covariates(entries: Any, origin: str) -> tuple[Covariate, ...]:
    if not isinstance(entries, list) or not entries:
        raise SiteproofError(f"{origin}: '[[covariates]]' is missing or empty",
                             "declare each covariate in a [[covariates]] table (see synthetic_sites/README.md)")
    return tuple(_parse_covariate(entry, i, origin) for i, entry in enumerate(entries))


def _parse_covariate(entry: Any, index: int, origin: str) -> Covariate:
    reader = _Reader(entry, f"covariates[{index}]", origin)
    name = reader.identifier("name")
    reader = _Reader(entry, f"covariates[{name}]", origin)
    kind = reader.text("kind")
    if kind not in KIND_PARAMS:
        raise reader.fail("kind", f"= {kind!r} is not a covariate kind", f"use one of {', '.join(KIND_PARAMS)}")
    extra = {"levels", "probs", "logits"} if kind == "categorical" else set(KIND_PARAMS[kind])
    reader.allow(_COMMON_COVARIATE_KEYS | extra)
    levels: tuple[str, ...] = ()
    if kind == "categorical":
        levels, params = _parse_categorical(reader)
    else:
        params = tuple((p, reader.expression(p)) for p in KIND_PARAMS[kind])
    for bound in ("lower", "upper"):
        if bound in entry and kind not in _BOUNDED_KINDS:
            raise reader.fail(bound, f"is not supported for kind '{kind}'",
                              f"bounds apply to {', '.join(_BOUNDED_KINDS)}")
    lower = reader.number("lower") if "lower" in entry else None
    upper = reader.number("upper") if "upper" in entry else None
    if lower is not None and upper is not None and lower >= upper:
        raise reader.fail("upper", f"= {upper} is not above lower = {lower}", "make lower < upper")
    decimals = reader.integer("decimals") if "decimals" in entry else None
    if decimals is not None and kind == "categorical":
        raise reader.fail("decimals", "does not apply to a categorical covariate", "remove it")
    return Covariate(
        name=name, kind=kind, params=params, levels=levels, lower=lower, upper=upper, decimals=decimals,
        missing=reader.number("missing", 0.0, 0.0, 0.5),
        unit=str(entry.get("unit", "")), meaning=str(entry.get("meaning", "")),
    )


def _parse_categorical(reader: _Reader) -> tuple[tuple[str, ...], tuple[tuple[str, Any], ...]]:
    levels = reader.table.get("levels")
    if (not isinstance(levels, list) or len(levels) < 2 or not all(isinstance(v, str) and v for v in levels)
            or len(set(levels)) != len(levels)):
        raise reader.fail("levels", "must list at least two distinct level names", 'write levels = ["a", "b"]')
    has_probs, has_logits = "probs" in reader.table, "logits" in reader.table
    if has_probs == has_logits:
        raise reader.fail("probs", "or 'logits' must be given (exactly one of them)",
                          "give fixed probabilities or one logit expression per level")
    key = "probs" if has_probs else "logits"
    values = reader.table[key]
    if not isinstance(values, list) or len(values) != len(levels):
        raise reader.fail(key, f"must have one entry per level ({len(levels)})", f"write {key} = [...]")
    if has_probs:
        probs = _Reader({str(i): v for i, v in enumerate(values)}, reader.key("probs"), reader.origin)
        numbers = tuple(probs.number(str(i), low=0.0, high=1.0) for i in range(len(values)))
        if abs(sum(numbers) - 1.0) > 1e-6:
            raise reader.fail("probs", f"sum to {sum(numbers):.6g}, not 1", "make the probabilities sum to 1")
        return tuple(levels), (("probs", numbers),)
    logits = _Reader({str(i): v for i, v in enumerate(values)}, reader.key("logits"), reader.origin)
    return tuple(levels), (("logits", tuple(logits.expression(str(i)) for i in range(len(values)))),)


def _parse_sites(entries: Any, rate_overrides: Any, covariates: tuple[Covariate, ...],
                 origin: str) -> tuple[Site, ...]:
    if not isinstance(entries, list) or not entries:
        raise SiteproofError(f"{origin}: '[[sites]]' is missing or empty", "declare each site in a [[sites]] table")
    by_name = {c.name: c for c in covariates}
    parsed = [_parse_site(entry, i, by_name, origin) for i, entry in enumerate(entries)]
    names = [s.name for s in parsed]
    duplicates = sorted({n for n in names if names.count(n) > 1})
    if duplicates:
        raise SiteproofError(f"{origin}: site name '{duplicates[0]}' appears twice in [[sites]]",
                             "give every site its own name")
    overrides = _Reader(rate_overrides, "rates", origin)
    for key in rate_overrides:
        if key not in names:
            raise overrides.fail(key, "is not a site of this design", f"use one of {', '.join(names)}")
    total = sum(s.share for s in parsed)
    return tuple(
        Site(s.name, s.share / total,
             overrides.number(s.name, open_low=True, open_high=True, low=0.0, high=1.0)
             if s.name in rate_overrides else s.rate, s.enroll, s.hidden, s.note)
        for s in parsed
    )


def _parse_site(entry: Any, index: int, covariates: dict[str, Covariate], origin: str) -> Site:
    reader = _Reader(entry, f"sites[{index}]", origin)
    name = reader.text("name")
    reader = _Reader(entry, f"sites[{name}]", origin)
    reader.allow({"name", "share", "rate", "enroll", "hidden", "note"})
    enroll = _Reader(entry.get("enroll", {}), reader.key("enroll"), origin)
    rules = []
    for cov_name, rule_table in enroll.table.items():
        if cov_name not in covariates:
            raise enroll.fail(cov_name, "is not a covariate of this design",
                              f"use one of {', '.join(covariates)}")
        rules.append(_parse_rule(rule_table, covariates[cov_name], enroll.key(cov_name), origin))
    return Site(
        name=name,
        share=reader.number("share", low=0.0, open_low=True),
        rate=reader.number("rate", low=0.0, high=1.0, open_low=True, open_high=True),
        enroll=tuple(rules),
        hidden=reader.number("hidden", 0.0),
        note=str(entry.get("note", "")),
    )


def _parse_rule(table: Any, cov: Covariate, where: str, origin: str) -> EnrollRule:
    reader = _Reader(table, where, origin)
    allowed = _RULE_KEYS[cov.kind]
    if not allowed:
        raise SiteproofError(f"{origin}: '{where}' puts an enrollment rule on a derived covariate",
                             "put the rule on the covariate it is derived from")
    reader.allow(allowed)
    if cov.kind == "categorical":
        if ("probs" in table) == ("tilt" in table):
            raise reader.fail("probs", "or 'tilt' must be given (exactly one)",
                              'write probs = { level = 0.7, ... } or tilt = { level = 1.0 }')
        key = "probs" if "probs" in table else "tilt"
        sub = _Reader(table[key], reader.key(key), origin)
        sub.allow(set(cov.levels))
        if key == "probs":
            probs = tuple(sub.number(level, 0.0, 0.0, 1.0) for level in cov.levels)
            if abs(sum(probs) - 1.0) > 1e-6:
                raise reader.fail("probs", f"sum to {sum(probs):.6g}, not 1", "make the probabilities sum to 1")
            return EnrollRule(cov.name, probs=probs)
        return EnrollRule(cov.name, tilt=tuple(sub.number(level, 0.0) for level in cov.levels))
    return EnrollRule(
        cov.name,
        shift=reader.number("shift", 0.0),
        lower=reader.expression("lower") if "lower" in table else None,
        upper=reader.expression("upper") if "upper" in table else None,
    )


def _parse_hidden(table: Any, sites: tuple[Site, ...], origin: str) -> HiddenEffect:
    reader = _Reader(table, "hidden", origin)
    reader.allow({"strength", "tracks", "arm"})
    hidden = HiddenEffect(strength=reader.number("strength", 0.0), tracks=reader.text("tracks", "rate"),
                          arm=reader.text("arm", "both"))
    if hidden.tracks not in ("rate", "declared"):
        raise reader.fail("tracks", f"= {hidden.tracks!r} is not 'rate' or 'declared'", 'write tracks = "rate"')
    if hidden.arm not in ("both", "treated"):
        raise reader.fail("arm", f"= {hidden.arm!r} is not 'both' or 'treated'", 'write arm = "both"')
    rates = np.array([s.rate for s in sites])
    if hidden.tracks == "rate" and hidden.strength != 0 and np.ptp(rates) == 0:
        raise reader.fail("tracks", "= 'rate' but all sites have the same rate",
                          'give the sites different rates or use tracks = "declared"')
    declared = [s.name for s in sites if s.hidden != 0]
    if declared and hidden.tracks != "declared":
        raise SiteproofError(f"{origin}: 'sites[{declared[0]}].hidden' is set but hidden.tracks is not 'declared'",
                             'set tracks = "declared" in [hidden] or remove the per-site values')
    return hidden


def _parse_cost(table: Any, origin: str) -> CostModel | None:
    if table is None:
        return None
    reader = _Reader(table, "cost", origin)
    reader.allow({"value", "noise_sd", "lower", "decimals"})
    return CostModel(value=_as_expression(reader, "value"), noise_sd=reader.number("noise_sd", 0.0, low=0.0),
                     lower=reader.number("lower", 0.0),
                     decimals=reader.integer("decimals") if "decimals" in table else 2)


def _parse_roles(table: Any, covariates: tuple[Covariate, ...], has_cost: bool, origin: str) -> Roles:
    reader = _Reader(table, "roles", origin)
    reader.allow({"outcome", "treatment", "site", "id", "cost"})
    cost = reader.text("cost") if "cost" in reader.table else None
    if (cost is not None) != has_cost:
        raise reader.fail("cost", "and the [cost] table must be given together",
                          "name the cost column in [roles] and describe it in [cost], or drop both")
    return Roles(outcome=reader.text("outcome"), treatment=reader.text("treatment"), site=reader.text("site"),
                 id=reader.text("id"), cost=cost, covariates=tuple(c.name for c in covariates))


def _check_names_unique(design: Design, origin: str) -> None:
    roles = design.roles
    columns = [roles.id, roles.site, roles.treatment, roles.outcome, *roles.covariates]
    columns += [roles.cost] if roles.cost else []
    names = columns + [p for p, _ in design.parameters] + [h for h, _ in design.helpers]
    clash = sorted({n for n in names if names.count(n) > 1})
    if clash:
        raise SiteproofError(f"{origin}: the name '{clash[0]}' is used twice (columns, parameters, helpers)",
                             "give every column, parameter and helper its own name")


def _check_all_expressions(design: Design, origin: str) -> None:
    numeric = {p for p, _ in design.parameters}
    categorical: dict[str, tuple[str, ...]] = {}
    before: dict[str, _Scope] = {}
    for cov in design.covariates:
        scope = _Scope(numeric, categorical)
        before[cov.name] = scope
        key = f"{origin}: covariates[{cov.name}]"
        for param, value in cov.params:
            for i, item in enumerate(value if isinstance(value, tuple) else (value,)):
                if isinstance(item, str):
                    _check_expression(item, f"{key}.{param}" + (f"[{i}]" if isinstance(value, tuple) else ""),
                                     scope)
        if cov.kind == "categorical":
            categorical[cov.name] = cov.levels
        else:
            numeric.add(cov.name)
    for site in design.sites:
        for rule in site.enroll:
            for bound in ("lower", "upper"):
                value = getattr(rule, bound)
                if isinstance(value, str):
                    _check_expression(value, f"{origin}: sites[{site.name}].enroll.{rule.covariate}.{bound}",
                                     before[rule.covariate])
    for helper, text in design.helpers:
        _check_expression(text, f"{origin}: helpers.{helper}", _Scope(numeric, categorical))
        numeric.add(helper)
    full = _Scope(numeric, categorical)
    _check_expression(design.baseline, f"{origin}: outcome.baseline", full)
    _check_expression(design.effect, f"{origin}: effect.tau", full)
    if design.cost is not None:
        _check_expression(design.cost.value, f"{origin}: cost.value", full)


# ── simulation ───────────────────────────────────────────────────────────────────────────────────────────

_STREAMS = ("sites", "covariates", "assignment", "noise", "cost", "missing")


def simulate(design: Design | str | Path, n: int | None = None, seed: int = 0) -> SimulatedTrial:
    """Simulate ``n`` units (default: the design's ``default_n``) of a design with a known truth.

    See the module docstring for the generative model.  Same ``seed`` ⇒ identical data and truth frames.
    """
    design = design if isinstance(design, Design) else load_design(design)
    n = design.default_n if n is None else _check_n(n)
    rng = _streams(seed)
    units = _draw_units(design, n, rng)
    w = _assign(design, units["site_idx"], rng["assignment"])
    y = units["mu0"] + w * units["tau"] + design.noise_sd * rng["noise"].standard_normal(n)
    ids = _unit_ids(design.id_prefix, n)
    site_names = np.array([s.name for s in design.sites], dtype=object)[units["site_idx"]]
    roles = design.roles
    columns: dict[str, Any] = {roles.id: ids, roles.site: site_names, roles.treatment: w.astype(np.int64),
                               roles.outcome: y}
    columns.update(_observed_covariates(design, units["covariates"], rng["missing"]))
    if design.cost is not None and roles.cost is not None:
        columns[roles.cost] = _draw_cost(design.cost, units["env"], rng["cost"], n)
    truth = pd.DataFrame({
        "id": ids, "site": site_names, "e_true": units["e_true"], "mu0": units["mu0"],
        "mu1": units["mu0"] + units["tau"], "tau": units["tau"], "hidden": units["hidden"],
    })
    return SimulatedTrial(design, pd.DataFrame(columns), truth, design.rates, seed)


def population_ate(design: Design | str | Path, n: int = 200_000, seed: int = 12345) -> float:
    """Monte Carlo approximation of the population ATE E[τ]: mean of the unit effects of ``n`` fresh units.

    Its Monte Carlo SE is sd(τ)/√n (sites and covariates are i.i.d. across units).
    """
    design = design if isinstance(design, Design) else load_design(design)
    units = _draw_units(design, _check_n(n), _streams(seed))
    return float(units["tau"].mean())


def _check_n(n: Any) -> int:
    if isinstance(n, bool) or not isinstance(n, (int, np.integer)) or n < MIN_N:
        raise SiteproofError(f"n = {n!r} is not a whole number of at least {MIN_N}",
                             f"ask for n ≥ {MIN_N} units, e.g. n=3000")
    return int(n)


def _streams(seed: Any) -> dict[str, np.random.Generator]:
    """One independent Generator(PCG64) per simulation step, spawned from SeedSequence(seed)."""
    if isinstance(seed, bool) or not isinstance(seed, (int, np.integer)) or seed < 0:
        raise SiteproofError(f"seed = {seed!r} is not a non-negative integer", "pass seed=0 or another integer ≥ 0")
    children = np.random.SeedSequence(int(seed)).spawn(len(_STREAMS))
    return {name: np.random.Generator(np.random.PCG64(child)) for name, child in zip(_STREAMS, children)}


def _draw_units(design: Design, n: int, rng: dict[str, np.random.Generator]) -> dict[str, Any]:
    """Sites, covariates, helpers, μ₀ and τ (with the hidden effect) for n units — no assignment yet."""
    try:
        return _generate_units(design, n, rng)
    except SiteproofError as exc:
        raise SiteproofError(f"design '{design.name}': {exc.what}", exc.fix) from None


def _generate_units(design: Design, n: int, rng: dict[str, np.random.Generator]) -> dict[str, Any]:
    shares = np.array([s.share for s in design.sites])
    site_idx = rng["sites"].choice(len(design.sites), size=n, p=shares / shares.sum())
    env: dict[str, Any] = {name: value for name, value in design.parameters}
    covariates = _draw_covariates(design, site_idx, rng["covariates"], env)
    for helper, text in design.helpers:
        env[helper] = _evaluate(text, env, n, f"helpers.{helper}")
    hidden = _hidden_values(design)[site_idx]
    level = hidden if design.hidden.arm == "both" else np.zeros(n)
    extra = hidden if design.hidden.arm == "treated" else np.zeros(n)
    return {
        "site_idx": site_idx,
        "covariates": covariates,
        "env": env,
        "hidden": hidden,
        "mu0": _evaluate(design.baseline, env, n, "outcome.baseline") + level,
        "tau": _evaluate(design.effect, env, n, "effect.tau") + extra,
        "e_true": np.array([s.rate for s in design.sites])[site_idx],
    }


def _hidden_values(design: Design) -> np.ndarray:
    """h_s per site: strength · z_s, z_s = standardized rate (population SD) or the declared value."""
    hidden = design.hidden
    if hidden.strength == 0:
        return np.zeros(len(design.sites))
    if hidden.tracks == "declared":
        return hidden.strength * np.array([s.hidden for s in design.sites])
    rates = np.array([s.rate for s in design.sites])
    return hidden.strength * (rates - rates.mean()) / rates.std()


def _assign(design: Design, site_idx: np.ndarray, rng: np.random.Generator) -> np.ndarray:
    """Complete randomization within each site: round(rate_s · n_s) treated, uniformly without replacement."""
    w = np.zeros(site_idx.size, dtype=np.int64)
    for s, site in enumerate(design.sites):
        members = np.flatnonzero(site_idx == s)
        n_treated = int(round(site.rate * members.size))
        w[rng.permutation(members)[:n_treated]] = 1
    return w


def _unit_ids(prefix: str, n: int) -> np.ndarray:
    width = len(str(n))
    return np.array([f"{prefix}{i:0{width}d}" for i in range(1, n + 1)], dtype=object)


def _draw_cost(cost: CostModel, env: Mapping[str, Any], rng: np.random.Generator, n: int) -> np.ndarray:
    value = _evaluate(cost.value, env, n, "cost.value") + cost.noise_sd * rng.standard_normal(n)
    value = np.maximum(value, cost.lower)
    return np.round(value, cost.decimals) if cost.decimals is not None else value


def _observed_covariates(design: Design, values: dict[str, np.ndarray],
                         rng: np.random.Generator) -> dict[str, Any]:
    """The covariate columns a user sees: declared missing shares blanked (MCAR), integers kept as integers."""
    out: dict[str, Any] = {}
    for cov in design.covariates:
        x = values[cov.name]
        blank = rng.random(x.size) < cov.missing
        if cov.kind == "categorical":
            column = x.copy()
            column[blank] = None
            out[cov.name] = column
        elif blank.any():
            out[cov.name] = np.where(blank, np.nan, x)
        elif cov.kind in ("poisson", "bernoulli") or cov.decimals == 0:
            out[cov.name] = x.astype(np.int64)
        else:
            out[cov.name] = x
    return out


def _draw_covariates(design: Design, site_idx: np.ndarray, rng: np.random.Generator,
                     env: dict[str, Any]) -> dict[str, np.ndarray]:
    """Draw the covariates in declared order; each adds itself to ``env`` for the ones after it."""
    n = site_idx.size
    values: dict[str, np.ndarray] = {}
    for cov in design.covariates:
        if cov.kind == "derived":
            x = _evaluate(cov.param("value"), env, n, f"covariates[{cov.name}].value")
        else:
            u = np.clip(rng.random(n), _EPS, 1.0 - _EPS)
            x = _SAMPLERS[cov.kind](design, cov, u, site_idx, env)
        if cov.decimals is not None:
            x = np.round(x, cov.decimals)
        values[cov.name] = x
        env[cov.name] = x
    return values


def _param(cov: Covariate, key: str, env: Mapping[str, Any], n: int, positive: bool = False,
           unit_interval: bool = False) -> np.ndarray:
    value = _evaluate(cov.param(key), env, n, f"covariates[{cov.name}].{key}")
    if positive and np.any(value <= 0):
        raise SiteproofError(f"covariates[{cov.name}].{key} is not positive for some units",
                             "make the expression positive for every unit")
    if unit_interval and np.any((value < 0) | (value > 1)):
        raise SiteproofError(f"covariates[{cov.name}].{key} leaves [0, 1] for some units",
                             "wrap it in expit(...) or clip(..., 0, 1)")
    return value


def _site_adjustments(design: Design, cov: Covariate, site_idx: np.ndarray,
                      env: Mapping[str, Any]) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Per-unit location shift and truncation bounds (covariate bounds ∩ the unit's site rule)."""
    n = site_idx.size
    shift = np.zeros(n)
    lower = np.full(n, -np.inf if cov.lower is None else cov.lower)
    upper = np.full(n, np.inf if cov.upper is None else cov.upper)
    for s, site in enumerate(design.sites):
        rule = site.rule_for(cov.name)
        if rule is None:
            continue
        members = site_idx == s
        shift[members] += rule.shift
        key = f"sites[{site.name}].enroll.{cov.name}"
        if rule.lower is not None:
            lower[members] = np.maximum(lower[members], _evaluate(rule.lower, env, n, f"{key}.lower")[members])
        if rule.upper is not None:
            upper[members] = np.minimum(upper[members], _evaluate(rule.upper, env, n, f"{key}.upper")[members])
        if np.any(lower[members] > upper[members]):
            raise SiteproofError(f"{key}: the truncation leaves no admissible value for some units",
                                 "widen the lower/upper bounds of the rule")
    return shift, lower, upper


def _sample_normal(design: Design, cov: Covariate, u: np.ndarray, site_idx: np.ndarray,
                   env: Mapping[str, Any]) -> np.ndarray:
    """Truncated normal by inverse CDF: mean + shift + sd · Φ⁻¹ on the admissible interval."""
    n = u.size
    shift, lower, upper = _site_adjustments(design, cov, site_idx, env)
    mean = _param(cov, "mean", env, n) + shift
    sd = _param(cov, "sd", env, n, positive=True)
    x = mean + sd * stats.truncnorm.ppf(u, (lower - mean) / sd, (upper - mean) / sd)
    return np.clip(x, lower, upper)


def _sample_lognormal(design: Design, cov: Covariate, u: np.ndarray, site_idx: np.ndarray,
                      env: Mapping[str, Any]) -> np.ndarray:
    """exp of a truncated normal on the log scale; ``shift`` is added to meanlog (median × e^shift)."""
    n = u.size
    shift, lower, upper = _site_adjustments(design, cov, site_idx, env)
    meanlog = _param(cov, "meanlog", env, n) + shift
    sdlog = _param(cov, "sdlog", env, n, positive=True)
    with np.errstate(divide="ignore"):
        log_lo, log_hi = np.log(np.maximum(lower, 0.0)), np.log(np.maximum(upper, 0.0))
    z = stats.truncnorm.ppf(u, (log_lo - meanlog) / sdlog, (log_hi - meanlog) / sdlog)
    return np.clip(np.exp(meanlog + sdlog * z), lower, upper)


def _sample_uniform(design: Design, cov: Covariate, u: np.ndarray, site_idx: np.ndarray,
                    env: Mapping[str, Any]) -> np.ndarray:
    """Uniform on [low + shift, high + shift] ∩ [lower, upper]."""
    n = u.size
    shift, lower, upper = _site_adjustments(design, cov, site_idx, env)
    low = np.maximum(_param(cov, "low", env, n) + shift, lower)
    high = np.minimum(_param(cov, "high", env, n) + shift, upper)
    if np.any(low > high):
        raise SiteproofError(f"covariates[{cov.name}]: low > high for some units (after shift and bounds)",
                             "check low, high and the site rules")
    return low + u * (high - low)


def _sample_beta(design: Design, cov: Covariate, u: np.ndarray, site_idx: np.ndarray,
                 env: Mapping[str, Any]) -> np.ndarray:
    """Beta(mκ, (1−m)κ) with mean m = expit(logit(mean) + shift), truncated by inverse CDF."""
    n = u.size
    shift, lower, upper = _site_adjustments(design, cov, site_idx, env)
    mean = _param(cov, "mean", env, n, unit_interval=True)
    if np.any((mean <= 0) | (mean >= 1)):
        raise SiteproofError(f"covariates[{cov.name}].mean must lie strictly inside (0, 1)", "use expit(...)")
    m = special.expit(special.logit(mean) + shift)
    kappa = _param(cov, "concentration", env, n, positive=True)
    a, b = m * kappa, (1 - m) * kappa
    f_lo = stats.beta.cdf(np.clip(lower, 0, 1), a, b)
    f_hi = stats.beta.cdf(np.clip(upper, 0, 1), a, b)
    return np.clip(stats.beta.ppf(f_lo + u * (f_hi - f_lo), a, b), lower, upper)


def _sample_poisson(design: Design, cov: Covariate, u: np.ndarray, site_idx: np.ndarray,
                    env: Mapping[str, Any]) -> np.ndarray:
    """Poisson(mean · e^shift) restricted to the integers in [lower, upper], by inverse CDF."""
    n = u.size
    shift, lower, upper = _site_adjustments(design, cov, site_idx, env)
    lam = _param(cov, "mean", env, n, positive=True) * np.exp(shift)
    if np.any(lam > 500):
        raise SiteproofError(f"covariates[{cov.name}].mean exceeds 500 for some units",
                             "use a normal covariate for large counts")
    k_lo = np.maximum(np.ceil(lower), 0.0)
    k_hi = np.floor(upper)
    f_lo = np.where(k_lo > 0, special.pdtr(np.maximum(k_lo - 1, 0), lam), 0.0)
    f_hi = np.where(np.isfinite(k_hi), special.pdtr(np.where(np.isfinite(k_hi), k_hi, 0), lam), 1.0)
    return np.clip(_poisson_quantile(f_lo + u * (f_hi - f_lo), lam), k_lo, k_hi)


def _poisson_quantile(q: np.ndarray, lam: np.ndarray) -> np.ndarray:
    """Smallest k with P(Poisson(λ) ≤ k) ≥ q, by accumulating the probabilities term by term."""
    k = np.zeros(q.size)
    pmf = np.exp(-lam)
    cdf = pmf.copy()
    active = cdf < q
    step = 0
    limit = int(lam.max() + 40 * math.sqrt(lam.max()) + 60)
    while active.any() and step < limit:
        step += 1
        pmf = pmf * lam / step
        cdf = cdf + pmf
        k[active] = step
        active &= cdf < q
    return k


def _sample_bernoulli(design: Design, cov: Covariate, u: np.ndarray, site_idx: np.ndarray,
                      env: Mapping[str, Any]) -> np.ndarray:
    """1{U < p}, p = expit(logit(p) + shift)."""
    shift, _, _ = _site_adjustments(design, cov, site_idx, env)
    p = _param(cov, "p", env, u.size, unit_interval=True)
    with np.errstate(divide="ignore"):
        p = np.where(shift != 0, special.expit(special.logit(p) + shift), p)
    return (u < p).astype(float)


def _sample_categorical(design: Design, cov: Covariate, u: np.ndarray, site_idx: np.ndarray,
                        env: Mapping[str, Any]) -> np.ndarray:
    """Level k with probability p_k (fixed, or softmax of the logit expressions), after the site rules."""
    n = u.size
    params = dict(cov.params)
    if "probs" in params:
        probs = np.tile(np.asarray(params["probs"], dtype=float), (n, 1))
    else:
        logits = np.column_stack([_evaluate(expr, env, n, f"covariates[{cov.name}].logits[{k}]")
                                  for k, expr in enumerate(params["logits"])])
        probs = special.softmax(logits, axis=1)
    for s, site in enumerate(design.sites):
        rule = site.rule_for(cov.name)
        members = site_idx == s
        if rule is None or not members.any():
            continue
        if rule.probs is not None:
            probs[members] = rule.probs
        else:
            tilted = probs[members] * np.exp(np.asarray(rule.tilt))
            probs[members] = tilted / tilted.sum(axis=1, keepdims=True)
    cumulative = np.cumsum(probs, axis=1)
    index = np.minimum((u[:, None] >= cumulative).sum(axis=1), len(cov.levels) - 1)
    return np.asarray(cov.levels, dtype=object)[index]


_SAMPLERS: dict[str, Callable[..., np.ndarray]] = {
    "normal": _sample_normal, "lognormal": _sample_lognormal, "uniform": _sample_uniform,
    "beta": _sample_beta, "poisson": _sample_poisson, "bernoulli": _sample_bernoulli,
    "categorical": _sample_categorical,
}


# ── writing ──────────────────────────────────────────────────────────────────────────────────────────────


def write_simulation(trial: SimulatedTrial, out: Path | str, truth: Path | str | None = None) -> None:
    """Write the data (and, if asked, the truth) as CSV or Parquet by file suffix, atomically."""
    out = Path(out)
    if truth is not None and Path(truth).resolve() == out.resolve():
        raise SiteproofError(f"the data and the truth would both be written to {out}",
                             "give the truth file its own name")
    _write_frame(trial.data, out)
    if truth is not None:
        _write_frame(trial.truth, Path(truth))


def _write_frame(frame: pd.DataFrame, path: Path) -> None:
    suffix = path.suffix.lower()
    if suffix == ".csv":
        payload = frame.to_csv(index=False).encode("utf-8")
    elif suffix in (".parquet", ".pq"):
        buffer = io.BytesIO()
        frame.to_parquet(buffer, index=False)
        payload = buffer.getvalue()
    else:
        raise SiteproofError(f"cannot tell the file format of {path} from its suffix",
                             "end the file name in .csv or .parquet")
    atomic_write_bytes(path, payload)
