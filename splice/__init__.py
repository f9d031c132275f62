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
    "verify": "verify",
    "export": "export",
    "tune": "tune",
    "Recipe": "recipes",
    "load_recipe": "recipes",
    "inspect": "inspection",
    "evaluate": "evaluate",
    "demo": "demo",
}

__all__ = ["__version__", *_EXPORTS]


def __getattr__(name: str):
    module = _EXPORTS.get(name)
    if module is None:
        raise AttributeError(f"module 'splice' has no attribute {name!r}")
    value = getattr(importlib.import_module(f".{module}", __name__), name)
    globals()[name] = value
    return value


def __dir__() -> list[str]:
    return sorted(__all__)
