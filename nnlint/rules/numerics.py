"""Numerical-stability rules (NNL3xx)."""
