"""splice: insert learned warp modules (spatial transformers) into trained CNNs.

The public surface is small and stable::

    import splice

    pts = splice.points("torchvision:resnet18")            # where a warp can go
    model = splice.insert("torchvision:resnet18", at=["recommended"], warp="affine")
    splice.save(model, "out/resnet18-affine")               # safetensors + splice.json
    again = splice.load("out/resnet18-affine")              # no pickle involved
    report = splice.verify.verify("out/resnet18-affine")    # the equivalence certificate

Names are resolved lazily so that ``import splice`` stays cheap (it never
imports onnx, onnxruntime or matplotlib, and never initialises CUDA).
"""

from __future__ import annotations

import importlib

__version__ = "0.1.0"

# public name -> defining module (relative to this package)
_EXPORTS = {
    "SpliceError": "errors",
    "load_source": "sources",
    "Source": "sources",
    "points": "api",
    "insert": "surgery",
    "save": "store",
    "load": "store",
    "trace": "graph",
    "Point": "graph",
    "register_leaf": "graph",
    "WarpConfig": "warps",
    "Warp": "warps",
    "Recipe": "recipes",
    "load_recipe": "recipes",
    "inspect": "inspection",
}

# sub-modules reachable as attributes (``splice.verify.verify(...)``); their main
# functions are not re-exported under the same name, so ``import splice.verify``
# and ``splice.verify`` always mean the module
_SUBMODULES = ("graph", "warps", "surgery", "store", "sources", "manifest", "compare", "verification", "exporting",
               "data", "distort", "recipes", "training", "inspection", "evaluation", "options", "facts", "demo",
               "models", "errors", "cli")

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
