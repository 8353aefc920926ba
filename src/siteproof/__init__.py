"""siteproof: blind observational analysis of pooled multi-site randomized trials, scored against each
site's randomization.

The public Python API mirrors the command line:

* intake — :func:`load_study` with a :class:`StudySpec`;
* the blind analysis — :func:`run_blind` with a :class:`BlindConfig` → claims;
* unmasking — :func:`run_unmask` → scorecard; :func:`run_pipeline` does intake + blind + unmask + report;
* :func:`run_demo`, :func:`load_design` (and ``siteproof.simulation.simulate.simulate``), :func:`random_effects`, :func:`seal_benchmark`,
  :func:`grade_submissions`, :func:`write_report`, :func:`run_study`;
* benchmarks from one randomized trial — :func:`confound_trial`, :func:`write_confounded`, :func:`confound_study`.

Names are imported lazily so that ``import siteproof`` (and the command line) starts fast.
"""

from __future__ import annotations

import importlib
from typing import Any

from .core.errors import SiteproofError, SiteproofWarning

__version__ = "0.1.0"

_LAZY = {
    "Estimate": "core.estimates",
    "StudySpec": "intake.study",
    "Study": "intake.study",
    "load_study": "intake.study",
    "BlindConfig": "blind.analysis",
    "run_blind": "blind.analysis",
    "run_unmask": "unmask.scoring",
    "Scorecard": "unmask.scoring",
    "run_pipeline": "pipeline",
    "run_demo": "pipeline",
    "load_design": "simulation.simulate",
    "random_effects": "unmask.heterogeneity",
    "RandomEffectsResult": "unmask.heterogeneity",
    "seal_benchmark": "benchmark.holdout",
    "grade_submissions": "benchmark.holdout",
    "write_report": "reporting.report",
    "run_study": "simulation.montecarlo",
    "confound_trial": "simulation.confound",
    "write_confounded": "simulation.confoundfiles",
    "confound_study": "simulation.confoundstudy",
}

__all__ = ["SiteproofError", "SiteproofWarning", "__version__", *sorted(_LAZY)]


def __getattr__(name: str) -> Any:
    """Import a public name from its module on first use (PEP 562)."""
    if name in _LAZY:
        value = getattr(importlib.import_module(f".{_LAZY[name]}", __name__), name)
        globals()[name] = value
        return value
    raise AttributeError(f"module 'siteproof' has no attribute {name!r}")
