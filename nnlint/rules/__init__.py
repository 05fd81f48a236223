"""Rule families; importing this package registers every rule (see rules/base.py).

One module per family: general (NNL0xx), dropout (NNL1xx), init (NNL2xx), numerics (NNL3xx),
modes (NNL4xx), losses (NNL5xx), loops (NNL6xx).
"""
from nnlint.rules import dropout, general, init, losses, loops, modes, numerics  # noqa: F401
