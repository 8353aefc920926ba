"""A scenario: a synthetic multi-site randomized trial with a known truth, as read from a synthetic_sites file.

A scenario holds its sites (size share, enrollment rules, assignment rate), the covariates and how they
depend on each other, the control-arm mean μ₀(x) and the unit effect τ(x) as expressions (see
:mod:`siteproof.simulation.expressions`), the outcome noise, an optional per-unit cost and an optional
*hidden site effect* that no covariate can see.  Reading and validating the TOML files is
:mod:`siteproof.simulation.scenariofile`; drawing data from a scenario is :mod:`siteproof.simulation.draw`.

The hidden site effect is h_s = strength · z_s with z_s = (rate_s − mean(rate)) / sd(rate) (unweighted over
sites, population SD) when it *tracks the rate*, or z_s declared per site.

A scenario may also put its units in *clusters* nested in the sites (classrooms within schools): a number of
clusters per site, cluster-level covariates drawn once per cluster, a cluster random effect set by its
intraclass correlation, and assignment of whole clusters (:class:`Clustering`).
"""

from __future__ import annotations

from dataclasses import dataclass, field, fields
from typing import Any

import numpy as np

#: the smallest number of units a scenario may be simulated with
MIN_N = 20


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
class Clustering:
    """Clusters nested in the sites: column name, clusters per site, cluster-level covariates, ICC, assignment.

    ``counts`` is (site, number of clusters) in site order.  The cluster random effect is u_c ~ N(0, σ_c²) with
    σ_c² = icc/(1 − icc)·σ² (σ the outcome noise SD), so the outcome noise u_c + σε has intraclass correlation
    ``icc``.  ``assignment`` is ``"cluster"`` (round(rate_s·G_s) whole clusters treated per site) or ``"unit"``
    (units randomized within sites as without clusters).
    """

    column: str
    counts: tuple[tuple[str, int], ...]
    covariates: tuple[str, ...] = ()
    icc: float = 0.0
    assignment: str = "cluster"
    id_prefix: str = "K"

    def cluster_sd(self, noise_sd: float) -> float:
        """σ_c = σ·√(icc/(1 − icc))."""
        return float(noise_sd * (self.icc / (1.0 - self.icc)) ** 0.5)

    def to_dict(self) -> dict[str, Any]:
        """JSON-ready summary."""
        return {"column": self.column, "counts": dict(self.counts), "covariates": list(self.covariates),
                "icc": self.icc, "assignment": self.assignment}


@dataclass(frozen=True)
class Scenario:
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
    clusters: Clustering | None = field(default=None, repr=False)

    def __repr__(self) -> str:
        """The dataclass repr, with ``clusters`` shown only when the scenario has clusters.

        A scenario without clusters keeps the repr (and so the study-folder fingerprint) it had before
        clusters existed.
        """
        shown = [f for f in fields(self) if f.repr or (f.name == "clusters" and self.clusters is not None)]
        inner = ", ".join(f"{f.name}={getattr(self, f.name)!r}" for f in shown)
        return f"{type(self).__qualname__}({inner})"

    @property
    def rates(self) -> dict[str, float]:
        """Site → declared assignment rate."""
        return {site.name: site.rate for site in self.sites}

    def hidden_values(self) -> np.ndarray:
        """h_s per site, in site order: strength · z_s, z_s = standardized rate (population SD) or declared."""
        hidden = self.hidden
        if hidden.strength == 0:
            return np.zeros(len(self.sites))
        if hidden.tracks == "declared":
            return hidden.strength * np.array([s.hidden for s in self.sites])
        rates = np.array([s.rate for s in self.sites])
        return hidden.strength * (rates - rates.mean()) / rates.std()

    def hidden_effects(self) -> dict[str, float]:
        """Site → hidden effect h_s in outcome units (see the module docstring)."""
        return dict(zip((s.name for s in self.sites), self.hidden_values().tolist()))

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
            **({"clusters": self.clusters.to_dict()} if self.clusters is not None else {}),
        }
