"""The frozen image tower, loaded and preprocessed by align's own code, classifies real photos."""
from __future__ import annotations

import numpy as np
import pytest
import torch
from PIL import Image

from align.errors import AlignError
from align.recipe import VisionConfig
from align.vision import load_image_tower, load_timm_model, preprocessing_for, weights_sha256


@pytest.fixture(scope="module")
def classifier():
    model = load_timm_model("efficientnet_lite0", num_classes=1000).eval()
    return model, load_image_tower(VisionConfig(channels_last=False))


def _top5(model, tower, image: np.ndarray) -> list[int]:
    pixels = tower.preprocess(Image.fromarray(image)).unsqueeze(0)
    with torch.inference_mode():
        return model(pixels).topk(5).indices[0].tolist()


def test_imagenet_classes_of_sample_photos(classifier):
    # scikit-image's sample photos; ILSVRC-2012 class indices: 281-285 are the domestic cats
    # (tabby, tiger cat, Persian, Siamese, Egyptian cat), 967 is espresso.
    from skimage import data

    model, tower = classifier
    assert _top5(model, tower, data.chelsea())[0] in range(281, 286)
    assert _top5(model, tower, data.coffee())[0] == 967


def test_preprocessing_comes_from_the_model(classifier):
    # timm's pretrained config for efficientnet_lite0: 224 px, bicubic, crop 0.875, ImageNet mean/std
    # (the ImageNet statistics are common practice; the values are timm's own, read from the model).
    _, tower = classifier
    assert tower.preprocessing["input_size"] == (3, 224, 224)
    assert tower.preprocessing["interpolation"] == "bicubic"
    assert np.allclose(tower.preprocessing["mean"], (0.485, 0.456, 0.406))
    assert preprocessing_for(tower.model, 160)["input_size"] == (3, 160, 160)


def test_embedding_is_pooled_output_l2_normalised(classifier):
    _, tower = classifier
    pixels = torch.randn(3, 3, 96, 96)
    with torch.inference_mode():
        pooled = tower.model(pixels)  # timm with num_classes=0 returns the pooled pre-logits
    emb = tower.embed_pixels(pixels)
    assert emb.shape == (3, 1280)
    assert torch.allclose(emb, torch.nn.functional.normalize(pooled, dim=-1), atol=1e-6)
    assert torch.allclose(emb.norm(dim=-1), torch.ones(3), atol=1e-5)


def test_tower_is_frozen(classifier):
    _, tower = classifier
    assert not tower.model.training
    assert not any(p.requires_grad for p in tower.model.parameters())
    assert tower.weights_sha256 == weights_sha256(tower.model)


def test_wrong_weights_fail_loudly(tmp_path):
    from safetensors.torch import save_file

    bad = tmp_path / "bad.safetensors"
    save_file({"w": torch.zeros(3, 3)}, str(bad))
    with pytest.raises(AlignError, match="tensors"):
        load_timm_model("efficientnet_lite0", bad)
    with pytest.raises(AlignError, match="no weights"):
        load_timm_model("efficientnet_lite0", tmp_path / "missing.pth")


def test_headless_safetensors_with_timm_names_load_by_name(tmp_path):
    # a headless timm state dict saved as safetensors (which stores keys sorted, not in model order)
    from safetensors.torch import save_file

    tower = load_image_tower(VisionConfig(channels_last=False))
    path = tmp_path / "headless.safetensors"
    save_file({k: v.contiguous() for k, v in tower.model.state_dict().items()}, str(path))
    again = load_timm_model("efficientnet_lite0", path)
    assert weights_sha256(again) == tower.weights_sha256
