"""Per-unit scores whose means are effect estimates — the common currency of blind and design analyses.

For an assignment probability e (learned ê(x) in the blind analysis, the known site rate e_S after unmasking)
and outcome regressions μ̂₀, μ̂₁ (cross-fitted, functions of x only):

* IPW (Horvitz & Thompson 1952) score:        Γ*_i = W_i Y_i / e_i − (1 − W_i) Y_i / (1 − e_i)
* doubly robust arm scores (Robins, Rotnitzky & Zhao 1994):
      Γ₁_i = μ̂₁(x_i) + W_i (Y_i − μ̂₁(x_i)) / e_i
      Γ₀_i = μ̂₀(x_i) + (1 − W_i)(Y_i − μ̂₀(x_i)) / (1 − e_i)
* AIPW score: Γ_i = Γ₁_i − Γ₀_i.

With the known rate, E[Γ*_i | X, S] = E[Γ_i | X, S] = τ(X, S) whatever μ̂ is (docs/methods-unmask.md), which is why
any blind object that is a function of x alone can be scored with them.
"""

from __future__ import annotations

import numpy as np


def _check_prob(e: np.ndarray) -> np.ndarray:
    e = np.asarray(e, dtype=float)
    if np.any((e <= 0) | (e >= 1)) or not np.all(np.isfinite(e)):
        raise ValueError("assignment probabilities must lie strictly inside (0, 1)")
    return e


def ipw_scores(y: np.ndarray, w: np.ndarray, e: np.ndarray) -> np.ndarray:
    """Horvitz–Thompson score Γ*_i = W Y / e − (1 − W) Y / (1 − e)."""
    y = np.asarray(y, dtype=float)
    w = np.asarray(w, dtype=float)
    e = _check_prob(e)
    return w * y / e - (1.0 - w) * y / (1.0 - e)


def arm_scores(
    y: np.ndarray, w: np.ndarray, e: np.ndarray, mu0: np.ndarray, mu1: np.ndarray
) -> tuple[np.ndarray, np.ndarray]:
    """Doubly robust arm scores (Γ₀, Γ₁) (Robins, Rotnitzky & Zhao 1994)."""
    y = np.asarray(y, dtype=float)
    w = np.asarray(w, dtype=float)
    e = _check_prob(e)
    mu0 = np.asarray(mu0, dtype=float)
    mu1 = np.asarray(mu1, dtype=float)
    gamma1 = mu1 + w * (y - mu1) / e
    gamma0 = mu0 + (1.0 - w) * (y - mu0) / (1.0 - e)
    return gamma0, gamma1


def aipw_scores(y: np.ndarray, w: np.ndarray, e: np.ndarray, mu0: np.ndarray, mu1: np.ndarray) -> np.ndarray:
    """AIPW score Γ = Γ₁ − Γ₀; its mean is the AIPW estimate of the ATE."""
    gamma0, gamma1 = arm_scores(y, w, e, mu0, mu1)
    return gamma1 - gamma0
