"""Mode switches, gradient contexts, model factories and mode-dependent layers (PyTorch)."""
from __future__ import annotations

#: method name -> what goes wrong when a statement names it without calling it
UNCALLED_METHOD_CONSEQUENCES = {
    "eval": "the model stays in training mode",
    "train": "the model stays in its current mode",
    "zero_grad": "gradients are never reset and keep accumulating",
    "step": "nothing is updated",
    "backward": "no gradient is computed",
}

#: context managers / decorators that turn gradient recording off (PyTorch documentation,
#: "Locally disabling gradient computation")
NO_GRAD_CONTEXTS = frozenset({
    "torch.no_grad", "torch.inference_mode", "torch.autograd.no_grad",
    "torch.autograd.inference_mode", "torch.autograd.grad_mode.no_grad",
    "torch.autograd.grad_mode.inference_mode",
})
#: context managers / decorators that turn it back on inside a no-grad region
GRAD_ENABLING_CONTEXTS = frozenset({"torch.enable_grad", "torch.autograd.enable_grad",
                                    "torch.autograd.grad_mode.enable_grad"})
#: `set_grad_enabled(flag)`: no-grad only for a literal False, enabling for a literal True
SET_GRAD_ENABLED = frozenset({"torch.set_grad_enabled", "torch.autograd.set_grad_enabled",
                              "torch.autograd.grad_mode.set_grad_enabled"})

#: functions that run a backward pass (besides the `.backward()` method of tensors)
BACKWARD_FUNCTIONS = frozenset({"torch.autograd.backward", "torch.autograd.grad"})

#: methods returning the same module, so `net.to(device)` is still `net` with its mode
#: (PyTorch documentation: Module.to, cuda, cpu, float, half, double, bfloat16 return self)
SELF_RETURNING_METHODS = frozenset({"to", "cuda", "cpu", "float", "half", "double",
                                    "bfloat16", "train", "eval", "requires_grad_",
                                    "to_empty", "type"})
#: wrappers whose forward runs the wrapped module in that module's mode
WRAPPERS = frozenset({"torch.nn.DataParallel", "torch.nn.parallel.DataParallel",
                      "torch.nn.parallel.DistributedDataParallel", "torch.compile"})

#: canonical-name prefixes of base classes that make a class a model
MODULE_BASE_PREFIXES = ("torch.nn.", "lightning.pytorch.LightningModule",
                        "lightning.LightningModule", "transformers.PreTrainedModel",
                        "transformers.modeling_utils.PreTrainedModel")
#: `torch.nn.<Name>` constructors that do not build a module
NOT_MODULES = frozenset({"Parameter", "ParameterList", "ParameterDict", "Buffer",
                         "UninitializedParameter", "UninitializedBuffer"})

#: modes of the object a factory returns. Modules are constructed in training mode
#: (PyTorch documentation, Module.training); torchvision and timm build modules the same
#: way (from memory). Hugging Face `from_pretrained` returns the model in eval mode (from
#: memory: it calls `model.eval()` after loading the weights). A hub entry point may
#: return either, so its mode is unknown.
TRAINING_MODE_FACTORY_PREFIXES = ("torchvision.models.", "timm.create_model",
                                  "timm.models.create_model")
UNKNOWN_MODE_FACTORIES = frozenset({"torch.hub.load"})
PRETRAINED_LOADER = "from_pretrained"
#: transformers classes loaded with from_pretrained that are models (not tokenizers, configs)
PRETRAINED_MODEL_MARKERS = ("Model", "For")
PRETRAINED_NOT_MODEL_MARKERS = ("Tokenizer", "Config", "Processor", "FeatureExtractor")
PRETRAINED_PACKAGES = ("transformers.",)

#: layers whose forward differs between train() and eval() (PyTorch documentation: Dropout
#: "during training ... zeroes elements"; BatchNorm uses batch statistics in training and
#: running estimates in evaluation; TransformerEncoderLayer/DecoderLayer default dropout=0.1)
MODE_DEPENDENT_LAYERS = {
    **{f"torch.nn.{name}": "dropout" for name in (
        "Dropout", "Dropout1d", "Dropout2d", "Dropout3d", "AlphaDropout",
        "FeatureAlphaDropout", "TransformerEncoderLayer", "TransformerDecoderLayer",
        "Transformer")},
    **{f"torch.nn.{name}": "batch norm" for name in (
        "BatchNorm1d", "BatchNorm2d", "BatchNorm3d", "SyncBatchNorm", "LazyBatchNorm1d",
        "LazyBatchNorm2d", "LazyBatchNorm3d")},
}
#: functional forms that are mode-dependent when written with `training=self.training`
FUNCTIONAL_MODE_DEPENDENT = {
    "torch.nn.functional.dropout": "dropout", "torch.nn.functional.dropout1d": "dropout",
    "torch.nn.functional.dropout2d": "dropout", "torch.nn.functional.dropout3d": "dropout",
    "torch.nn.functional.alpha_dropout": "dropout",
    "torch.nn.functional.batch_norm": "batch norm",
}
#: container constructors whose arguments are the layers they hold
CONTAINERS = frozenset({"torch.nn.Sequential", "torch.nn.ModuleList", "torch.nn.ModuleDict"})

#: names a parameter or attribute called like a model usually has (common practice)
MODEL_NAMES = frozenset({
    "model", "net", "network", "encoder", "decoder", "generator", "discriminator",
    "classifier", "backbone", "critic", "actor", "teacher", "student", "autoencoder",
    "detector", "regressor", "segmenter", "policy", "netg", "netd",
})
#: attribute names that usually hold an injected sub-module (common practice)
MODULE_NAMES = frozenset({"head", "layer", "layers", "block", "blocks", "module", "body",
                          "stem", "features", "embedding"})
#: builtins whose result is never a module
NON_MODULE_BUILTINS = frozenset({"int", "float", "bool", "str", "len", "list", "dict", "tuple",
                                 "set", "range", "max", "min", "sum", "abs", "round", "sorted",
                                 "getattr"})
MODEL_NAME_SUFFIXES = ("model", "_net", "_network", "_encoder", "_decoder", "_classifier",
                       "_generator", "_discriminator", "_backbone")

#: words that make a function evaluation code (split on `_` and case changes)
EVALUATION_WORDS = frozenset({
    "test", "eval", "evaluate", "evaluation", "validate", "validation", "valid", "val",
    "predict", "prediction", "infer", "inference", "score", "scoring",
})
#: words that make an iterable evaluation data (`val_loader`, `dataloaders["test"]`)
EVALUATION_DATA_WORDS = frozenset({
    "val", "valid", "validation", "test", "eval", "evaluation", "holdout", "dev",
})
#: training-pass words that cancel an evaluation word (`train_val_split`, `train_and_eval`)
TRAINING_WORDS = frozenset({"train", "training", "fit"})

#: classes whose hooks a framework calls after switching the mode itself (Lightning calls
#: `model.eval()` before validation_step; Hugging Face Trainer before its evaluation loop;
#: Keras passes `training=False`), so their methods are not judged here
FRAMEWORK_MANAGED_BASES = ("lightning.pytorch.", "lightning.LightningModule",
                           "lightning.Trainer", "lightning.fabric.", "transformers.Trainer",
                           "transformers.trainer.", "transformers.Seq2SeqTrainer",
                           "tensorflow.keras.")
#: packages where the mode is an argument (`training=False`, `deterministic=True`), not state
ARGUMENT_MODE_PACKAGES = ("tensorflow", "keras", "tf_keras", "jax", "flax", "haiku", "equinox")
#: calls that end the program (a branch ending in one does not fall through)
EXITS = frozenset({"sys.exit", "exit", "quit", "os._exit"})
