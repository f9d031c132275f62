"""Model sources from libraries people use: timm names, Hugging Face save_pretrained folders, torchvision
builders with backbones — all built with random weights, nothing downloaded."""

from __future__ import annotations

import json
import re
import shutil
import warnings
import sys

import pytest
import torch

import splice
from splice.compare import flatten_outputs
from splice.errors import SourceError, SpliceWarning, WeightsError
from splice.graph import TraceFallbackWarning
from splice.sources import build_model, is_hf_folder, load_source, read_hf_folder

pytest.importorskip("timm")  # both are in the test extra
pytest.importorskip("transformers")


def _hf_resnet():
    from transformers import ResNetConfig, ResNetForImageClassification

    torch.manual_seed(0)
    config = ResNetConfig(embedding_size=8, hidden_sizes=[8, 16], depths=[1, 1], num_labels=3)
    return ResNetForImageClassification(config).eval()


@pytest.fixture(scope="module")
def hf_folder(tmp_path_factory):
    folder = tmp_path_factory.mktemp("hf") / "resnet"
    _hf_resnet().save_pretrained(folder)
    return folder


# ----------------------------------------------------------------------------- Hugging Face folders


def test_a_save_pretrained_folder_is_a_source(hf_folder):
    assert is_hf_folder(hf_folder)
    src = load_source(str(hf_folder), input_shape=(3, 32, 32))
    assert src.spec == "transformers:ResNetForImageClassification"
    assert src.kwargs["config"]["model_type"] == "resnet"
    assert src.weights_path == str(hf_folder / "model.safetensors") and not src.random_init
    x = torch.randn(2, 3, 32, 32)
    assert torch.equal(src.model(x).logits, _hf_resnet()(x).logits)


def test_a_folder_is_read_with_hub_kernels_off(hf_folder, monkeypatch):
    """transformers 5.25 turns hub kernels on by default in from_pretrained: code fetched from the Hub, and a
    re-kernelize on every train()/eval() switch, which fails on a meta-device copy. A folder is read with them off,
    on any transformers in the supported range (use_kernels is a from_pretrained argument since 4.56)."""
    from transformers import ResNetForImageClassification

    seen = {}
    original = ResNetForImageClassification.from_pretrained.__func__

    def spy(cls, *args, **kwargs):
        seen.update(kwargs)
        return original(cls, *args, **kwargs)

    monkeypatch.setattr(ResNetForImageClassification, "from_pretrained", classmethod(spy))
    src = load_source(str(hf_folder), input_shape=(3, 32, 32))
    assert seen["use_kernels"] is False
    assert not getattr(src.model, "use_kernels", False)
    src.model.train()  # no kernelize on a mode switch
    with pytest.warns(TraceFallbackWarning):
        pts = splice.points(src, all=True)
    assert pts and all(p.mechanism == "hooks" for p in pts)


@pytest.mark.parametrize("key, value", [("attn_implementation", "kernels-community/flash-attn2"),
                                        ("attn_implementation", "flash_attention_2"),
                                        ("attn_implementation", {"": "sdpa", "vision_config": "org/repo@v1"}),
                                        ("experts_implementation", "deepgemm")])
def test_a_config_naming_an_implementation_from_the_hub_needs_trust_code(tmp_path, hf_folder, key, value):
    """transformers fetches a Hub attention kernel ('org/repo', or flash_attention_* without flash_attn installed)
    as code when it builds the model: a folder's config.json must not choose that without the opt-in."""
    folder = tmp_path / "asks"
    shutil.copytree(hf_folder, folder)
    config = json.loads((folder / "config.json").read_text())
    (folder / "config.json").write_text(json.dumps({**config, key: value}))
    import transformers.integrations.hub_kernels as hub

    def never(*args, **kwargs):
        raise AssertionError("a kernel was looked up")

    with pytest.MonkeyPatch.context() as mp:
        for name in ("load_and_register_attn_kernel", "get_kernel"):
            if hasattr(hub, name):
                mp.setattr(hub, name, never)
        with pytest.raises(SourceError, match=rf"asks for {key} .*from the Hugging Face Hub as code.*--trust-code"):
            load_source(str(folder), input_shape=(3, 32, 32))


def test_code_request_reads_nested_configs_and_passes_torchs_own():
    from splice.sources.huggingface import code_request

    assert code_request({"attn_implementation": "sdpa", "vision_config": {"attn_implementation": "eager"}}) is None
    assert code_request({"text_config": {"_attn_implementation": "paged|flash_attention_2"}}).startswith(
        "text_config._attn_implementation 'paged|flash_attention_2'")
    assert code_request({"layers": [{}, {"experts_implementation": "sonicmoe"}]}).startswith(
        "layers.1.experts_implementation 'sonicmoe'")
    assert code_request({"auto_map": {}}).startswith("custom code (auto_map)")
    # transformers applies a nested mapping to sub-configs of sub-configs; any other kind of value is not torch's
    assert "'org/repo'" in code_request({"attn_implementation": {"": "sdpa", "x": {"": "org/repo"}}})
    assert "['org/repo']" not in code_request({"attn_implementation": ["org/repo"]})
    assert "3" in code_request({"attn_implementation": 3})


def test_a_nested_hub_implementation_is_refused_and_builds_with_trust_code(tmp_path, hf_folder, monkeypatch):
    folder = tmp_path / "nested"
    shutil.copytree(hf_folder, folder)
    config = json.loads((folder / "config.json").read_text())
    (folder / "config.json").write_text(json.dumps({**config, "attn_implementation": {"": "eager", "x": {"": "a/b"}}}))
    with pytest.raises(SourceError, match=r"attn_implementation 'a/b'.*--trust-code"):
        load_source(str(folder), input_shape=(3, 32, 32))
    # with the opt-in the check lets the build through (a ResNet has no attention to fetch a kernel for)
    assert load_source(str(folder), input_shape=(3, 32, 32), trust_code=True).model is not None


@pytest.mark.parametrize("nest", [(), ("text_config",)])
def test_a_quantized_folder_is_refused_in_one_line(tmp_path, hf_folder, nest):
    # transformers also reads a quantization_config in a sub-config (get_text_config), and fp8 fetches a Hub kernel
    folder = tmp_path / "quantized"
    shutil.copytree(hf_folder, folder)
    config = json.loads((folder / "config.json").read_text())
    inner = config
    for key in nest:
        inner = inner.setdefault(key, {})
    inner["quantization_config"] = {"quant_method": "bitsandbytes", "load_in_8bit": True}
    (folder / "config.json").write_text(json.dumps(config))
    where = "".join(f"{k}." for k in nest)
    with pytest.raises(SourceError, match=rf"{where}quantization_config \(quant_method 'bitsandbytes'\).*unquantized"):
        load_source(str(folder), input_shape=(3, 32, 32))


def test_a_backbone_named_without_its_config_is_refused_before_any_lookup(monkeypatch):
    """transformers looks a backbone name up on the Hub (repo_exists, then its config.json) when a config names one
    without backbone_config; an old or crafted config.json would make the build reach the network."""
    import transformers.backbone_utils as backbones

    from splice.sources import build_model

    def offline(*args, **kwargs):
        raise AssertionError("the Hub was asked")

    monkeypatch.setattr(backbones, "hf_api", offline)
    for extra in ({"backbone_kwargs": {"out_indices": [1]}}, {}):  # UperNet asks the Hub with kwargs or without
        config = transformers_config("UperNetConfig")
        config.update(backbone="someone/their-backbone", backbone_config=None, **extra)
        with pytest.raises(SourceError, match=r"backbone 'someone/their-backbone' without a backbone_config.*re-save"):
            build_model("transformers:UperNetForSemanticSegmentation", kwargs={"config": config})
    # DETR's own use_timm_backbone builds a named timm backbone without the Hub (when no backbone_kwargs are given)
    old_detr = transformers_config("DetrConfig")
    old_detr.update(backbone="resnet18", backbone_config=None, use_timm_backbone=True, backbone_kwargs=None,
                    num_queries=4, encoder_layers=1, decoder_layers=1, d_model=16, encoder_ffn_dim=16,
                    decoder_ffn_dim=16)
    assert build_model("transformers:DetrForObjectDetection", kwargs={"config": old_detr})[0] is not None
    # a timm backbone's own config names a timm architecture, which timm builds: DETR's, as transformers writes it
    detr = transformers_config("DetrConfig")
    assert detr["backbone_config"]["model_type"] == "timm_backbone" and detr["backbone_config"]["backbone"]
    detr.update(num_queries=4, encoder_layers=1, decoder_layers=1, d_model=16, encoder_ffn_dim=16, decoder_ffn_dim=16)
    detr["backbone_config"].update(backbone="resnet18", use_pretrained_backbone=True)
    model = build_model("transformers:DetrForObjectDetection", kwargs={"config": detr})[0]
    assert not model.config.backbone_config.use_pretrained_backbone


def transformers_config(name: str) -> dict:
    import transformers

    return getattr(transformers, name)().to_dict()


def test_a_folder_hashes_the_weights_it_read_and_only_those(hf_folder, monkeypatch):
    import splice.sources.source as source_module
    from splice.fileio import state_dict_sha256

    hashed = []
    monkeypatch.setattr(source_module, "state_dict_sha256", lambda state: hashed.append(state) or
                        state_dict_sha256(state))
    src = load_source(str(hf_folder), input_shape=(3, 32, 32))
    assert len(hashed) == 1  # not the initial weights the folder's replace
    assert src.weights_sha256 == state_dict_sha256(_hf_resnet().state_dict())



def test_a_folder_with_its_own_weights_is_built_once_for_real(hf_folder, monkeypatch):
    # splice's own build is empty (meta device, no random init, no memory): transformers builds the model that
    # holds the folder's weights, so a large model is not built and initialised twice
    import splice.sources.source as source_module

    devices = []
    build = source_module.build_model
    monkeypatch.setattr(source_module, "build_model",
                        lambda *a, **k: devices.append(torch.empty(0).device.type) or build(*a, **k))
    src = load_source(str(hf_folder), input_shape=(3, 32, 32))
    assert devices == ["meta"]
    assert not any(t.is_meta for t in (*src.model.parameters(), *src.model.buffers()))
    x = torch.randn(2, 3, 32, 32)
    with torch.no_grad():
        assert torch.equal(src.model(x).logits, _hf_resnet()(x).logits)


def test_a_bfloat16_folder_loads_in_float32_and_says_so(tmp_path):
    _hf_resnet().to(torch.bfloat16).save_pretrained(tmp_path / "bf16")
    with pytest.warns(SpliceWarning, match=r"were saved in bfloat16; they are cast to the model's float32"):
        src = load_source(str(tmp_path / "bf16"), input_shape=(3, 32, 32))
    want = _hf_resnet().to(torch.bfloat16).float().state_dict()
    got = src.model.state_dict()
    assert all(got[k].dtype == want[k].dtype and torch.equal(got[k], want[k]) for k in want)

def test_the_recorded_spec_rebuilds_without_the_folder(hf_folder):
    src = load_source(str(hf_folder), input_shape=(3, 32, 32))
    model, _ = build_model(src.spec, json.loads(json.dumps(src.kwargs)))  # as splice.json holds it
    assert set(model.state_dict()) == set(src.model.state_dict())


def test_model_output_is_compared_like_a_dict_logits_first(hf_folder):
    out = load_source(str(hf_folder), input_shape=(3, 32, 32)).model(torch.randn(1, 3, 32, 32))
    assert list(flatten_outputs(out))[0] == "out.logits"


@pytest.mark.parametrize("how", ["bin", "sharded"])
def test_pickle_free_bin_and_sharded_folders_load(tmp_path, how):
    model = _hf_resnet()
    if how == "bin":
        model.save_pretrained(tmp_path / how, safe_serialization=False)
    else:
        model.save_pretrained(tmp_path / how, max_shard_size="2KB")
        assert (tmp_path / how / "model.safetensors.index.json").is_file()
    src = load_source(str(tmp_path / how), input_shape=(3, 32, 32))
    x = torch.randn(1, 3, 32, 32)
    assert torch.equal(src.model(x).logits, model(x).logits)


def _hf_vit():
    import transformers

    torch.manual_seed(0)
    config = transformers.ViTConfig(hidden_size=32, num_hidden_layers=1, num_attention_heads=2,
                                    intermediate_size=64, image_size=32, patch_size=8, num_labels=4)
    return transformers.ViTForImageClassification(config).eval()


def test_a_folder_whose_checkpoint_names_are_not_the_models_loads_as_saved(tmp_path, capsys):
    # save_pretrained writes the checkpoint's names, which transformers renames on load (a ViT's
    # attention.attention.key is attention.k_proj in transformers 5): the folder is read by transformers
    from safetensors import safe_open

    model = _hf_vit()
    model.save_pretrained(tmp_path / "vit")
    with safe_open(str(tmp_path / "vit" / "model.safetensors"), "pt") as f:
        on_disk = set(f.keys())
    import transformers

    capsys.readouterr()
    src = load_source(str(tmp_path / "vit"), input_shape=(3, 32, 32))
    assert "Loading weights" not in capsys.readouterr().err  # transformers' progress bar stays off the terminal
    assert transformers.logging.is_progress_bar_enabled()  # and is on again for the caller
    want, got = model.state_dict(), src.model.state_dict()
    assert set(want) == set(got) and all(torch.equal(want[k], got[k]) for k in want)
    x = torch.randn(2, 3, 32, 32)
    with torch.no_grad():
        assert torch.equal(src.model(x).logits, model(x).logits)
    assert not src.random_init and src.weights_path.endswith("model.safetensors")
    # with transformers 5.24 the folder holds vit.encoder.layer.0.attention.attention.key.weight, and so on
    assert on_disk == set(want) or on_disk - set(want)


def test_a_folder_with_a_tensor_the_model_lacks_is_refused_by_name(tmp_path):
    from safetensors.torch import load_file, save_file

    _hf_vit().save_pretrained(tmp_path / "vit")
    path = tmp_path / "vit" / "model.safetensors"
    state = load_file(str(path))
    save_file({**state, "extra.weight": torch.zeros(3)}, str(path), metadata={"format": "pt"})
    with pytest.raises(WeightsError, match=r"holds 1 tensor\(s\) ViTForImageClassification does not have "
                                           r"\(extra.weight\); pass --allow-partial"):
        load_source(str(tmp_path / "vit"), input_shape=(3, 32, 32))
    with pytest.warns(SpliceWarning, match=r"1 tensor\(s\) of .* not used \(extra.weight\)"):
        src = load_source(str(tmp_path / "vit"), input_shape=(3, 32, 32), allow_partial=True)
    assert torch.equal(src.model.state_dict()["classifier.weight"], state["classifier.weight"])


def test_a_folder_without_weights_is_refused(tmp_path):
    config = _hf_resnet().config
    config.architectures = ["ResNetForImageClassification"]
    config.save_pretrained(tmp_path)
    with pytest.raises(SourceError, match="holds a config.json but no weights"):
        load_source(str(tmp_path), input_shape=(3, 32, 32))


def test_an_unknown_model_type_is_refused(tmp_path, hf_folder):
    config = json.loads((hf_folder / "config.json").read_text())
    with pytest.raises(SourceError, match="model_type 'no-such-type' is not known to the installed transformers"):
        build_model("transformers:ResNetForImageClassification", {"config": {**config, "model_type": "no-such-type"}})
    with pytest.raises(SourceError, match="'os' is not a model class of the installed transformers"):
        build_model("transformers:os", {"config": config})
    with pytest.raises(SourceError, match="ConvNextModel takes a ConvNextConfig, the config is a ResNetConfig"):
        build_model("transformers:ConvNextModel", {"config": config})


_CONFIG_PY = """
from transformers import PretrainedConfig
class TinyConfig(PretrainedConfig):
    model_type = "splice_tiny_test"
    def __init__(self, width=4, **kwargs):
        self.width = width
        super().__init__(**kwargs)
"""

_MODELING_PY = """
import pathlib
pathlib.Path({marker!r}).write_text("the folder's code ran")
from torch import nn
from transformers import PreTrainedModel
from .configuration_tiny import TinyConfig
class TinyNet(PreTrainedModel):
    config_class = TinyConfig
    def __init__(self, config):
        super().__init__(config)
        self.conv = nn.Conv2d(3, config.width, 3, padding=1)
        self.post_init()
    def forward(self, x):
        return self.conv(x)
"""


@pytest.fixture
def custom_code_folder(tmp_path, monkeypatch):
    import transformers.dynamic_module_utils as dynamic

    monkeypatch.setattr(dynamic, "HF_MODULES_CACHE", str(tmp_path / "modules"))
    # transformers appends its module cache to sys.path and keeps the package of imported model code in
    # sys.modules: each test starts without either and leaves neither behind
    monkeypatch.setattr(sys, "path", list(sys.path))
    for name in [m for m in sys.modules if m.split(".")[0] == "transformers_modules"]:
        monkeypatch.delitem(sys.modules, name)
    folder = tmp_path / "custom"
    folder.mkdir()
    marker = tmp_path / "ran.txt"
    (folder / "configuration_tiny.py").write_text(_CONFIG_PY)
    (folder / "modeling_tiny.py").write_text(_MODELING_PY.format(marker=str(marker)))
    config = {"model_type": "splice_tiny_test", "architectures": ["TinyNet"], "width": 4,
              "auto_map": {"AutoConfig": "configuration_tiny.TinyConfig", "AutoModel": "modeling_tiny.TinyNet"}}
    (folder / "config.json").write_text(json.dumps(config))
    from safetensors.torch import save_file

    save_file({"conv.weight": torch.randn(4, 3, 3, 3), "conv.bias": torch.zeros(4)}, folder / "model.safetensors")
    return folder, marker


def test_custom_code_needs_trust_code_and_does_not_run_without_it(custom_code_folder):
    folder, marker = custom_code_folder
    with pytest.raises(SourceError, match=r"custom code \(auto_map\).*--trust-code \(trust_code=True\)") as info:
        splice.points(str(folder), (3, 16, 16))
    assert "\n" not in str(info.value)
    assert not marker.exists()  # the folder's code never ran
    pts = splice.points(str(folder), (3, 16, 16), trust_code=True)
    assert marker.exists() and pts[0].name == "input"


def test_read_hf_folder_reads_only_json(custom_code_folder):
    folder, marker = custom_code_folder
    hf = read_hf_folder(folder)
    assert hf.spec == "transformers:TinyNet" and hf.kwargs["code_folder"] == str(folder.resolve())
    assert not marker.exists()


# ----------------------------------------------------------------------------- torchvision backbones


def test_torchvision_backbone_builders_download_nothing(monkeypatch):
    def no_network(*args, **kwargs):
        raise AssertionError("a builder tried to download weights")

    monkeypatch.setattr(torch.hub, "load_state_dict_from_url", no_network)
    model, meta = build_model("torchvision:fcn_resnet50", {"num_classes": 3})
    assert meta["input_shape"] == (3, 224, 224)
    with pytest.raises(SourceError, match="drop 'weights_backbone' from --kwargs"):
        build_model("torchvision:fcn_resnet50", {"weights_backbone": "DEFAULT"})


@pytest.mark.parametrize(("name", "kwargs", "side"), [
    # the sizes torchvision's own weights tables and detector transforms name (read from torchvision itself):
    # inception_v3's crop is 299, efficientnet_b3's 300; a _320_ detector resizes every image to 320, ssd300 to 300
    ("inception_v3", {"aux_logits": False, "init_weights": False}, 299),
    ("efficientnet_b3", {}, 300),
    ("fasterrcnn_mobilenet_v3_large_320_fpn", {"num_classes": 3}, 320),
    ("ssd300_vgg16", {"num_classes": 3}, 300),
    ("fasterrcnn_mobilenet_v3_large_fpn", {"num_classes": 3, "min_size": 512}, 512),  # the builder's argument
    ("vit_b_16", {"image_size": 160}, 160),  # a transformer built for one size: its own, not a weights table's
    ("vit_h_14", {}, 224),  # its first weights are at 518, but the model built without them takes 224
    ("resnet18", {}, 224),
])
def test_a_torchvision_model_takes_the_size_it_is_built_for(name, kwargs, side):
    torchvision = pytest.importorskip("torchvision")
    _, meta = build_model(f"torchvision:{name}", kwargs)
    assert meta["input_shape"] == (3, side, side)
    if name == "vit_h_14":
        assert torchvision.models.get_model_weights(name).DEFAULT.transforms.keywords["crop_size"] == 518


def test_a_bad_weights_index_is_refused(tmp_path):
    (tmp_path / "model.safetensors.index.json").write_text(json.dumps({"weight_map": {"a": "../x.safetensors"}}))
    with pytest.raises(WeightsError, match="is not a shard index"):
        splice.sources.read_weights(tmp_path / "model.safetensors.index.json")


def test_a_spliced_hugging_face_folder_is_self_contained(tmp_path):
    import shutil

    source = tmp_path / "hf"
    _hf_resnet().save_pretrained(source)
    with pytest.warns(splice.graph.TraceFallbackWarning):  # HF forwards branch on Python values
        spliced = splice.insert(str(source), at="recommended", input_shape=(3, 32, 32))
    assert spliced.splice_info.spec == "transformers:ResNetForImageClassification"
    folder = splice.save(spliced, tmp_path / "spliced")
    shutil.rmtree(source)  # the manifest holds the config: nothing is read from the source folder again
    model = splice.load(folder)
    x = torch.randn(1, 3, 32, 32)
    with torch.no_grad():
        assert torch.equal(model(x).logits, _hf_resnet()(x).logits)
    report = splice.verify(folder)
    assert report.passed, report.failed
    assert "no longer on disk" in report["provenance"].detail or report["provenance"].summary.endswith("= source")


# ----------------------------------------------------------------------------- the trust gate


def test_library_specs_read_from_a_file_pass_the_gate_by_registry(tmp_path, monkeypatch):
    from splice.errors import UntrustedCodeError
    from splice.sources import check_spec

    monkeypatch.delenv("SPLICE_TRUST_CODE", raising=False)
    origin = tmp_path / "splice.json"
    config = _hf_resnet().config.to_dict()
    check_spec("timm:resnet18", {}, origin=origin)  # timm's registry lists it
    check_spec("timm:resnet18.a1_in1k", {"num_classes": 3}, origin=origin)  # a pretrained tag of a listed name
    check_spec("transformers:ResNetForImageClassification", {"config": config}, origin=origin)
    refused = [("timm:no_such_net", {}), ("timm:resnet18", {"pretrained": True}),
               ("transformers:ResNetForImageClassification", {"config": {**config, "auto_map": {"AutoConfig": "x.Y"}}}),
               ("transformers:ResNetForImageClassification", {"config": config, "code_folder": str(tmp_path)}),
               ("transformers:ResNetForImageClassification",
                {"config": {**config, "attn_implementation": "kernels-community/flash-attn2"}}),
               ("transformers:AutoConfig", {"config": config}), ("transformers:os", {"config": config})]
    for spec, kwargs in refused:
        with pytest.raises(UntrustedCodeError, match="--trust-code"):
            check_spec(spec, kwargs, origin=origin)


def test_a_spliced_custom_code_folder_needs_the_opt_in_again(custom_code_folder, tmp_path, monkeypatch):
    from splice.errors import UntrustedCodeError

    monkeypatch.delenv("SPLICE_TRUST_CODE", raising=False)
    source, marker = custom_code_folder
    spliced = splice.insert(str(source), at="input", input_shape=(3, 16, 16), trust_code=True)
    folder = splice.save(spliced, tmp_path / "spliced")
    marker.unlink()
    with pytest.raises(UntrustedCodeError, match=r"read from '.*splice.json'.*--trust-code"):
        splice.load(folder)  # the manifest names code in the source folder: not run without the opt-in
    assert not marker.exists()
    again = splice.load(folder, trust_code=True)
    x = torch.randn(1, 3, 16, 16)
    with torch.no_grad():
        assert torch.equal(again(x), spliced.eval()(x))


def test_reading_a_folder_leaves_device_contexts_working(hf_folder):
    # a fresh process whose first device context is the one transformers' loader enters
    import subprocess
    import sys

    code = ("import warnings, torch, splice; warnings.simplefilter('ignore'); "
            f"splice.load_source({str(hf_folder)!r}, input_shape=(3, 32, 32)); "
            "ctx = torch.device('meta'); ctx.__enter__(); print(torch.linspace(0.0, 1.0, 3).device)")
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, timeout=300)
    assert out.returncode == 0, out.stderr[-2000:]
    assert out.stdout.strip().splitlines()[-1] == "meta"
