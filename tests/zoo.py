"""The zoo: architectures people have, built with random weights, and the one harness that takes each
through the whole certificate (points -> insert at ``recommended`` and at the first feature-level cut with
``affine`` -> verify with ONNX -> export). Used by ``tests/test_zoo.py`` and ``benchmarks/bench_zoo.py``.

Input sizes are small (the certificate does not depend on them) except where an architecture needs
more: maxvit's 7x7 windows need 224, RAFT needs at least 128 (its correlation pyramid pools the
features four times), the detector resizes to 320 itself.
"""

from __future__ import annotations

import time
import warnings
from dataclasses import dataclass, field
from pathlib import Path

import torch

__all__ = ["ZOO", "HF_KINDS", "ZooModel", "run_zoo_model", "forward_seconds"]


def calibrate_(model, input_shapes, *, passes: int = 2, seed: int = 0):
    """Give every BatchNorm the statistics of random inputs (the rest of the model stays in eval mode).

    A randomly initialised network's activations shrink or grow layer after
    layer; with unit running statistics a detector's features vanish (1e-8)
    and every box gets the same score, so exports can only differ in how ties
    are broken. Running statistics measured on N(0,1) inputs put each layer
    back on a unit scale (common practice for testing random-weight models,
    no source). Returns ``model``.
    """
    from torch.nn.modules.batchnorm import _BatchNorm

    gen = torch.Generator().manual_seed(seed)
    model.eval()
    norms = [m for m in model.modules() if isinstance(m, _BatchNorm)]
    for m in norms:
        m.reset_running_stats()
        m.momentum = None  # a cumulative average over the calibration passes
        m.train()
    with torch.no_grad():
        for _ in range(passes):
            model(*[torch.randn((2, *s), generator=gen) for s in input_shapes])
    for m in norms:
        m.momentum = 0.1
    return model.eval()


# small configurations of the Hugging Face models the zoo and the wider sweep build (kind: config class, model
# class, config arguments); sizes are the library's defaults unless a test needs a smaller model
_TINY_VIT = {"hidden_size": 64, "num_hidden_layers": 2, "num_attention_heads": 2, "intermediate_size": 128,
             "image_size": 64, "patch_size": 8}
HF_KINDS = {
    "resnet": ("ResNetConfig", "ResNetForImageClassification", {}),
    "convnext": ("ConvNextConfig", "ConvNextForImageClassification", {}),
    "mobilenet_v2": ("MobileNetV2Config", "MobileNetV2ForImageClassification", {}),
    "vit": ("ViTConfig", "ViTForImageClassification", _TINY_VIT),
    "swin": ("SwinConfig", "SwinForImageClassification",
             {"embed_dim": 24, "depths": [1, 1], "num_heads": [2, 2], "image_size": 64, "window_size": 4}),
    "segformer": ("SegformerConfig", "SegformerForSemanticSegmentation",
                  {"hidden_sizes": [16, 32, 48, 64], "decoder_hidden_size": 32}),
    "regnet": ("RegNetConfig", "RegNetForImageClassification", {}),
    "efficientnet": ("EfficientNetConfig", "EfficientNetForImageClassification", {"image_size": 64}),
    "mobilevit": ("MobileViTConfig", "MobileViTForImageClassification", {"image_size": 64}),
    "convnextv2": ("ConvNextV2Config", "ConvNextV2ForImageClassification", {}),
    "beit": ("BeitConfig", "BeitForImageClassification", _TINY_VIT),
    "dinov2": ("Dinov2Config", "Dinov2ForImageClassification", _TINY_VIT),
    "levit": ("LevitConfig", "LevitForImageClassification", {"image_size": 224}),
    "poolformer": ("PoolFormerConfig", "PoolFormerForImageClassification", {}),
    "cvt": ("CvtConfig", "CvtForImageClassification", {}),
    "bit": ("BitConfig", "BitForImageClassification", {}),
}


def _hf_model(kind: str):
    import transformers

    config_cls, model_cls, kwargs = HF_KINDS[kind]
    return getattr(transformers, model_cls)(getattr(transformers, config_cls)(num_labels=10, **kwargs))


@dataclass(frozen=True)
class ZooModel:
    """One architecture of the zoo: how to name it, its input shape(s), and where to splice.

    ``spec`` is a model spec, or ``"hf:KIND"`` for a Hugging Face model saved with ``save_pretrained``.
    ``input_shapes`` are small ones for the tests; ``bench_shapes`` the sizes the model is used at, for
    ``benchmarks/bench_zoo.py`` (default 3x224x224 per input).
    """

    id: str
    spec: str
    input_shapes: tuple[tuple[int, int, int], ...]
    kwargs: dict = field(default_factory=dict)
    within: str = ""
    slow: bool = False
    bench_shapes: tuple[tuple[int, int, int], ...] | None = None

    @property
    def usual_shapes(self) -> tuple[tuple[int, int, int], ...]:
        return self.bench_shapes or tuple((3, 224, 224) for _ in self.input_shapes)

    def prepare(self, workdir: Path) -> tuple[str, Path | None]:
        """``(model argument, weights file)``: random weights with calibrated BatchNorms, written as a user
        would have them (a checkpoint beside a spec, or a save_pretrained folder)."""
        import splice

        name = self.id.replace(":", "-")
        torch.manual_seed(0)
        if self.spec.startswith("hf:"):
            folder = workdir / name
            if not (folder / "config.json").is_file():
                model = calibrate_(_hf_model(self.spec[3:]), self.input_shapes)
                with warnings.catch_warnings():
                    warnings.simplefilter("ignore")
                    model.save_pretrained(folder)
            return str(folder), None
        weights = workdir / f"{name}.pt"
        if not weights.is_file():
            model = splice.load_source(self.spec, kwargs=self.kwargs or None, input_shape=list(self.input_shapes),
                                       warn_random=False).model
            torch.save(calibrate_(model, self.input_shapes).state_dict(), weights)
        return self.spec, weights


_S = (3, 64, 64)
ZOO = (
    ZooModel("timm:resnet18", "timm:resnet18", (_S,), {"num_classes": 10}),
    ZooModel("timm:efficientnet_b0", "timm:efficientnet_b0", (_S,), {"num_classes": 10}),
    ZooModel("timm:tf_efficientnet_b0", "timm:tf_efficientnet_b0", (_S,), {"num_classes": 10}),
    ZooModel("timm:mobilevit_xxs", "timm:mobilevit_xxs", (_S,), {"num_classes": 10}),
    # timm's VGG pools a map smaller than 7x7 up to 7x7, which ONNX cannot export: 224 gives 7x7 itself
    ZooModel("timm:vgg11_bn", "timm:vgg11_bn", ((3, 224, 224),), {"num_classes": 10}, slow=True),
    ZooModel("timm:convnext_atto", "timm:convnext_atto", (_S,), {"num_classes": 10}),
    ZooModel("timm:hrnet_w18_small", "timm:hrnet_w18_small", (_S,), {"num_classes": 10}, slow=True),
    ZooModel("hf:resnet", "hf:resnet", (_S,), slow=True),
    ZooModel("hf:convnext", "hf:convnext", (_S,), slow=True),
    ZooModel("hf:mobilenet_v2", "hf:mobilenet_v2", (_S,)),
    ZooModel("torchvision:fcn_resnet50", "torchvision:fcn_resnet50", (_S,), {"num_classes": 3}, slow=True),
    ZooModel("torchvision:maxvit_t", "torchvision:maxvit_t", ((3, 224, 224),), {"num_classes": 10}, slow=True),
    ZooModel("torchvision:raft_small", "torchvision:raft_small", ((3, 128, 128), (3, 128, 128)),
             within="feature_encoder", slow=True),
    ZooModel("torchvision:fasterrcnn_mobilenet_v3_large_320_fpn", "torchvision:fasterrcnn_mobilenet_v3_large_320_fpn",
             ((3, 64, 64),), {"num_classes": 3}, within="backbone", slow=True, bench_shapes=((3, 320, 320),)),
)


def forward_seconds(model, input_shapes, repeat: int = 1) -> float:
    """Seconds of one eval forward of ``model`` at batch 1 (the best of ``repeat``, after one warm-up)."""
    xs = [torch.randn((1, *s)) for s in input_shapes]
    best = float("inf")
    with torch.no_grad():
        model.eval()(*xs)
        for _ in range(repeat):
            start = time.perf_counter()
            model(*xs)
            best = min(best, time.perf_counter() - start)
    return best


def _coarser(shape, input_shape, factor: int) -> bool:
    """A feature map at least ``factor`` times smaller than the input on both sides."""
    return input_shape[1] >= factor * shape[1] and input_shape[2] >= factor * shape[2]


def run_zoo_model(entry: ZooModel, workdir: Path, *, onnx: bool = True) -> dict:
    """points -> insert (affine) at ``recommended`` and at the first cut point of stride 4 or more (so that a
    warp inside the network is certified too, whatever the mechanism) -> save -> verify (with ONNX) -> export,
    timing each step.

    Returns ``{"id", "mechanism", "points", "source_changed", "recommended", "spliced_at", "seconds": {...},
    "report",
    "export", "source", "folder", "warnings"}`` (``warnings``: splice's own, as (category, message)); raises
    whatever a step raises (a splice error is a failure of the zoo model).
    """
    import splice
    from splice.copies import buffer_snapshot, changed_buffers
    from splice.errors import SpliceWarning
    from splice.graph import GraphWarning

    spec, weights = entry.prepare(workdir)
    src = splice.load_source(spec, kwargs=entry.kwargs or None, input_shape=list(entry.input_shapes),
                             weights=weights)
    before = buffer_snapshot(src.model)
    seconds: dict[str, float] = {}
    with warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always")  # every warning is part of the result (the mechanism, a batch-1 export)
        start = time.perf_counter()
        pts = splice.points(src, within=entry.within)
        seconds["points"] = time.perf_counter() - start
        start = time.perf_counter()
        inside = [p.name for p in pts if p.cut and p.kind != "input" and _coarser(p.shape, pts[0].shape, 4)][:1]
        spliced = splice.insert(src, at=["recommended", *inside], warp="affine", within=entry.within)
        seconds["insert"] = time.perf_counter() - start
        folder = splice.save(spliced, workdir / f"{entry.id.replace(':', '-')}-affine")
        start = time.perf_counter()
        report = splice.verify(folder, onnx=onnx)
        seconds["verify"] = time.perf_counter() - start
        exported = None
        if onnx and report.passed:  # a failed certificate is the result; export would only refuse it again
            start = time.perf_counter()
            exported = splice.export(folder, onnx=workdir / f"{entry.id.replace(':', '-')}.onnx")["exports"][0]
            seconds["export"] = time.perf_counter() - start
    ours = [w for w in caught if issubclass(w.category, (SpliceWarning, GraphWarning))]
    return {"id": entry.id, "mechanism": pts[0].mechanism, "points": len(pts),
            "source_changed": changed_buffers(before, src.model),
            "recommended": [p.name for p in pts if p.recommended],
            "spliced_at": [p.name for p in spliced.splice_info.points], "seconds": seconds, "report": report,
            "export": exported, "source": src, "folder": folder,
            "warnings": [(w.category.__name__, str(w.message)) for w in ours]}
