"""Canonical-name resolution of imports and aliases (analysis/names.py, model.py)."""
import libcst as cst
import pytest

from nnlint.analysis.model import ModuleModel


def resolve(source: str) -> frozenset[str]:
    """Resolve the expression on the last line of `source`."""
    module = cst.parse_module(source)
    model = ModuleModel(module)
    last = module.body[-1]
    assert isinstance(last, cst.SimpleStatementLine)
    return model.resolve(last.body[0].value)


@pytest.mark.parametrize("source, expected", [
    ("import torch.nn.functional as F\nF.dropout", {"torch.nn.functional.dropout"}),
    ("from torch import nn as n\nn.Dropout", {"torch.nn.Dropout"}),
    ("from torch import nn\nnn.functional.softmax", {"torch.nn.functional.softmax"}),
    ("import torch\ntorch.nn.functional.log_softmax", {"torch.nn.functional.log_softmax"}),
    ("import torch.nn\ntorch.nn.Linear", {"torch.nn.Linear"}),
    ("from torch.nn.functional import dropout as drop\ndrop", {"torch.nn.functional.dropout"}),
    ("from jax import numpy as jnp\njnp.log", {"jax.numpy.log"}),
    ("import numpy as np\nnp.log", {"numpy.log"}),
    ("from keras import layers\nlayers.Dropout", {"tensorflow.keras.layers.Dropout"}),
    ("import tensorflow as tf\ntf.keras.layers.Dense", {"tensorflow.keras.layers.Dense"}),
    ("import torch\nF = torch.nn.functional\nF.relu", {"torch.nn.functional.relu"}),
    ("import torch\nnn = torch.nn\nLin = nn.Linear\nLin", {"torch.nn.Linear"}),
])
def test_aliases_resolve_to_canonical_names(source, expected):
    assert resolve(source) == expected


def test_conditional_imports_give_every_candidate():
    source = ("try:\n    import torch as backend\nexcept ImportError:\n"
              "    import numpy as backend\nbackend.log")
    assert resolve(source) == {"torch.log", "numpy.log"}


def test_name_rebound_to_a_non_import_resolves_to_nothing():
    source = "import torch.nn.functional as F\nF = make_functional()\nF.dropout"
    assert resolve(source) == frozenset()


def test_unknown_names_and_calls_resolve_to_nothing():
    assert resolve("import torch\nmodel.eval") == frozenset()
    assert resolve("import torch\ntorch.zeros(3).log") == frozenset()


def test_imports_inside_functions_count_file_wide():
    source = "def f():\n    import torch.nn.functional as F\n    return F\nF.softmax"
    assert resolve(source) == {"torch.nn.functional.softmax"}


def test_relative_import_uses_the_package():
    module = cst.parse_module("from .models import DamageNet\nfrom ..core import util\nDamageNet")
    model = ModuleModel(module, package="kestrel.train")
    assert model.resolve(module.body[-1].body[0].value) == {"kestrel.train.models.DamageNet"}
    assert model.names.candidates("util") == {"kestrel.core.util"}


def test_classes_record_bases_methods_and_self_attributes():
    source = (
        "from torch import nn\n"
        "class Base(nn.Module):\n    pass\n"
        "class Net(Base):\n"
        "    def __init__(self):\n        self.p = 0.5\n        self.head = nn.Linear(2, 3)\n"
        "    def forward(self, x):\n        return self.head(x)\n"
    )
    model = ModuleModel(cst.parse_module(source))
    net = model.classes["Net"]
    assert net.bases == ("Base",)
    assert set(net.methods) == {"__init__", "forward"}
    assert set(net.attributes) == {"p", "head"}
    assert model.is_subclass_of(net, ("torch.nn.Module",))
    assert not model.is_subclass_of(model.classes["Base"], ("tensorflow.",))
