"""Drawing one covariate of a scenario by the inverse CDF, with each site's enrollment rule applied.

Every covariate kind but ``derived`` consumes exactly one uniform U_i per unit and is drawn as
X = F⁻¹(F(lo) + U·(F(hi) − F(lo))) (the inversion method: Devroye 1986, *Non-Uniform Random Variate
Generation*, ch. II.2), so truncated draws stay exact and take one uniform like untruncated ones.  A site's
rule shifts the location (normal mean, lognormal log-mean, uniform ends, logit of a beta mean or a Bernoulli
p, log of a Poisson mean), truncates to [lower, upper] (numbers or expressions over earlier covariates), or
replaces / tilts by exp(tilt) the category probabilities.
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from typing import Any, Callable, Mapping

import numpy as np
from scipy import special, stats

from ..core.errors import SiteproofError
from .expressions import evaluate
from .scenario import Covariate, Scenario


@dataclass(frozen=True)
class _Draw:
    """One covariate to draw: uniforms, earlier values, unit sites, per-unit location shift and bounds."""

    scenario: Scenario
    cov: Covariate
    u: np.ndarray
    site_idx: np.ndarray
    env: Mapping[str, Any]
    shift: np.ndarray
    lower: np.ndarray
    upper: np.ndarray

    def param(self, key: str, positive: bool = False, unit_interval: bool = False) -> np.ndarray:
        """Distribution parameter ``key`` per unit, optionally required positive or inside [0, 1]."""
        name = self.cov.name
        value = evaluate(self.cov.param(key), self.env, self.u.size, f"covariates[{name}].{key}")
        if positive and np.any(value <= 0):
            raise SiteproofError(f"covariates[{name}].{key} is not positive for some units",
                                 "make the expression positive for every unit")
        if unit_interval and np.any((value < 0) | (value > 1)):
            raise SiteproofError(f"covariates[{name}].{key} leaves [0, 1] for some units",
                                 "wrap it in expit(...) or clip(..., 0, 1)")
        return value


def sample_covariate(scenario: Scenario, cov: Covariate, u: np.ndarray, site_idx: np.ndarray,
                     env: Mapping[str, Any]) -> np.ndarray:
    """Values of the non-derived covariate ``cov`` for units with uniforms ``u`` in sites ``site_idx``."""
    shift, lower, upper = _site_adjustments(scenario, cov, site_idx, env)
    return _SAMPLERS[cov.kind](_Draw(scenario, cov, u, site_idx, env, shift, lower, upper))


def _site_adjustments(scenario: Scenario, cov: Covariate, site_idx: np.ndarray,
                      env: Mapping[str, Any]) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Per-unit location shift and truncation bounds (covariate bounds ∩ the unit's site rule)."""
    n = site_idx.size
    shift = np.zeros(n)
    lower = np.full(n, -np.inf if cov.lower is None else cov.lower)
    upper = np.full(n, np.inf if cov.upper is None else cov.upper)
    for s, site in enumerate(scenario.sites):
        rule = site.rule_for(cov.name)
        if rule is None:
            continue
        members = site_idx == s
        shift[members] += rule.shift
        key = f"sites[{site.name}].enroll.{cov.name}"
        if rule.lower is not None:
            lower[members] = np.maximum(lower[members], evaluate(rule.lower, env, n, f"{key}.lower")[members])
        if rule.upper is not None:
            upper[members] = np.minimum(upper[members], evaluate(rule.upper, env, n, f"{key}.upper")[members])
        if np.any(lower[members] > upper[members]):
            raise SiteproofError(f"{key}: the truncation leaves no admissible value for some units",
                                 "widen the lower/upper bounds of the rule")
    return shift, lower, upper


def _sample_normal(draw: _Draw) -> np.ndarray:
    """Truncated normal by inverse CDF: mean + shift + sd · Φ⁻¹ on the admissible interval."""
    mean = draw.param("mean") + draw.shift
    sd = draw.param("sd", positive=True)
    x = mean + sd * stats.truncnorm.ppf(draw.u, (draw.lower - mean) / sd, (draw.upper - mean) / sd)
    return np.clip(x, draw.lower, draw.upper)


def _sample_lognormal(draw: _Draw) -> np.ndarray:
    """exp of a truncated normal on the log scale; ``shift`` is added to meanlog (median × e^shift)."""
    meanlog = draw.param("meanlog") + draw.shift
    sdlog = draw.param("sdlog", positive=True)
    with np.errstate(divide="ignore"):
        log_lo, log_hi = np.log(np.maximum(draw.lower, 0.0)), np.log(np.maximum(draw.upper, 0.0))
    z = stats.truncnorm.ppf(draw.u, (log_lo - meanlog) / sdlog, (log_hi - meanlog) / sdlog)
    return np.clip(np.exp(meanlog + sdlog * z), draw.lower, draw.upper)


def _sample_uniform(draw: _Draw) -> np.ndarray:
    """Uniform on [low + shift, high + shift] ∩ [lower, upper]."""
    low = np.maximum(draw.param("low") + draw.shift, draw.lower)
    high = np.minimum(draw.param("high") + draw.shift, draw.upper)
    if np.any(low > high):
        raise SiteproofError(f"covariates[{draw.cov.name}]: low > high for some units (after shift and bounds)",
                             "check low, high and the site rules")
    return low + draw.u * (high - low)


def _sample_beta(draw: _Draw) -> np.ndarray:
    """Beta(mκ, (1−m)κ) with mean m = expit(logit(mean) + shift), truncated by inverse CDF."""
    mean = draw.param("mean", unit_interval=True)
    if np.any((mean <= 0) | (mean >= 1)):
        raise SiteproofError(f"covariates[{draw.cov.name}].mean must lie strictly inside (0, 1)",
                             "use expit(...)")
    m = special.expit(special.logit(mean) + draw.shift)
    kappa = draw.param("concentration", positive=True)
    a, b = m * kappa, (1 - m) * kappa
    f_lo = stats.beta.cdf(np.clip(draw.lower, 0, 1), a, b)
    f_hi = stats.beta.cdf(np.clip(draw.upper, 0, 1), a, b)
    return np.clip(stats.beta.ppf(f_lo + draw.u * (f_hi - f_lo), a, b), draw.lower, draw.upper)


def _sample_poisson(draw: _Draw) -> np.ndarray:
    """Poisson(mean · e^shift) restricted to the integers in [lower, upper], by inverse CDF."""
    lam = draw.param("mean", positive=True) * np.exp(draw.shift)
    if np.any(lam > 500):
        raise SiteproofError(f"covariates[{draw.cov.name}].mean exceeds 500 for some units",
                             "use a normal covariate for large counts")
    k_lo = np.maximum(np.ceil(draw.lower), 0.0)
    k_hi = np.floor(draw.upper)
    f_lo = np.where(k_lo > 0, special.pdtr(np.maximum(k_lo - 1, 0), lam), 0.0)
    f_hi = np.where(np.isfinite(k_hi), special.pdtr(np.where(np.isfinite(k_hi), k_hi, 0), lam), 1.0)
    return np.clip(_poisson_quantile(f_lo + draw.u * (f_hi - f_lo), lam), k_lo, k_hi)


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


def _sample_bernoulli(draw: _Draw) -> np.ndarray:
    """1{U < p}, p = expit(logit(p) + shift)."""
    p = draw.param("p", unit_interval=True)
    with np.errstate(divide="ignore"):
        p = np.where(draw.shift != 0, special.expit(special.logit(p) + draw.shift), p)
    return (draw.u < p).astype(float)


def _sample_categorical(draw: _Draw) -> np.ndarray:
    """Level k with probability p_k (fixed, or softmax of the logit expressions), after the site rules."""
    cov, n = draw.cov, draw.u.size
    params = dict(cov.params)
    if "probs" in params:
        probs = np.tile(np.asarray(params["probs"], dtype=float), (n, 1))
    else:
        logits = np.column_stack([evaluate(expr, draw.env, n, f"covariates[{cov.name}].logits[{k}]")
                                  for k, expr in enumerate(params["logits"])])
        probs = special.softmax(logits, axis=1)
    for s, site in enumerate(draw.scenario.sites):
        rule = site.rule_for(cov.name)
        members = draw.site_idx == s
        if rule is None or not members.any():
            continue
        if rule.probs is not None:
            probs[members] = rule.probs
        else:
            tilted = probs[members] * np.exp(np.asarray(rule.tilt))
            probs[members] = tilted / tilted.sum(axis=1, keepdims=True)
    cumulative = np.cumsum(probs, axis=1)
    index = np.minimum((draw.u[:, None] >= cumulative).sum(axis=1), len(cov.levels) - 1)
    return np.asarray(cov.levels, dtype=object)[index]


_SAMPLERS: dict[str, Callable[[_Draw], np.ndarray]] = {
    "normal": _sample_normal, "lognormal": _sample_lognormal, "uniform": _sample_uniform,
    "beta": _sample_beta, "poisson": _sample_poisson, "bernoulli": _sample_bernoulli,
    "categorical": _sample_categorical,
}
