"""Hierarchical Bayesian machinery: sampling, the diagnostics gate, parameterisation, PSIS-LOO, the PyMC models."""
