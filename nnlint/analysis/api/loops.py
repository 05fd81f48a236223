"""Framework knowledge for the training-loop rules: gradient steps, resets, detaching."""
from __future__ import annotations

#: top-level packages whose training loops accumulate `.grad` across backward() calls
#: (PyTorch semantics); a file importing none of them is not a PyTorch training loop
ACCUMULATING_PACKAGES = frozenset({
    "torch", "lightning", "pytorch_lightning", "accelerate", "deepspeed", "timm",
})

#: canonical-name prefix of PyTorch optimizers (their step() applies the stored gradients)
OPTIMIZER_PREFIX = "torch.optim."
#: under torch.optim but not optimizers: their step() touches no gradient
NOT_OPTIMIZER_PREFIXES = ("torch.optim.lr_scheduler.", "torch.optim.swa_utils.")

#: mixed-precision scalers: `scaler.step(optimizer)` is the optimizer step
GRAD_SCALERS = frozenset({
    "torch.amp.GradScaler", "torch.cuda.amp.GradScaler", "torch.cpu.amp.GradScaler",
    "torch.amp.grad_scaler.GradScaler",
})

#: methods that add gradients into `.grad` (`loss.backward()`, `accelerator.backward(loss)`,
#: Lightning's `self.manual_backward(loss)`)
BACKWARD_METHODS = frozenset({"backward", "manual_backward"})

#: methods that reset gradients, whatever the receiver (optimizer or module)
RESET_METHODS = frozenset({"zero_grad", "clear_grad"})

#: in-place tensor methods that clear a `.grad` tensor (`param.grad.zero_()`)
GRAD_CLEARING_METHODS = frozenset({"zero_", "fill_", "mul_", "detach_", "copy_"})

#: methods whose result carries no autograd history (a Python number, or a detached tensor)
DETACHING_METHODS = frozenset({"item", "detach", "tolist", "numpy"})
#: attributes whose value carries no autograd history
DETACHING_ATTRIBUTES = frozenset({"data"})
#: builtins that turn a one-element tensor into a Python number
DETACHING_BUILTINS = frozenset({"float", "int"})

#: context managers under which no autograd graph is built
GRAD_DISABLING_CONTEXTS = frozenset({
    "torch.no_grad", "torch.inference_mode", "torch.autograd.no_grad",
    "torch.autograd.grad_mode.no_grad", "torch.autograd.grad_mode.inference_mode",
})
#: `torch.set_grad_enabled(False)` disables the graph only with a False argument
GRAD_SWITCH_CONTEXT = "torch.set_grad_enabled"

#: words in an unknown function's name that suggest it resets gradients itself
RESET_WORDS = ("zero", "reset", "clear")

#: packages whose tensors are not PyTorch's: a file importing one gets no `.item()` rewrite,
#: since `loss` might be one of their values (common practice: TF eager tensors have no item)
NON_TORCH_TENSOR_PACKAGES = frozenset({"tensorflow", "keras", "tf_keras", "jax", "flax",
                                       "mxnet", "paddle"})
#: builtins that read a total as a number and give back something that no longer is the
#: tensor (print and str formatting, conversions, len): a total read only by these, by
#: comparisons and by f-strings behaves the same as a Python float
NUMBER_SINK_BUILTINS = frozenset({"print", "str", "repr", "format", "float", "int", "bool",
                                  "len"})
#: builtins whose result is a number when their argument is numbers (a float total or a
#: list of floats): the read goes on through them to what uses their result
NUMBER_REDUCING_BUILTINS = frozenset({"sum", "min", "max", "abs", "round"})
#: no-argument tensor methods that keep a one-element loss one element (so `.item()` works)
SCALAR_PRESERVING_METHODS = frozenset({"mean", "sum", "float", "double", "cpu", "clone"})
#: objects whose `.backward(loss)` runs loss.backward() (Hugging Face Accelerate docs)
BACKWARD_RUNNERS = frozenset({"accelerate.Accelerator"})
