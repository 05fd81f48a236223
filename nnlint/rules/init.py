"""Initialization rules (NNL2xx)."""
