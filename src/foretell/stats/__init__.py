"""Pure statistical kernels (no pandas, I/O or PyMC): regression, permutation tests, HDIs, model selection."""
