"""Image towers from every source agree with their reference: the offline EfficientNet-Lite0 exported
to ONNX (run by onnxruntime) and compiled as a torch.export program / TorchScript against the timm
tower, a transformers ViT built from a config against a direct transformers forward; each keeps the
fingerprint and refusal contracts."""
from __future__ import annotations

import json
import warnings
from pathlib import Path

import pytest
import torch
import torch.nn.functional as F
from PIL import Image
from rich.console import Console

from align.api import load_checked_tower
from align.errors import AlignError, FingerprintMismatch, RecipeError
from align.export.card import image_side_record
from align.features import image_features
from align.recipe import PreprocessConfig, VisionConfig
from align.vision import activation_bytes, load_image_tower, load_timm_model, tower_differences, weights_sha256
from align.vision.declared import write_sidecar
from recipes import tiny_recipe

PHOTOS = ("chelsea", "coffee", "astronaut", "rocket")  # scikit-image's sample photos


@pytest.fixture(scope="module")
def photos() -> list[Image.Image]:
    from skimage import data

    return [Image.fromarray(getattr(data, name)()) for name in PHOTOS]


@pytest.fixture(scope="module")
def timm_tower():
    return load_image_tower(VisionConfig(channels_last=False))  # the reference: timm, 224 px


def _embed(tower, images) -> torch.Tensor:
    return tower.embed_pixels(torch.stack([tower.preprocess(im) for im in images]))  # (N, D)


@pytest.fixture(scope="module")
def exported(tmp_path_factory, timm_tower):
    """The timm tower exported four ways: ONNX by the dynamo exporter (weights in an external-data
    file), the classifier-kept model to ONNX by the TorchScript-based exporter, a torch.export
    program, and a traced TorchScript module; each with a preprocessing sidecar from timm's config."""
    folder = tmp_path_factory.mktemp("exported")
    pixels = torch.zeros(2, 3, 224, 224)  # a batch of one would fix the batch dimension at 1
    batch = torch.export.Dim("batch", min=1, max=4096)
    model = timm_tower.model
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")  # the exporters' deprecation and progress notes
        torch.onnx.export(model, (pixels,), str(folder / "tower.onnx"), input_names=["pixels"],
                          output_names=["features"], dynamic_shapes=({0: batch},), dynamo=True, verbose=False)
        classifier = load_timm_model("efficientnet_lite0", num_classes=1000).eval()
        torch.onnx.export(classifier, (pixels,), str(folder / "classifier.onnx"), input_names=["pixels"],
                          output_names=["logits"], dynamic_axes={"pixels": {0: "batch"}, "logits": {0: "batch"}},
                          dynamo=False)
        torch.export.save(torch.export.export(model, (pixels,), dynamic_shapes=({0: batch},)), str(folder / "tower.pt2"))
        torch.jit.save(torch.jit.trace(model, pixels), str(folder / "traced.pt"))
    for name in ("tower", "classifier", "traced"):
        write_sidecar(folder / f"{name}.preprocessing.json", timm_tower.preprocessing)
    return folder


def _cfg(source: str, path: Path, **kw) -> VisionConfig:
    return VisionConfig(source=source, model_path=str(path), **kw)


# ---------------------------------------------------------------------------------------------
# ONNX


def test_onnx_tower_gives_the_timm_embeddings(exported, timm_tower, photos):
    tower = load_image_tower(_cfg("onnx", exported / "tower.onnx"))
    assert (exported / "tower.onnx.data").is_file()  # the dynamo exporter keeps weights beside the graph
    difference = (_embed(tower, photos) - _embed(timm_tower, photos)).abs().max().item()
    assert difference < 1e-5, difference
    fp = tower.fingerprint
    assert fp["source"] == "onnx" and fp["feature_dim"] == 1280
    assert fp["preprocessing"] == timm_tower.fingerprint["preprocessing"]  # the sidecar carried timm's exactly
    assert len(tower.model.files) == 2 and fp["weights_sha256"] == weights_sha256(tower.model)
    assert tower.forward_passes == 1
    print(f"fidelity vs timm, onnx: max |difference| {difference:.2e} over {len(photos)} photos")


def test_onnx_classifier_keeps_the_imagenet_classes(exported, photos):
    # ILSVRC-2012 class indices: 281-285 are the domestic cats, 967 is espresso (test_vision's check)
    tower = load_image_tower(_cfg("onnx", exported / "classifier.onnx"))
    logits = tower.pooled(torch.stack([tower.preprocess(im) for im in photos[:2]]))  # (2, 1000)
    assert tower.feature_dim == 1000
    assert logits[0].argmax().item() in range(281, 286)
    assert logits[1].argmax().item() == 967


def test_onnx_preprocessing_is_checked_against_the_graph(exported, tmp_path):
    graph = tmp_path / "tower.onnx"
    for name in ("tower.onnx", "tower.onnx.data"):
        (tmp_path / name).symlink_to(exported / name)
    with pytest.raises(AlignError, match="mean or std") as missing:
        load_image_tower(_cfg("onnx", graph))  # no sidecar, no recipe keys
    assert "preprocessing.json" in missing.value.hint
    sidecar = json.loads((exported / "tower.preprocessing.json").read_text())
    (tmp_path / "tower.preprocessing.json").write_text(json.dumps({**sidecar, "input_size": [3, 160, 160]}))
    with pytest.raises(AlignError, match="declares a 224x224 input"):
        load_image_tower(_cfg("onnx", graph))
    with pytest.raises(AlignError, match="vision.image_size = 160"):
        load_image_tower(_cfg("onnx", exported / "tower.onnx", image_size=160))
    # recipe keys override the sidecar key by key, and the fingerprint follows
    (tmp_path / "tower.preprocessing.json").unlink()
    tower = load_image_tower(_cfg("onnx", graph, preprocess=PreprocessConfig(mean=[0.5, 0.5, 0.5], std=[0.5, 0.5, 0.5])))
    assert tower.preprocessing["mean"] == (0.5, 0.5, 0.5) and tower.preprocessing["interpolation"] == "bilinear"
    assert tower.preprocessing["input_size"] == (3, 224, 224)  # from the graph's declared input


def test_align_load_refuses_another_onnx_tower(exported, timm_tower):
    tower = load_image_tower(_cfg("onnx", exported / "tower.onnx"))
    side = json.loads(json.dumps(image_side_record(tower, tower.fingerprint)))  # as image_side.json holds it
    assert side["recipe"]["source"] == "onnx" and side["weights"]["external_data"] == ["tower.onnx.data"]
    again = load_checked_tower(side)  # rebuilt from the recorded path and preprocessing: same tower
    assert not tower_differences(side, again.fingerprint)
    with pytest.raises(FingerprintMismatch, match="weights_sha256"):
        load_checked_tower(side, weights=exported / "classifier.onnx")
    assert "source: onnx -> timm" in tower_differences(side, timm_tower.fingerprint)


# ---------------------------------------------------------------------------------------------
# compiled programs


def test_exported_program_gives_the_timm_embeddings(exported, timm_tower, photos):
    tower = load_image_tower(_cfg("program", exported / "tower.pt2", preprocess=PreprocessConfig(
        file=str(exported / "tower.preprocessing.json"))))
    difference = (_embed(tower, photos) - _embed(timm_tower, photos)).abs().max().item()
    assert difference < 1e-6, difference
    assert tower.name == "torch.export program" and tower.weights_sha256 == timm_tower.weights_sha256
    assert tower.preprocessing["input_size"] == (3, 224, 224)  # fixed by the program, agreeing with the sidecar
    print(f"fidelity vs timm, program (.pt2): max |difference| {difference:.2e}")


def test_torchscript_program_gives_the_timm_embeddings(exported, timm_tower, photos):
    tower = load_image_tower(_cfg("program", exported / "traced.pt"))
    difference = (_embed(tower, photos) - _embed(timm_tower, photos)).abs().max().item()
    assert difference < 1e-6, difference
    assert tower.name == "TorchScript module"


def test_a_pickled_module_is_never_loaded(tmp_path, timm_tower):
    pickled = tmp_path / "module.pt"
    torch.save(timm_tower.model, pickled)  # a whole pickled module: loading it would run code
    write_sidecar(tmp_path / "module.preprocessing.json", timm_tower.preprocessing)
    with pytest.raises(AlignError, match="neither a torch.export archive"):
        load_image_tower(_cfg("program", pickled))


# ---------------------------------------------------------------------------------------------
# transformers


@pytest.fixture(scope="module")
def vit_folder(tmp_path_factory) -> Path:
    """A small ViT with random weights, built from a config and saved with its image processor."""
    from transformers import ViTConfig, ViTImageProcessor, ViTModel

    folder = tmp_path_factory.mktemp("vit")
    torch.manual_seed(0)
    config = ViTConfig(hidden_size=48, num_hidden_layers=2, num_attention_heads=4, intermediate_size=96,
                       image_size=48, patch_size=8)
    ViTModel(config).eval().save_pretrained(folder)
    ViTImageProcessor(size={"height": 48, "width": 48}, image_mean=[0.4, 0.5, 0.6], image_std=[0.2, 0.25, 0.3]
                      ).save_pretrained(folder)
    return folder


def _direct(folder: Path, images, pooling: str) -> tuple[torch.Tensor, torch.Tensor]:
    """(processor output, normalised embedding) straight from transformers, no align code."""
    from transformers import AutoImageProcessor, AutoModel

    model = AutoModel.from_pretrained(str(folder)).eval()
    pixels = AutoImageProcessor.from_pretrained(str(folder))(images=images, return_tensors="pt")["pixel_values"]
    with torch.inference_mode():
        out = model(pixel_values=pixels)
    pooled = {"cls": out.last_hidden_state[:, 0], "mean": out.last_hidden_state[:, 1:].mean(dim=1),  # 1 class token
              "pooler": out.pooler_output}[pooling]
    return pixels, F.normalize(pooled, dim=-1)


@pytest.mark.parametrize("pooling", ["cls", "mean", "pooler"])
def test_transformers_tower_equals_a_direct_forward(vit_folder, photos, pooling):
    tower = load_image_tower(_cfg("transformers", vit_folder, pooling=pooling))
    pixels, direct = _direct(vit_folder, photos, pooling)
    mine = torch.stack([tower.preprocess(im) for im in photos])
    assert torch.equal(mine, pixels)  # align's preprocessing is the image processor's output tensor
    difference = (tower.embed_pixels(mine) - direct).abs().max().item()
    assert difference < 1e-6, difference
    assert tower.fingerprint["source"] == "transformers" and tower.name == "ViTModel"
    assert tower.fingerprint["preprocessing"]["processor"]["image_mean"] == [0.4, 0.5, 0.6]
    if pooling == "mean":
        assert tower.prefix == 1 and "[:, 1:]" in tower.pooling  # the class token is left out, and said so


def test_transformers_projection_pooling(tmp_path, photos):
    from transformers import CLIPImageProcessor, CLIPVisionConfig, CLIPVisionModelWithProjection

    torch.manual_seed(0)
    model = CLIPVisionModelWithProjection(CLIPVisionConfig(hidden_size=32, num_hidden_layers=1, num_attention_heads=2,
                                                           intermediate_size=64, image_size=32, patch_size=8,
                                                           projection_dim=24)).eval()
    model.save_pretrained(tmp_path)
    CLIPImageProcessor(size={"shortest_edge": 32}, crop_size={"height": 32, "width": 32}).save_pretrained(tmp_path)
    tower = load_image_tower(_cfg("transformers", tmp_path, pooling="projection"))
    pixels = torch.stack([tower.preprocess(im) for im in photos])
    with torch.inference_mode():
        direct = F.normalize(model(pixel_values=pixels).image_embeds, dim=-1)
    assert tower.feature_dim == 24
    assert (tower.embed_pixels(pixels) - direct).abs().max().item() < 1e-6


def test_transformers_tower_builds_a_feature_cache(vit_folder, small_digits_shards, tmp_path):
    cfg = _cfg("transformers", vit_folder, pooling="cls", batch_size=64, workers=1)
    tower = load_image_tower(cfg)
    feats = image_features(tower, small_digits_shards, "val", cfg, Console(quiet=True), cache_dir=tmp_path)
    assert feats.build is not None and feats.build.images == len(feats.keys)
    assert tower.forward_passes == -(-len(feats.keys) // 64)  # batched: one pass per chunk
    assert feats.fingerprint["tower"] == tower.fingerprint
    again = image_features(tower, small_digits_shards, "val", cfg, Console(quiet=True), cache_dir=tmp_path)
    assert again.build is None and tower.forward_passes == -(-len(feats.keys) // 64)  # a hit: no pass
    assert 0 < activation_bytes(tower, 64) < 2**30


# ---------------------------------------------------------------------------------------------
# identity and recipe keys


def test_fingerprints_before_tower_sources_still_match(timm_tower):
    older = {k: v for k, v in timm_tower.fingerprint.items() if k not in ("source", "files_sha256")}
    assert tower_differences(older, timm_tower.fingerprint) == []  # exports made before still load


def test_recipe_says_which_keys_a_source_reads():
    with pytest.raises(RecipeError, match="needs vision.model_path"):
        tiny_recipe(vision__source="onnx")
    with pytest.raises(RecipeError, match="name it"):
        tiny_recipe(vision__source="transformers", vision__model_path="m")  # no pooling
    with pytest.raises(RecipeError, match="vision.weights names a timm weights file"):
        tiny_recipe(vision__source="program", vision__model_path="m.pt2", vision__weights="w.safetensors")
    with pytest.raises(RecipeError, match=r"\[vision.preprocess\] is for onnx and program"):
        tiny_recipe(vision__preprocess__mean=[0.5, 0.5, 0.5])
    with pytest.raises(RecipeError, match="three numbers"):
        tiny_recipe(vision__source="onnx", vision__model_path="m.onnx", vision__preprocess__std=[0.5])
    with pytest.raises(RecipeError, match="does not apply"):
        tiny_recipe(vision__pooling="cls")  # timm pools inside the model
    ok = tiny_recipe(vision__source="onnx", vision__model_path="m.onnx", vision__pooling="mean",
                     vision__preprocess__mean=[0.5, 0.5, 0.5], vision__preprocess__crop_mode="squash")
    assert ok.vision.preprocess.crop_mode == "squash"


def test_a_service_job_reads_tower_files_only_inside_its_data_roots(small_digits_shards, tmp_path):
    # the service's path confinement covers the new keys as it covers vision.weights
    from align.service.home import Settings
    from align.service.security import PathRefused
    from align.service.spec import confine_recipe_paths

    outside = tmp_path / "elsewhere"
    outside.mkdir()
    (outside / "tower.onnx").write_bytes(b"not read")
    towers = tmp_path / "towers"
    towers.mkdir()
    settings = Settings(home=tmp_path / "home", data_roots=[Path(small_digits_shards).parent, towers])
    recipe = tiny_recipe(small_digits_shards, vision__source="onnx", vision__model_path=str(outside / "tower.onnx"))
    with pytest.raises(PathRefused, match="vision.model_path"):
        confine_recipe_paths(recipe, settings)
    inside = towers / "tower.onnx"
    inside.write_bytes(b"not read")
    recipe = tiny_recipe(small_digits_shards, vision__source="onnx", vision__model_path=str(inside),
                         vision__preprocess__file=str(outside / "tower.onnx"))
    with pytest.raises(PathRefused, match="vision.preprocess.file"):
        confine_recipe_paths(recipe, settings)
