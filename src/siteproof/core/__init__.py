"""Primitives every stage uses: the error type, estimates, per-unit scores, learners, atomic outputs, console."""
