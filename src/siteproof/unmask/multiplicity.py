"""Adjusted p-values for a family of tests: Holm (family-wise error rate) and Benjamini–Hochberg (FDR).

For m p-values sorted ascending p_(1) ≤ … ≤ p_(m):

* Holm (1979), step-down: p̃_(i) = max_{j ≤ i} min(1, (m − j + 1)·p_(j)).  Rejecting p̃ < α controls the
  probability of any false rejection in the family at α under any dependence.
* Benjamini & Hochberg (1995), step-up: p̃_(i) = min_{j ≥ i} min(1, m·p_(j)/j).  Rejecting p̃ < α controls
  the expected share of false rejections at α for independent or positively dependent tests.

NaN p-values (tests that could not be run) stay NaN and do not count in m.
"""

from __future__ import annotations

from typing import Sequence

import numpy as np

from ..blind.plan import check_multiplicity


def holm(p: Sequence[float] | np.ndarray) -> np.ndarray:
    """Holm step-down adjusted p-values (module docstring), in the input order."""
    return _adjust(np.asarray(p, dtype=float), _holm_sorted)


def benjamini_hochberg(p: Sequence[float] | np.ndarray) -> np.ndarray:
    """Benjamini–Hochberg step-up adjusted p-values (module docstring), in the input order."""
    return _adjust(np.asarray(p, dtype=float), _bh_sorted)


def adjust(p: Sequence[float] | np.ndarray, method: str) -> np.ndarray:
    """Adjusted p-values by ``method`` ("holm" or "bh")."""
    check_multiplicity(method)
    return holm(p) if method == "holm" else benjamini_hochberg(p)


def _holm_sorted(p: np.ndarray) -> np.ndarray:
    m = p.size
    return np.minimum(1.0, np.maximum.accumulate((m - np.arange(m)) * p))


def _bh_sorted(p: np.ndarray) -> np.ndarray:
    m = p.size
    scaled = m * p / np.arange(1, m + 1)
    return np.minimum(1.0, np.minimum.accumulate(scaled[::-1])[::-1])


def _adjust(p: np.ndarray, sorted_rule) -> np.ndarray:  # noqa: ANN001
    out = np.full(p.shape, np.nan)
    finite = np.flatnonzero(np.isfinite(p))
    if finite.size:
        order = finite[np.argsort(p[finite], kind="stable")]
        out[order] = sorted_rule(p[order])
    return out
