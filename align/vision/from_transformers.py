"""The transformers source: a local model folder, loaded with ``AutoModel`` and its own image
processor (``vision.source = "transformers"``).

The image processor is the preprocessing (what ``processor(images=...)`` returns is what the model
sees), and the recipe names the pooling, as it changes the embedding:

    cls         last_hidden_state[:, 0] of the vision model
    mean        the mean of the patch tokens (leading class/register tokens left out), or of a feature map
    pooler      the model's pooler_output
    projection  the model's own image projection (get_image_features, or image_embeds)

A dual text-image model (one with ``get_image_features``) runs only its vision half. The model is
loaded with ``AutoModel``; for ``projection``, with the transformers class its config names (AutoModel
would drop a vision model's projection head). Weights are read in float32, whatever dtype they were
saved in.
"""
from __future__ import annotations

import json
from pathlib import Path

import torch

from ..errors import AlignError
from ..recipe import VisionConfig
from .identity import FILES_RULE, WEIGHTS_RULE, files_sha256, weights_sha256
from .tower import FrozenImageTower

_RESAMPLE = {0: "nearest", 1: "lanczos", 2: "bilinear", 3: "bicubic", 4: "box", 5: "hamming"}
RULES = {
    "cls": "last_hidden_state[:, 0] of the vision model (the first token)",
    "mean": "last_hidden_state[:, {prefix}:].mean(1) of the vision model: the mean of the patch tokens, the first "
            "{prefix} token(s) left out (a (B, C, H, W) feature map: the mean over H and W)",
    "pooler": "pooler_output of the vision model",
    "projection": "the model's image projection: get_image_features(pixel_values=...) (its pooler_output when it "
                  "returns an output object), else the forward's image_embeds",
}


class ProcessorTransform:
    """The folder's image processor as a transform: RGB image -> (3, H, W) float32. Picklable, so it
    runs in DataLoader workers as it is."""

    def __init__(self, processor):
        self.processor = processor

    def __call__(self, image) -> torch.Tensor:
        return self.processor(images=image, return_tensors="pt")["pixel_values"][0].float()  # (3, H, W)

    def __repr__(self) -> str:
        return repr(self.processor)


def vision_body(model):
    """The part that maps pixels to tokens: a dual text-image model's vision half, else the model."""
    return model.vision_model if hasattr(model, "get_image_features") and hasattr(model, "vision_model") else model


def pool_transformers(model, pixels: torch.Tensor, pooling: str, prefix: int) -> torch.Tensor:
    """(B, 3, H, W) -> (B, D) by the named pooling (see RULES)."""
    if pooling == "projection":
        if hasattr(model, "get_image_features"):
            out = model.get_image_features(pixel_values=pixels)
            return out if isinstance(out, torch.Tensor) else out.pooler_output
        return model(pixel_values=pixels).image_embeds
    out = vision_body(model)(pixel_values=pixels)
    if pooling == "pooler":
        return out.pooler_output
    hidden = out.last_hidden_state
    if pooling == "cls":
        return hidden[:, 0]
    return hidden.mean(dim=(2, 3)) if hidden.dim() == 4 else hidden[:, prefix:].mean(dim=1)


def leading_tokens(model, pixels: torch.Tensor, hidden: torch.Tensor) -> int:
    """How many tokens come before the patch tokens (class, distillation, register tokens): the
    tokens past (H / patch) x (W / patch). 0 where the count does not fit (a hierarchical model)."""
    config = getattr(model.config, "vision_config", model.config)
    patch = getattr(config, "patch_size", None)
    if hidden.dim() != 3 or patch is None:
        return 0
    ph, pw = (patch, patch) if isinstance(patch, int) else tuple(patch)
    extra = hidden.shape[1] - (pixels.shape[2] // ph) * (pixels.shape[3] // pw)
    return extra if 0 <= extra < hidden.shape[1] else 0


class TransformersTower(FrozenImageTower):
    source = "transformers"

    def __init__(self, *, pooling_choice: str, prefix: int, **kwargs):
        super().__init__(**kwargs)
        self.pooling_choice, self.prefix = pooling_choice, prefix

    def _forward(self, pixels: torch.Tensor) -> torch.Tensor:
        return pool_transformers(self.model, pixels, self.pooling_choice, self.prefix)

    def recipe_keys(self) -> dict:
        return {"source": "transformers", "model_path": self.weights_path, "pooling": self.pooling_choice}

    def rebuild_record(self) -> dict:
        import transformers

        folder = Path(self.weights_path)
        return {
            "library": f"transformers {transformers.__version__}",
            "build": f"transformers.{model_class(folder, self.pooling_choice).__name__}.from_pretrained(folder)"
                     ".float().eval(); transformers.AutoImageProcessor.from_pretrained(folder)",
            "weights": {"folder": str(folder), "files": [p.name for p in _model_files(folder)]},
            "weights_sha256_rule": WEIGHTS_RULE,
            "files_sha256_rule": FILES_RULE + ", over the folder's files in name order",
            "preprocessing_rule": "processor(images=image, return_tensors='pt')['pixel_values'] on the image "
                                  "converted to RGB (EXIF orientation applied)",
            "embedding_rule": self.pooling + "; divide each row by its L2 norm",
        }


def _model_files(folder: Path) -> list[Path]:
    return sorted((p for p in folder.rglob("*") if p.is_file() and not any(part.startswith(".")
                   for part in p.relative_to(folder).parts)), key=lambda p: p.relative_to(folder).as_posix())


def _preprocessing(processor, transform: ProcessorTransform) -> dict:
    """What the processor does, for the fingerprint, plus timm-style keys for augmented views."""
    from PIL import Image

    probe = transform(Image.new("RGB", (97, 71), (128, 128, 128)))  # an odd shape: resize and crop both act
    settings = json.loads(processor.to_json_string())
    return {"input_size": [3, int(probe.shape[1]), int(probe.shape[2])],
            "mean": list(settings.get("image_mean") or (0.0, 0.0, 0.0)),
            "std": list(settings.get("image_std") or (1.0, 1.0, 1.0)),
            "interpolation": _RESAMPLE.get(settings.get("resample"), "bicubic"), "processor": settings}


def model_class(folder: Path, pooling: str):
    """AutoModel, or for the projection the transformers class the config names: AutoModel maps a
    vision model with a projection head (CLIPVisionModelWithProjection) to its base, without the head."""
    import transformers

    if pooling == "projection":
        names = json.loads((folder / "config.json").read_text(encoding="utf-8")).get("architectures") or []
        named = getattr(transformers, names[0], None) if names else None
        if isinstance(named, type) and issubclass(named, transformers.PreTrainedModel):
            return named
    return transformers.AutoModel


def _load(folder: Path, pooling: str):
    from transformers import AutoImageProcessor
    from transformers.utils import logging as hf_logging

    hf_logging.set_verbosity_error()
    hf_logging.disable_progress_bar()
    try:
        model = model_class(folder, pooling).from_pretrained(str(folder), local_files_only=True)
        processor = AutoImageProcessor.from_pretrained(str(folder), local_files_only=True)
    except Exception as exc:  # noqa: BLE001 - transformers raises many types for an unusable folder
        raise AlignError(f"transformers cannot load an image model and its image processor from {folder}: {exc}",
                         "the folder needs config.json, the weights and preprocessor_config.json "
                         "(save_pretrained of the model and of its image processor)") from None
    return model.float().eval().requires_grad_(False), processor


def load_transformers_tower(cfg: VisionConfig) -> TransformersTower:
    folder = Path(cfg.model_path).resolve()
    if not (folder / "config.json").is_file():
        raise AlignError(f"no transformers model folder at {cfg.model_path} (no config.json)",
                         "set vision.model_path to a folder written by save_pretrained")
    model, processor = _load(folder, cfg.pooling)
    transform = ProcessorTransform(processor)
    preprocessing = _preprocessing(processor, transform)
    side = preprocessing["input_size"][1:]
    if cfg.image_size and [cfg.image_size, cfg.image_size] != side:
        raise AlignError(f"vision.image_size = {cfg.image_size}, but the image processor of {cfg.model_path} makes "
                         f"{side[0]}x{side[1]} inputs", "set vision.image_size = 0: the processor decides the size")
    pixels = torch.zeros(1, 3, *side)
    try:
        with torch.inference_mode():
            prefix = (leading_tokens(model, pixels, vision_body(model)(pixel_values=pixels).last_hidden_state)
                      if cfg.pooling == "mean" else 0)
            probe = pool_transformers(model, pixels, cfg.pooling, prefix)  # (1, D)
    except (AttributeError, TypeError) as exc:
        probe, problem = None, f" ({exc})"
    else:
        problem = ""
    if probe is None:
        raise AlignError(f"vision.pooling = {cfg.pooling!r} does not apply to {type(model).__name__}{problem}",
                         "cls and mean need a last_hidden_state, pooler a pooler_output, projection an image "
                         "projection (get_image_features or image_embeds)")
    return TransformersTower(name=type(model).__name__, model=model, transform=transform, preprocessing=preprocessing,
                             weights_sha256=weights_sha256(model), weights_path=str(folder),
                             feature_dim=int(probe.shape[-1]), pooling=RULES[cfg.pooling].format(prefix=prefix),
                             files_sha256=files_sha256(_model_files(folder)), pooling_choice=cfg.pooling, prefix=prefix)
