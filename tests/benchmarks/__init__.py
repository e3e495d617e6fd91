"""Benchmarks: simulated data, naive baselines and the Monte Carlo study."""
