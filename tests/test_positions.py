"""Positions of reported nodes equal libcst PositionProvider's on the whole module."""
import libcst as cst
import pytest
from libcst.metadata import MetadataWrapper, PositionProvider

from nnlint.analysis.walk import children
from nnlint.positions import positions_of
from tests.conftest import FIXTURES

SOURCES = sorted(str(path) for path in FIXTURES.rglob("*.py"))

TRICKY = [
    "# header comment\n\nimport torch\n\n\n@torch.no_grad()\n@staticmethod\ndef f(x):\n"
    "    return x\n",
    "import torch; net = torch.nn.Linear(2, 2); net.eval\nnet.train\n",
    "import torch\r\nnet = torch.nn.Linear(\r\n    2, 2)\r\nnet.eval\r\n",
    "import torch\nx = 1 + \\\n    2\n"
    "class A:\n\tdef f(self):\n\t\treturn torch.log(x)\n",
    "import torch\n\x0c\ndef f():\n    '''doc\n    more'''\n    return torch.exp(1)\n",
    "if True:\n    import torch\nelse:\n    pass\n"
    "y = [torch.log(v)\n     for v in range(3)]  # trailing\n",
]


def every_node(module):
    found, stack = [], [module]
    while stack:
        node = stack.pop()
        found.append(node)
        stack.extend(children(node))
    return found[1:]  # not the module itself


def agreeing(module, text, nodes, reference):
    found = positions_of(module, text, nodes)
    return {node: found[node] for node in nodes} == {node: reference[node] for node in nodes}


def check_agreement(text):
    try:
        module = cst.parse_module(text)
    except cst.ParserSyntaxError:
        return  # NNL001's fixtures: nothing is positioned by nodes there
    reference = MetadataWrapper(module, unsafe_skip_copy=True).resolve(PositionProvider)
    assert agreeing(module, text, every_node(module), reference)
    # one node alone, deep in each top-level statement: its statement's shift by itself
    for statement in module.body:
        deepest = every_node(cst.Module(body=[statement]))[-1]
        assert agreeing(module, text, [deepest], reference)


@pytest.mark.parametrize("path", SOURCES, ids=lambda p: p.split("fixtures/")[-1])
def test_positions_agree_with_position_provider_on_every_fixture(path):
    text = open(path, encoding="utf-8").read()
    check_agreement(text)


@pytest.mark.parametrize("text", TRICKY)
def test_positions_agree_on_layout_corner_cases(text):
    check_agreement(text)


def test_source_cpython_rejects_falls_back_to_the_whole_module():
    # PEP 695 syntax: libcst 1.9 parses it, CPython before 3.12 does not
    text = "import torch\ntype Alias = int\nz = torch.log(1)\n"
    try:
        module = cst.parse_module(text)
    except cst.ParserSyntaxError:
        pytest.skip("this libcst does not parse PEP 695 `type` statements")
    reference = MetadataWrapper(module, unsafe_skip_copy=True).resolve(PositionProvider)
    assert agreeing(module, text, every_node(module), reference)
