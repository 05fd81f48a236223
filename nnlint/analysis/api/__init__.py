"""Framework knowledge: canonical names -> roles. The only place framework spellings live.

One submodule per idea (dropout, losses, numerics, init, modes); this package re-exports
the shared tables. Names are canonical (see names.py): `keras.*` is `tensorflow.keras.*`.
"""
from __future__ import annotations

#: top-level packages nnlint knows; a file importing none of them is not parsed
FRAMEWORK_PACKAGES = (
    "torch", "torchvision", "torchaudio", "timm", "transformers", "lightning",
    "pytorch_lightning", "tensorflow", "keras", "tf_keras", "jax", "flax", "optax", "haiku",
    "equinox", "numpy", "scipy",
)

#: packages never searched for in the checked tree (they are installed libraries)
EXTERNAL_PACKAGES = frozenset(FRAMEWORK_PACKAGES) | {
    "os", "sys", "math", "re", "json", "typing", "collections", "functools", "itertools",
    "pathlib", "dataclasses", "abc", "logging", "argparse", "random", "time", "copy",
    "pandas", "sklearn", "matplotlib", "tqdm", "wandb", "PIL", "cv2", "datasets",
}
