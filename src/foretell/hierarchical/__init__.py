"""Hierarchical Bayesian machinery: sampling, the diagnostics gate, parameterisation, PSIS-LOO, the PyMC models."""

import warnings

with warnings.catch_warnings():  # some ArviZ versions announce a refactor on import
    warnings.simplefilter("ignore")
    import arviz  # noqa: F401  (imported once, quietly, before any module of this package)
