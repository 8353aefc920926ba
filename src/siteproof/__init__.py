"""siteproof: blind observational analysis of pooled multi-site randomized trials, scored against each
site's randomization.

The public Python API mirrors the command line: intake (:func:`load_study`), the blind analysis
(:func:`run_blind`), unmasking (:func:`run_unmask`), reports, holdout benchmarks and Monte Carlo studies.
"""

from .errors import SiteproofError, SiteproofWarning
from .estimates import Estimate
from .heterogeneity import RandomEffectsResult, random_effects

__version__ = "0.1.0"

__all__ = ["Estimate", "RandomEffectsResult", "SiteproofError", "SiteproofWarning", "__version__", "random_effects"]
