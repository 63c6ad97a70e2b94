"""Maximum-likelihood fits of the guess models: the batched optimiser and the per-participant tables."""
