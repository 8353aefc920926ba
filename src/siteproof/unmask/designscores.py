"""Per-unit scores of the blind weighting estimators for paired comparisons: with the propensity estimated.

The paired difference D = τ̂_blind − τ̂_design has SE sd(ψ_blind − ψ_design)/√n only when ψ_blind is the
influence function of τ̂_blind *as it was computed*, i.e. with ê fitted on the same data.  The scores that
``blind.average`` stores treat ê as known.  For a weighting estimator that is wrong at first order: the
estimation of ê moves τ̂ by a term that is linear in the residuals W − e.  With a propensity estimated
nonparametrically (consistently, at a fast enough rate), the influence function of the weighting estimator
is that of its augmented version with the outcome regressions μ_w(x) = E[Y | X = x, W = w] (Hirano, Imbens &
Ridder 2003, for the IPW; for a parametric propensity the same projection argument gives the correction
term of Lunceford & Davidian 2004, §3.2, which tends to it as the model grows).  With cross-fitted μ̂₀, μ̂₁:

* **Hájek IPW** (normalised weights a_i = W_i/ê_i, b_i = (1 − W_i)/(1 − ê_i)).  The linearization of the
  ratio μ̂₁ = Σ a_i Y_i / Σ a_i with ê estimated is
      φ₁ᵢ = a_i (Y_i − μ₁(x_i)) / ā + μ₁(x_i) − μ₁     (ā = mean a),
  and likewise φ₀ᵢ with b and μ₀; the scores are ψ_i = τ̂ + (g₁ᵢ − ḡ₁) − (g₀ᵢ − ḡ₀) with
  g₁ᵢ = a_i (Y_i − μ̂₁ᵢ)/ā + μ̂₁ᵢ and g₀ᵢ = b_i (Y_i − μ̂₀ᵢ)/b̄ + μ̂₀ᵢ, so mean(ψ) = τ̂ exactly.
* **Overlap weights** (Li, Morgan & Zaslavsky 2018; h(x) = e(x)(1 − e(x)), treated weighted by 1 − ê,
  controls by ê).  The influence function of τ̂_O = Σ W(1 − ê)Y/Σ W(1 − ê) − Σ (1 − W)êY/Σ (1 − W)ê with ê
  estimated is (Li, Morgan & Zaslavsky 2018, §4 and their supplementary material; Mao, Li & Greene 2019)
      φᵢ = [h(x_i)(μ₁(x_i) − μ₀(x_i) − τ_O) + W_i(1 − e_i)(Y_i − μ₁(x_i)) − (1 − W_i)e_i(Y_i − μ₀(x_i))] / E[h],
  the scores ψ_i = τ̂_O + (g_i − ḡ)/h̄ with g_i = ĥ_i(μ̂₁ᵢ − μ̂₀ᵢ) + W_i(1 − ê_i)(Y_i − μ̂₁ᵢ) −
  (1 − W_i)ê_i(Y_i − μ̂₀ᵢ), so mean(ψ) = τ̂_O exactly.

  These scores hold the tilt at the fitted ĥ, the estimand the design-based ATO scores of unmask use
  (``scoring.overlap_design_scores``), so the part of the error that comes from ĥ itself is common to both
  sides of D and cancels.  Against the ATO of the true e one would add (1 − 2ê)(W − ê)(μ̂₁ − μ̂₀ − τ̂_O)
  to g (the derivative of h(e) = e(1 − e); Hirano, Imbens & Ridder 2003, weighted effects with an
  estimated weight function).

The design-based side needs no such correction: its rates are known (the difference in means of each
site, and the oracle AIPW with e_S).  Both constructions give SE(D) = sd(ψ_blind − ψ_design)/√n with the
pairing kept; docs/validation.md ("Propensity verdict") reports the coverage of the resulting intervals for D
(IPW: SE/SD 0.71 → 1.05, overlap: 2.86 → 1.15 on ``covariate_allocation``; the overlap SE stays a few per
cent conservative, also in the saturated world of tests/test_designscores.py).
"""

from __future__ import annotations

import numpy as np


def ipw_paired_scores(
    y: np.ndarray, w: np.ndarray, e_hat: np.ndarray, mu0: np.ndarray, mu1: np.ndarray
) -> np.ndarray:
    """Scores of the Hájek IPW τ̂ with ê estimated: τ̂ + (g₁ − ḡ₁) − (g₀ − ḡ₀) (module docstring).

    g₁ = a(Y − μ̂₁)/ā + μ̂₁, g₀ = b(Y − μ̂₀)/b̄ + μ̂₀, a = W/ê, b = (1 − W)/(1 − ê) (Hirano, Imbens & Ridder
    2003; Lunceford & Davidian 2004).  mean(ψ) equals the Hájek estimate computed with the same ê.
    """
    y, w, e, mu0, mu1 = _arrays(y, w, e_hat, mu0, mu1)
    a, b = w / e, (1.0 - w) / (1.0 - e)
    tau = float(a @ y / a.sum() - b @ y / b.sum())
    g1 = a * (y - mu1) / a.mean() + mu1
    g0 = b * (y - mu0) / b.mean() + mu0
    return tau + (g1 - g1.mean()) - (g0 - g0.mean())


def overlap_paired_scores(
    y: np.ndarray, w: np.ndarray, e_hat: np.ndarray, mu0: np.ndarray, mu1: np.ndarray
) -> np.ndarray:
    """Scores of the overlap-weighted τ̂_O with ê estimated: τ̂_O + (g − ḡ)/h̄ (module docstring).

    g = ĥ(μ̂₁ − μ̂₀) + W(1 − ê)(Y − μ̂₁) − (1 − W)ê(Y − μ̂₀), ĥ = ê(1 − ê) (Li, Morgan & Zaslavsky 2018).
    mean(ψ) equals the overlap-weighted estimate computed with the same ê.
    """
    y, w, e, mu0, mu1 = _arrays(y, w, e_hat, mu0, mu1)
    a1, a0 = w * (1.0 - e), (1.0 - w) * e
    tau = float(a1 @ y / a1.sum() - a0 @ y / a0.sum())
    h = e * (1.0 - e)
    g = h * (mu1 - mu0) + a1 * (y - mu1) - a0 * (y - mu0)
    return tau + (g - g.mean()) / h.mean()


def _arrays(*columns: np.ndarray) -> tuple[np.ndarray, ...]:
    """The columns as float arrays of one length (ValueError otherwise)."""
    out = tuple(np.asarray(c, dtype=float).ravel() for c in columns)
    if len({c.size for c in out}) != 1:
        raise ValueError("y, w, e_hat, mu0 and mu1 must have the same length")
    return out
