"""`nnlint fix` for NNL301/NNL303/NNL304: the exact rewrites, the aliases they use, the imports
they add, the cases left alone, and (with numpy/scipy/PyTorch) that the rewrite computes the
same values where the naive form is finite and stays finite where it is not."""
import numpy as np
import pytest

from nnlint.analysis.project import ProjectIndex
from nnlint.config import Settings, with_default_ignores
from nnlint.engine import lint_text
from nnlint.fix import fix_text

SETTINGS = with_default_ignores(Settings())
TORCH = "import torch\n"
TORCH_F = "import torch\nimport torch.nn.functional as F\n"
TF = "import tensorflow as tf\n"
JAX = "import jax\nimport jax.numpy as jnp\n"


def fixed(source: str) -> str:
    text, _, remaining = fix_text(source, "probe.py", SETTINGS, ProjectIndex(SETTINGS))
    assert not any(finding.fixable for finding in remaining)
    again, applied, _ = fix_text(text, "probe.py", SETTINGS, ProjectIndex(SETTINGS))
    assert (again, applied) == (text, [])  # idempotent
    return text


REWRITES = [
    # NNL301: log of softmax -> log_softmax with the same arguments and the same alias
    (TORCH, "y = torch.log(torch.softmax(x, dim=1))\n", "y = torch.log_softmax(x, dim=1)\n"),
    (TORCH_F, "y = torch.log(F.softmax(x, dim=-1, dtype=torch.float64))\n",
     "y = F.log_softmax(x, dim=-1, dtype=torch.float64)\n"),
    (TORCH, "y = x.softmax(-1).log()\n", "y = x.log_softmax(-1)\n"),
    (TORCH, "y = torch.softmax(x, 1).log()\n", "y = torch.log_softmax(x, 1)\n"),
    (TORCH, "y = -(torch.log(torch.softmax(x, 1)))\n", "y = -(torch.log_softmax(x, 1))\n"),
    (TF, "y = tf.math.log(tf.nn.softmax(x, axis=-1))\n", "y = tf.nn.log_softmax(x, axis=-1)\n"),
    (JAX, "y = jnp.log(jax.nn.softmax(x, axis=1))\n", "y = jax.nn.log_softmax(x, axis=1)\n"),
    ("import numpy as np\nfrom scipy import special\n",
     "y = np.log(special.softmax(x, axis=0))\n", "y = special.log_softmax(x, axis=0)\n"),
    # log of sigmoid -> logsigmoid, through the most specific alias the file has
    (TORCH, "y = torch.log(torch.sigmoid(x))\n", "y = torch.nn.functional.logsigmoid(x)\n"),
    (TORCH_F, "y = torch.log(torch.sigmoid(x))\n", "y = F.logsigmoid(x)\n"),
    (TORCH + "from torch.nn.functional import logsigmoid\n", "y = torch.log(x.sigmoid())\n",
     "y = logsigmoid(x)\n"),
    (TORCH_F, "y = x.sigmoid().log()\n", "y = F.logsigmoid(x)\n"),
    (TF, "y = tf.math.log(tf.nn.sigmoid(x))\n", "y = tf.math.log_sigmoid(x)\n"),
    (JAX, "y = jnp.log(jax.nn.sigmoid(x))\n", "y = jax.nn.log_sigmoid(x)\n"),
    ("import numpy as np\nimport scipy.special\n", "y = np.log(scipy.special.expit(x))\n",
     "y = scipy.special.log_expit(x)\n"),
    # log(1 - sigmoid(x)) -> logsigmoid(-x), parenthesised where -x would bind wrongly
    (TORCH_F, "y = torch.log(1 - torch.sigmoid(a + b))\n", "y = F.logsigmoid(-(a + b))\n"),
    (TORCH_F, "y = torch.log(1.0 - torch.sigmoid(-x))\n", "y = F.logsigmoid(-(-x))\n"),
    (TORCH_F, "y = torch.log(1 - x[0].sigmoid())\n", "y = F.logsigmoid(-x[0])\n"),
    (TF, "y = tf.math.log(1. - tf.sigmoid(x * 2))\n", "y = tf.math.log_sigmoid(-(x * 2))\n"),
    # NNL303: exp(x) / sum(exp(x), axis, keepdims=True) -> softmax over that axis
    (TORCH, "y = torch.exp(s) / torch.exp(s).sum(dim=-1, keepdim=True)\n",
     "y = torch.softmax(s, dim=-1)\n"),
    (TORCH, "y = torch.exp(s) / torch.sum(torch.exp(s), 1, True)\n", "y = torch.softmax(s, 1)\n"),
    (TORCH, "y = s.exp() / s.exp().sum(-1, keepdim=True)\n", "y = s.softmax(-1)\n"),
    (TORCH, "y = 2 * (torch.exp(s) / torch.exp(s).sum(1, keepdim=True))\n",
     "y = 2 * (torch.softmax(s, 1))\n"),
    (TF, "y = tf.exp(s) / tf.reduce_sum(tf.exp(s), axis=1, keepdims=True)\n",
     "y = tf.nn.softmax(s, axis=1)\n"),
    (JAX, "y = jnp.exp(s) / jnp.sum(jnp.exp(s))\n", "y = jax.nn.softmax(s, axis=None)\n"),
    ("import numpy as np\nfrom scipy.special import softmax\n",
     "y = np.exp(s) / np.exp(s).sum(axis=1, keepdims=True)\n", "y = softmax(s, axis=1)\n"),
    ("import numpy as np\nfrom scipy.special import softmax\n",
     "y = np.exp(s) / np.sum(np.exp(s))\n", "y = softmax(s)\n"),
    # NNL304: log(sum(exp(x), axis)) -> logsumexp over that axis, keepdims carried over
    (TORCH, "y = torch.log(torch.exp(s).sum(dim=-1))\n", "y = torch.logsumexp(s, dim=-1)\n"),
    (TORCH, "y = s.exp().sum(1, keepdim=True).log()\n", "y = s.logsumexp(1, keepdim=True)\n"),
    (TORCH, "y = torch.log(torch.sum(torch.exp(s), dim=(0, 1)))\n",
     "y = torch.logsumexp(s, dim=(0, 1))\n"),
    (TF, "y = tf.math.log(tf.reduce_sum(tf.exp(s), 1, True))\n",
     "y = tf.math.reduce_logsumexp(s, 1, True)\n"),
    # an axis of None is dropped (the default), so a positional keep-dims becomes a keyword
    (TF, "y = tf.math.log(tf.reduce_sum(tf.exp(s), None, True))\n",
     "y = tf.math.reduce_logsumexp(s, keepdims=True)\n"),
    (JAX, "y = jnp.log(jnp.sum(jnp.exp(s), axis=-1, keepdims=True))\n",
     "y = jax.nn.logsumexp(s, axis=-1, keepdims=True)\n"),
    ("import numpy as np\nimport scipy.special\n", "y = np.log(np.exp(s).sum())\n",
     "y = scipy.special.logsumexp(s)\n"),
    ("import numpy as np\nfrom scipy.special import logsumexp\n",
     "y = np.log(np.sum(np.exp(s), axis=1))\n", "y = logsumexp(s, axis=1)\n"),
]


@pytest.mark.parametrize("prelude, line, expected", REWRITES)
def test_each_variant_is_rewritten_exactly(prelude, line, expected):
    assert fixed(prelude + line) == prelude + expected


def test_an_import_is_added_only_when_no_alias_fits():
    source = "from torch import log, sigmoid\n\ny = log(sigmoid(x))\n"
    assert fixed(source) == ("from torch import log, sigmoid\n"
                             "import torch.nn.functional as F\n\ny = F.logsigmoid(x)\n")
    # `F` is taken in this file: the package itself is imported instead
    taken = "from torch import log, sigmoid\nF = 3\ny = log(sigmoid(x))\n"
    assert fixed(taken) == ("from torch import log, sigmoid\nimport torch\nF = 3\n"
                            "y = torch.nn.functional.logsigmoid(x)\n")
    # jax.numpy alone does not reach jax.nn: `import jax` joins the import block
    numpy_only = "import jax.numpy as jnp\n\ny = jnp.exp(s) / jnp.sum(jnp.exp(s))\n"
    assert fixed(numpy_only) == ("import jax.numpy as jnp\nimport jax\n\n"
                                 "y = jax.nn.softmax(s, axis=None)\n")


def test_shadowed_or_function_local_aliases_are_not_used():
    shadowed = TORCH_F + "def head(x, F):\n    return torch.log(torch.sigmoid(x))\n"
    assert fixed(shadowed) == shadowed.replace("torch.log(torch.sigmoid(x))",
                                               "torch.nn.functional.logsigmoid(x)")
    local = ("def head(x):\n    import torch\n    import torch.nn.functional as F\n"
             "    return torch.log(torch.sigmoid(x))\n\n"
             "def tail(x):\n    import torch\n    return torch.log(torch.sigmoid(x))\n")
    # F is imported in `head` only: both functions spell the name through their own `torch`
    assert fixed(local) == local.replace("torch.log(torch.sigmoid(x))",
                                         "torch.nn.functional.logsigmoid(x)")


UNFIXED = [
    # the probability reaches the log through a name: it may have changed on the way
    ("NNL301", TORCH, "probs = torch.softmax(x, 1)\ny = torch.log(probs)\n"),
    # log2 of a softmax is not log_softmax
    ("NNL301", TORCH, "y = torch.log2(torch.softmax(x, 1))\n"),
    # arguments the stable form does not take alike
    ("NNL301", TORCH_F, "y = torch.log(F.softmax(x, -1, 5))\n"),
    ("NNL301", TORCH, "y = torch.log(torch.sigmoid(x, out=buffer))\n"),
    ("NNL301", JAX, "y = jnp.log(jax.nn.softmax(x, where=valid))\n"),
    ("NNL301", TORCH_F, "y = torch.log(F.gumbel_softmax(x, tau=0.5))\n"),
    ("NNL301", TORCH, "y = torch.log(1 - torch.softmax(x, 1))\n"),
    # a numpy log of a TensorFlow softmax: no single framework to rewrite into
    ("NNL301", "import numpy as np\n" + TF, "y = np.log(tf.nn.softmax(x))\n"),
    # spread over lines with a comment: the rewrite would drop it
    ("NNL301", TORCH, "y = torch.log(\n    torch.softmax(x, 1)  # grades\n)\n"),
    # NNL303: no keepdim (the quotient broadcasts differently), no dim (torch.softmax needs
    # one, tf's default is -1), an extra dtype, a call that may differ between its two uses
    ("NNL303", TORCH, "y = torch.exp(s) / torch.exp(s).sum(dim=-1)\n"),
    ("NNL303", TORCH, "y = torch.exp(s) / torch.exp(s).sum()\n"),
    ("NNL303", TF, "y = tf.exp(s) / tf.reduce_sum(tf.exp(s))\n"),
    ("NNL303", TORCH,
     "y = torch.exp(s) / torch.exp(s).sum(-1, keepdim=True, dtype=torch.float64)\n"),
    ("NNL303", TORCH, "y = torch.exp(net(s)) / torch.exp(net(s)).sum(-1, keepdim=True)\n"),
    ("NNL303", TORCH, "w = torch.exp(s)\ny = w / w.sum(-1, keepdim=True)\n"),
    ("NNL303", TORCH, "y = (torch.exp(s)  # weights\n     / torch.exp(s).sum(-1, keepdim=True))\n"),
    # numerator and denominator (or log and sum) from different frameworks
    ("NNL303", "import numpy as np\n" + TORCH,
     "y = torch.exp(s) / np.exp(s).sum(axis=-1, keepdims=True)\n"),
    ("NNL304", "import numpy as np\nimport scipy.special\n" + TORCH,
     "y = np.log(torch.exp(s).sum(-1))\n"),
    # pure NumPy: numpy has no softmax/logsumexp and SciPy is not imported for it
    ("NNL303", "import numpy as np\n", "y = np.exp(s) / np.exp(s).sum(axis=1, keepdims=True)\n"),
    ("NNL304", "import numpy as np\n", "y = np.log(np.sum(np.exp(s), axis=1))\n"),
    # NNL304: torch.logsumexp needs a dim; nansum is another reduction; a name in between
    ("NNL304", TORCH, "y = torch.log(torch.exp(s).sum())\n"),
    ("NNL304", "import numpy as np\nimport scipy.special\n", "y = np.log(np.nansum(np.exp(s)))\n"),
    ("NNL304", TORCH, "total = torch.exp(s).sum(-1)\ny = torch.log(total)\n"),
]


@pytest.mark.parametrize("code, prelude, body", UNFIXED)
def test_uncertain_rewrites_are_reported_without_a_fix(code, prelude, body):
    source = prelude + body
    found = [finding for finding in lint_text(source, "probe.py", SETTINGS).findings
             if finding.code == code]
    assert found and not any(finding.fixable for finding in found)
    assert fix_text(source, "probe.py", SETTINGS)[0] == source


def test_only_one_minus_a_sigmoid_becomes_logsigmoid_of_minus_x():
    import libcst as cst

    from nnlint.analysis.model import ModuleModel
    from nnlint.analysis.stable_forms import log_probability_fix

    # the rule never reports these (not exact zeros); the rewrite must refuse them anyway
    for text in ("y = torch.log(2 - torch.sigmoid(x))\n", "y = torch.log(z - torch.sigmoid(x))\n"):
        module = cst.parse_module(TORCH_F + text)
        model = ModuleModel(module, source=TORCH_F + text)
        log_call = module.body[-1].body[0].value
        assert log_probability_fix(model, log_call, model.module_scope) is None
    module = cst.parse_module(TORCH_F + "y = torch.log(1 - torch.sigmoid(x))\n")
    model = ModuleModel(module, source=module.code)
    rewrite = log_probability_fix(model, module.body[-1].body[0].value, model.module_scope)
    assert module.code_for_node(rewrite[1]) == "F.logsigmoid(-x)" and rewrite[2] == ()


# -- references: the rewrite computes what the naive form means, and stays finite ------------
def _run(source: str, name: str):
    namespace: dict = {}
    exec(compile(source, "probe.py", "exec"), namespace)  # test snippets, ours
    return namespace[name]


def _pair(source: str, name: str):
    rewritten = fixed(source)
    assert rewritten != source
    return _run(source, name), _run(rewritten, name)


def test_torch_rewrites_agree_where_finite_and_stay_finite_where_not():
    torch = pytest.importorskip("torch")
    source = TORCH_F + (
        "def grades(x):\n    return torch.log(torch.softmax(x, dim=-1))\n"
        "def sealed(x):\n    return torch.log(torch.sigmoid(x))\n"
        "def broken(x):\n    return torch.log(1 - torch.sigmoid(x))\n"
        "def shares(x):\n    return torch.exp(x) / torch.exp(x).sum(-1, keepdim=True)\n"
        "def normaliser(x):\n    return torch.log(torch.exp(x).sum(dim=-1))\n")
    moderate = torch.tensor([[0.5, -1.0, 2.0], [3.0, 0.0, -2.0]])
    # PyTorch 2.13 CPU, float32: each naive form fails on these inputs
    extreme = {
        "grades": (torch.tensor([0.0, -200.0]), torch.tensor([0.0, -200.0])),  # log(0) = -inf
        "sealed": (torch.tensor([-200.0]), torch.tensor([-200.0])),  # sigmoid(-200) == 0
        "broken": (torch.tensor([30.0]), torch.tensor([-30.0])),  # 1 - sigmoid(30) == 0
        "shares": (torch.tensor([1000.0, 0.0]), torch.tensor([1.0, 0.0])),  # inf / inf
        "normaliser": (torch.tensor([1000.0, 0.0]), torch.tensor(1000.0)),  # log(inf)
    }
    for name, (inputs, stable_value) in extreme.items():
        naive, stable = _pair(source, name)
        assert torch.allclose(naive(moderate), stable(moderate), atol=1e-6), name
        assert not torch.isfinite(naive(inputs)).all(), name
        assert torch.allclose(stable(inputs), stable_value, atol=1e-4), name


def test_scipy_rewrites_agree_with_numpy_where_finite_and_stay_finite_where_not():
    source = ("import numpy as np\nfrom scipy.special import logsumexp, softmax\n"
              "def shares(x):\n    return np.exp(x) / np.exp(x).sum(axis=1, keepdims=True)\n"
              "def normaliser(x):\n    return np.log(np.sum(np.exp(x), axis=1))\n"
              "def everything(x):\n    return np.log(np.exp(x).sum())\n")
    moderate = np.array([[0.5, -1.0, 2.0], [3.0, 0.0, -2.0]])
    # float64: exp(1000) overflows (ln of finfo(float64).max is 709.8, numpy)
    extreme = np.array([[1000.0, 0.0, -1.0], [0.0, 1.0, 2.0]])
    with np.errstate(over="ignore", invalid="ignore"):
        for name in ("shares", "normaliser", "everything"):
            naive, stable = _pair(source, name)
            assert np.allclose(naive(moderate), stable(moderate), rtol=1e-12), name
            assert not np.isfinite(naive(extreme)).all(), name
            assert np.isfinite(stable(extreme)).all(), name
    naive, stable = _pair(source, "normaliser")
    assert stable(extreme)[0] == pytest.approx(1000.0)  # log(e**1000 + 1 + e**-1)
