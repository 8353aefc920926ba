"""Simulation with known truth: scenario files, drawing, Monte Carlo experiments."""
