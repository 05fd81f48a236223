"""Mode switches and training-step methods."""
from __future__ import annotations

#: method name -> what goes wrong when a statement names it without calling it
UNCALLED_METHOD_CONSEQUENCES = {
    "eval": "the model stays in training mode",
    "train": "the model stays in its current mode",
    "zero_grad": "gradients are never reset and keep accumulating",
    "step": "nothing is updated",
    "backward": "no gradient is computed",
}
