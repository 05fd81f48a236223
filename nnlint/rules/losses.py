"""Loss-pairing rules (NNL5xx)."""
