"""Reading and validating scenario files: synthetic_sites TOML → :class:`~siteproof.simulation.scenario.Scenario`.

The shipped scenarios live in the package ``siteproof.synthetic_sites`` (folder ``synthetic_sites/``); the file
format is documented in ``synthetic_sites/README.md``.  Everything is checked when a file is loaded: unknown
keys, wrong types, values out of range, names used twice and every expression against the names defined
before it; each mistake raises a :class:`SiteproofError` naming the offending key.  A file may ``extend``
another one: tables merge key by key, arrays and plain values replace.
"""

from __future__ import annotations

import math
import sys
from importlib import resources
from pathlib import Path
from typing import Any, Callable

import numpy as np

from ..core.errors import SiteproofError
from .expressions import FUNCTIONS, Scope, check_expression
from .scenario import MIN_N, Clustering, CostModel, Covariate, EnrollRule, HiddenEffect, Roles, Scenario, Site

if sys.version_info >= (3, 11):
    import tomllib
else:  # pragma: no cover - exercised on Python 3.10 only
    import tomli as tomllib

PACKAGE = "siteproof.synthetic_sites"

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
             "outcome", "effect", "cost", "hidden", "sites", "rates", "clusters"}
_CLUSTER_ASSIGNMENTS = ("cluster", "unit")


def list_designs() -> list[str]:
    """Names (file stems) of the scenarios shipped in siteproof.synthetic_sites."""
    root = resources.files(PACKAGE)
    return sorted(entry.name[: -len(".toml")] for entry in root.iterdir() if entry.name.endswith(".toml"))


def load_design(name_or_path: str | Path) -> Scenario:
    """Load a shipped scenario by name (e.g. ``"demo"``) or a scenario TOML file by path.

    A string counts as a path when it ends in ``.toml`` or contains a path separator.  Unknown names raise a
    :class:`SiteproofError` listing the shipped names; every mistake in the file names the offending key.
    """
    name, text, origin, base = _locate(name_or_path)
    raw = _resolve_extends(_read_toml(text, origin), origin, base, seen=(origin,))
    return _build_scenario(raw, name, origin)


def _is_path(name_or_path: str | Path) -> bool:
    """A Path, or a string ending in ``.toml`` or containing a path separator."""
    if isinstance(name_or_path, Path):
        return True
    return name_or_path.endswith(".toml") or "/" in name_or_path or "\\" in name_or_path


def _locate(name_or_path: str | Path, base: Path | None = None) -> tuple[str, str, str, Path | None]:
    """(scenario name, TOML text, origin label, folder for relative `extends`; None for shipped scenarios)."""
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
    """The parsed TOML table; a syntax error names ``origin``."""
    try:
        return tomllib.loads(text)
    except tomllib.TOMLDecodeError as exc:
        raise SiteproofError(f"{origin} is not valid TOML ({exc})",
                             "fix the TOML syntax (see synthetic_sites/README.md)") from None


def _resolve_extends(raw: dict[str, Any], origin: str, base: Path | None, seen: tuple[str, ...]) -> dict[str, Any]:
    """Merge ``raw`` over the scenario it ``extends``: tables merge key by key, arrays and values replace."""
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
    """``child`` over ``parent``: nested tables merge recursively, every other value replaces."""
    merged = dict(parent)
    for key, value in child.items():
        if isinstance(value, dict) and isinstance(merged.get(key), dict):
            merged[key] = _deep_merge(merged[key], value)
        else:
            merged[key] = value
    return merged


class _Reader:
    """Typed access to one TOML table; every error names the key path and the scenario."""

    def __init__(self, table: Any, where: str, origin: str) -> None:
        if not isinstance(table, dict):
            raise SiteproofError(f"{origin}: '{where}' must be a table", "see synthetic_sites/README.md")
        self.table, self.where, self.origin = table, where, origin

    def key(self, name: str) -> str:
        """The dotted key path of ``name`` inside this table."""
        return f"{self.where}.{name}" if self.where else name

    def fail(self, name: str, what: str, fix: str) -> SiteproofError:
        """The error for a bad value of ``name`` (to be raised by the caller)."""
        return SiteproofError(f"{self.origin}: '{self.key(name)}' {what}", fix)

    def allow(self, allowed: set[str]) -> None:
        """Raise on the first key of the table that is not in ``allowed``."""
        unknown = sorted(set(self.table) - allowed)
        if unknown:
            raise SiteproofError(f"{self.origin}: unknown key '{self.key(unknown[0])}'",
                                 f"use only {', '.join(sorted(allowed))}")

    def text(self, name: str, default: str | None = None) -> str:
        """A non-empty string."""
        value = self.table.get(name, default)
        if not isinstance(value, str) or not value.strip():
            raise self.fail(name, "must be a non-empty string", f'write {name} = "..."')
        return value

    def number(self, name: str, default: float | None = None, low: float = -math.inf, high: float = math.inf,
               open_low: bool = False, open_high: bool = False) -> float:
        """A finite number in [low, high] (ends open when asked)."""
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
        """An integer ≥ ``low`` (booleans refused)."""
        value = self.table.get(name, default)
        if isinstance(value, bool) or not isinstance(value, int) or value < low:
            raise self.fail(name, f"must be an integer ≥ {low} (got {value!r})", f"write {name} = <integer>")
        return value

    def expression(self, name: str) -> float | str:
        """A number, or an expression string (checked later, once every name is known)."""
        value = self.table.get(name)
        if isinstance(value, bool) or not isinstance(value, (int, float, str)) or value == "":
            raise self.fail(name, f"must be a number or an expression string (got {value!r})",
                            f"write {name} = 1.5 or {name} = 'an expression'")
        return float(value) if not isinstance(value, str) else value

    def identifier(self, name: str) -> str:
        """A string usable as a name in expressions (an identifier that is not a function name)."""
        value = self.text(name)
        if not value.isidentifier() or value in FUNCTIONS:
            raise self.fail(name, f"= {value!r} is not usable as a name in expressions",
                            "use letters, digits and underscores, not starting with a digit, "
                            "and not a function name")
        return value


def _build_scenario(raw: dict[str, Any], name: str, origin: str) -> Scenario:
    """Validate the merged TOML table ``raw`` and build the scenario; every expression is checked."""
    top = _Reader(raw, "", origin)
    top.allow(_TOP_KEYS)
    parameters = _named_values(raw.get("parameters", {}), "parameters", origin, _Reader.number)
    covariates = _parse_covariates(raw.get("covariates"), origin)
    helpers = _named_values(raw.get("helpers", {}), "helpers", origin, _as_expression)
    sites = _parse_sites(raw.get("sites"), raw.get("rates", {}), covariates, origin)
    outcome = _Reader(raw.get("outcome"), "outcome", origin)
    outcome.allow({"baseline", "noise_sd"})
    effect = _Reader(raw.get("effect"), "effect", origin)
    effect.allow({"tau"})
    cost = _parse_cost(raw.get("cost"), origin)
    roles = _parse_roles(raw.get("roles"), covariates, cost is not None, origin)
    clusters = _parse_clusters(raw.get("clusters"), raw.get("roles"), sites, covariates, origin)
    scenario = Scenario(
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
        clusters=clusters,
    )
    _check_names_unique(scenario, origin)
    _check_all_expressions(scenario, origin)
    return scenario


def _as_expression(reader: _Reader, name: str) -> str:
    """The expression text of ``name`` (a number becomes its repr)."""
    value = reader.expression(name)
    return repr(value) if isinstance(value, float) else value


def _named_values(table: Any, where: str, origin: str,
                  read: Callable[[_Reader, str], Any]) -> tuple[tuple[str, Any], ...]:
    """(name, ``read(reader, name)``) per key of the [parameters] or [helpers] table, in file order.

    Every key becomes a name in expressions, so it must be an identifier that is not a function name.
    """
    reader = _Reader(table, where, origin)
    out = []
    for key in table:
        if not key.isidentifier() or key in FUNCTIONS:
            raise reader.fail(key, "is not usable as a name in expressions", "rename it (letters, digits, _)")
        out.append((key, read(reader, key)))
    return tuple(out)


def _parse_covariates(entries: Any, origin: str) -> tuple[Covariate, ...]:
    """The non-empty ``[[covariates]]`` array, in declared order."""
    if not isinstance(entries, list) or not entries:
        raise SiteproofError(f"{origin}: '[[covariates]]' is missing or empty",
                             "declare each covariate in a [[covariates]] table (see synthetic_sites/README.md)")
    return tuple(_parse_covariate(entry, i, origin) for i, entry in enumerate(entries))


def _parse_covariate(entry: Any, index: int, origin: str) -> Covariate:
    """One ``[[covariates]]`` table: name, kind, its parameters, bounds, rounding and missing share."""
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
    """Levels and either fixed ``probs`` (summing to 1) or one ``logits`` expression per level."""
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
    """The ``[[sites]]`` array with shares normalized to sum to 1 and the ``[rates]`` overrides applied."""
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
    """One ``[[sites]]`` table: name, share, rate in (0, 1), enrollment rules, hidden z-value, note."""
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
    """A site's enrollment rule for ``cov``: probs or tilt (categorical), else shift and truncation bounds."""
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
    """The ``[hidden]`` table, checked against the sites (distinct rates, or declared values)."""
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
    """The optional ``[cost]`` table."""
    if table is None:
        return None
    reader = _Reader(table, "cost", origin)
    reader.allow({"value", "noise_sd", "lower", "decimals"})
    return CostModel(value=_as_expression(reader, "value"), noise_sd=reader.number("noise_sd", 0.0, low=0.0),
                     lower=reader.number("lower", 0.0),
                     decimals=reader.integer("decimals") if "decimals" in table else 2)


def _parse_roles(table: Any, covariates: tuple[Covariate, ...], has_cost: bool, origin: str) -> Roles:
    """The ``[roles]`` column names; a cost column exactly when a ``[cost]`` table is given."""
    reader = _Reader(table, "roles", origin)
    reader.allow({"outcome", "treatment", "site", "id", "cost", "cluster"})
    cost = reader.text("cost") if "cost" in reader.table else None
    if (cost is not None) != has_cost:
        raise reader.fail("cost", "and the [cost] table must be given together",
                          "name the cost column in [roles] and describe it in [cost], or drop both")
    return Roles(outcome=reader.text("outcome"), treatment=reader.text("treatment"), site=reader.text("site"),
                 id=reader.text("id"), cost=cost, covariates=tuple(c.name for c in covariates))


def _parse_clusters(table: Any, roles: Any, sites: tuple[Site, ...], covariates: tuple[Covariate, ...],
                    origin: str) -> Clustering | None:
    """The optional ``[clusters]`` table; the cluster column is ``roles.cluster`` (both or neither)."""
    column = roles.get("cluster") if isinstance(roles, dict) else None
    if (table is None) != (column is None):
        raise SiteproofError(f"{origin}: 'roles.cluster' and the [clusters] table must be given together",
                             "name the cluster column in [roles] and describe the clusters in [clusters], or drop both")
    if table is None:
        return None
    reader = _Reader(table, "clusters", origin)
    reader.allow({"per_site", "counts", "covariates", "icc", "assignment", "id_prefix"})
    per_site = reader.integer("per_site", low=1)
    counts = _Reader(table.get("counts", {}), "clusters.counts", origin)
    names = [site.name for site in sites]
    for key in counts.table:
        if key not in names:
            raise counts.fail(key, "is not a site of this design", f"use one of {', '.join(names)}")
    assignment = reader.text("assignment", "cluster")
    if assignment not in _CLUSTER_ASSIGNMENTS:
        raise reader.fail("assignment", f"= {assignment!r} is not 'cluster' or 'unit'", 'write assignment = "cluster"')
    level = table.get("covariates", [])
    by_name = {c.name: c for c in covariates}
    if not isinstance(level, list) or not all(isinstance(v, str) and v in by_name for v in level):
        raise reader.fail("covariates", "must list covariates of this design", f"use names among {', '.join(by_name)}")
    for name in level:
        if by_name[name].missing:
            raise reader.fail("covariates", f"includes '{name}', which has a missing share",
                              "drop 'missing' from cluster-level covariates")
    return Clustering(
        column=_Reader(roles, "roles", origin).text("cluster"),
        counts=tuple((name, counts.integer(name, low=1) if name in counts.table else per_site) for name in names),
        covariates=tuple(c.name for c in covariates if c.name in level),
        icc=reader.number("icc", 0.0, low=0.0, high=1.0, open_high=True),
        assignment=assignment,
        id_prefix=reader.text("id_prefix", "K"),
    )


def _check_names_unique(scenario: Scenario, origin: str) -> None:
    """No name used twice among the columns, parameters and helpers."""
    roles = scenario.roles
    columns = [roles.id, roles.site, roles.treatment, roles.outcome, *roles.covariates]
    columns += [roles.cost] if roles.cost else []
    columns += [scenario.clusters.column] if scenario.clusters else []
    names = columns + [p for p, _ in scenario.parameters] + [h for h, _ in scenario.helpers]
    clash = sorted({n for n in names if names.count(n) > 1})
    if clash:
        raise SiteproofError(f"{origin}: the name '{clash[0]}' is used twice (columns, parameters, helpers)",
                             "give every column, parameter and helper its own name")


def _check_all_expressions(scenario: Scenario, origin: str) -> None:
    """Check every expression against the names defined before it (parameters, earlier covariates, helpers).

    A cluster-level covariate sees only the parameters and the cluster-level covariates above it.
    """
    numeric = {p for p, _ in scenario.parameters}
    categorical: dict[str, tuple[str, ...]] = {}
    cluster_level = set(scenario.clusters.covariates) if scenario.clusters else set()
    cluster_numeric = set(numeric)
    cluster_categorical: dict[str, tuple[str, ...]] = {}
    before: dict[str, Scope] = {}
    for cov in scenario.covariates:
        at_cluster = cov.name in cluster_level
        scope = Scope(cluster_numeric, cluster_categorical) if at_cluster else Scope(numeric, categorical)
        before[cov.name] = scope
        key = f"{origin}: covariates[{cov.name}]"
        for param, value in cov.params:
            for i, item in enumerate(value if isinstance(value, tuple) else (value,)):
                if isinstance(item, str):
                    check_expression(item, f"{key}.{param}" + (f"[{i}]" if isinstance(value, tuple) else ""),
                                     scope)
        if cov.kind == "categorical":
            categorical[cov.name] = cov.levels
            if at_cluster:
                cluster_categorical[cov.name] = cov.levels
        else:
            numeric.add(cov.name)
            if at_cluster:
                cluster_numeric.add(cov.name)
    for site in scenario.sites:
        for rule in site.enroll:
            for bound in ("lower", "upper"):
                value = getattr(rule, bound)
                if isinstance(value, str):
                    check_expression(value, f"{origin}: sites[{site.name}].enroll.{rule.covariate}.{bound}",
                                     before[rule.covariate])
    for helper, text in scenario.helpers:
        check_expression(text, f"{origin}: helpers.{helper}", Scope(numeric, categorical))
        numeric.add(helper)
    full = Scope(numeric, categorical)
    check_expression(scenario.baseline, f"{origin}: outcome.baseline", full)
    check_expression(scenario.effect, f"{origin}: effect.tau", full)
    if scenario.cost is not None:
        check_expression(scenario.cost.value, f"{origin}: cost.value", full)
