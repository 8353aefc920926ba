"""Unmasking: design-based truths, paired verdicts, propensity recovery, site heterogeneity, transport."""
