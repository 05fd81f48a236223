"""Dropout rules (NNL1xx)."""
