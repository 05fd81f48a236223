"""Training-loop rules (NNL6xx)."""
