"""splice: insert learned warp modules (spatial transformers) into trained CNNs.

The public surface is small and stable::

    import splice

    pts = splice.points("torchvision:resnet18")            # where a warp can go
    model = splice.insert("torchvision:resnet18", at=["recommended"], warp="affine")
    splice.save(model, "out/resnet18-affine")               # safetensors + splice.json
    again = splice.load("out/resnet18-affine")              # no pickle involved
    report = splice.verify("out/resnet18-affine")           # the equivalence certificate

Names are resolved lazily so that ``import splice`` stays cheap (it never
imports onnx, onnxruntime or matplotlib, and never initialises CUDA).
"""

from __future__ import annotations

import importlib

from .version import __version__

# public name -> defining module (relative to this package); the verbs mirror the CLI
_EXPORTS = {
    "points": "api",
    "insert": "api",
    "save": "api",
    "load": "api",
    "verify": "api",
    "export": "api",
    "tune": "api",
    "evaluate": "api",
    "inspect": "api",
    "SpliceError": "errors",
    "load_source": "sources",
    "open_source": "store",
    "Source": "sources",
    "SpliceInfo": "manifest",
    "trace": "graph",
    "Point": "graph",
    "register_leaf": "graph",
    "WarpConfig": "warps",
    "Warp": "warps",
    "Recipe": "recipes",
    "load_recipe": "recipes",
    "ModelOptions": "options",
}

# sub-modules reachable as attributes (``splice.verification.verify_models(...)``); none shares
# a name with a verb above, so ``splice.verify`` is always the function
_SUBMODULES = ("graph", "warps", "surgery", "store", "sources", "manifest", "compare", "verification", "exporting",
               "data", "distort", "recipes", "training", "inspection", "evaluation", "options", "demo",
               "models", "errors", "cli", "version")

__all__ = ["__version__", *_EXPORTS]


def __getattr__(name: str):
    if name in _SUBMODULES:
        return importlib.import_module(f".{name}", __name__)
    module = _EXPORTS.get(name)
    if module is None:
        raise AttributeError(f"module 'splice' has no attribute {name!r}")
    value = getattr(importlib.import_module(f".{module}", __name__), name)
    globals()[name] = value
    return value


def __dir__() -> list[str]:
    return sorted(__all__)
