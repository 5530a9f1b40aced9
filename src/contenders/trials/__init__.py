"""The trials every candidate goes through: prior predictive, posterior fit with
sampler health, and posterior predictive checks."""
