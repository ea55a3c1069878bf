"""The [vision] recipe section: which frozen tower, from which source, with which pooling and
preprocessing, and which keys each source reads (checked key by key, with a hint).

Torch-free and model-free like the rest of the recipe; ``align.recipe`` assembles the sections.
The documented-field helper lives here, the lowest module of the schema, and the recipe uses it too.
"""
from __future__ import annotations

import math
from dataclasses import dataclass, field

from .errors import RecipeError


def doc_field(default, doc: str, choices: tuple | None = None):
    """A recipe field with its documentation (and allowed values) attached."""
    meta = {"doc": doc, "choices": choices}
    if isinstance(default, (list, dict)):
        return field(default_factory=lambda d=default: type(d)(d), metadata=meta)
    return field(default=default, metadata=meta)


_f = doc_field


TOWER_SOURCES = ("timm", "transformers", "onnx", "program", "stored")
POOLINGS = ("", "output", "cls", "mean", "pooler", "projection")


@dataclass
class PreprocessConfig:
    """How an onnx or program tower's input is made; timm and transformers towers bring their own."""

    file: str = _f("", "sidecar JSON with input_size, mean, std, interpolation, crop_pct, crop_mode (timm's data "
                       "config keys); empty = MODEL.preprocessing.json beside vision.model_path, when it exists")
    mean: list = _f([], "per-channel mean, subtracted after scaling pixels to [0, 1]; overrides the sidecar")
    std: list = _f([], "per-channel standard deviation, divided after the mean; overrides the sidecar")
    interpolation: str = _f("", "resize filter; overrides the sidecar (default bilinear)",
                            ("", "bilinear", "bicubic", "nearest"))
    crop_pct: float = _f(0.0, "centre crop as a fraction of the resized image (0.875: resize to side / 0.875, "
                              "crop side); 0 = the sidecar's (default 1.0, no crop margin)")
    crop_mode: str = _f("", "center (resize the shorter side, crop the middle), squash (resize to the square) or "
                            "border; overrides the sidecar (default center)", ("", "center", "squash", "border"))


@dataclass
class VisionConfig:
    source: str = _f("timm", "where the frozen tower comes from: timm (architecture + weights file), transformers "
                             "(a local model folder with its image processor), onnx (an .onnx file run by "
                             "onnxruntime), program (a torch.export .pt2 or TorchScript file), stored (no tower: "
                             "the vectors packed with `align pack --vectors`)", TOWER_SOURCES)
    model: str = _f("efficientnet_lite0", "timm architecture name of the frozen image tower (source = timm)")
    weights: str = _f("", "local weights file (safetensors, or a pickle loaded with weights_only); "
                          "empty = the offline EfficientNet-Lite0 package (source = timm)")
    model_path: str = _f("", "the tower's local files: a model folder (source = transformers), an .onnx file "
                             "(onnx), a .pt2 or TorchScript .pt file (program)")
    pooling: str = _f("", "how the model's output becomes one vector: output (it is one already), cls (the first "
                          "token), mean (the patch tokens, or every position of a feature map), pooler "
                          "(transformers' pooler_output), projection (the model's own image projection); "
                          "empty = output (timm, onnx, program); transformers towers name one", POOLINGS)
    image_size: int = _f(0, "input side in pixels; 0 = the tower's native size from its pretrained config")
    channels_last: bool = _f(True, "run the tower in channels_last memory format (about 2x faster on CPU)")
    batch_size: int = _f(64, "images per forward pass while embedding")
    workers: int = _f(0, "DataLoader worker processes decoding images while embedding (0 = main process)")
    views: int = _f(1, "augmented views cached per training image (random resized crop + flip); "
                       "one is sampled per epoch")
    feature_cache: str = _f("", "folder of the frozen-feature cache (one sub-folder per fingerprint); "
                                "empty = features/ inside the packed shards folder")
    stored_vectors: bool = _f(False, "train and evaluate against the vectors packed with `align pack --vectors` "
                                     "(no tower pass over the images); with a tower source too, check_rows of "
                                     "them are re-embedded first. source = stored implies it")
    check_rows: int = _f(64, "stored vectors re-embedded by the tower to check them (cosine >= 0.999 per row, "
                             "else refused); 0 = no check")
    preprocess: PreprocessConfig = field(default_factory=PreprocessConfig,
                                         metadata={"doc": "an onnx or program tower's preprocessing"})

    @property
    def uses_stored_vectors(self) -> bool:
        return self.stored_vectors or self.source == "stored"


def validate_vision(v: VisionConfig) -> None:
    """Which keys each tower source reads; a key it would ignore is refused, so nothing is silently unused."""
    pre, own_preprocessing = v.preprocess, v.source in ("timm", "transformers", "stored")
    if v.source != "timm" and v.weights:
        raise RecipeError(f"vision.weights names a timm weights file, but vision.source = {v.source!r}",
                          "give the model's file or folder as vision.model_path")
    if v.source in ("transformers", "onnx", "program") and not v.model_path:
        kind = {"transformers": "model folder", "onnx": ".onnx file", "program": ".pt2 or TorchScript file"}[v.source]
        raise RecipeError(f"vision.source = {v.source!r} needs vision.model_path", f"set it to the local {kind}")
    if v.source in ("timm", "stored") and v.model_path:
        raise RecipeError(f"vision.model_path is not read when vision.source = {v.source!r}",
                          "set vision.source to transformers, onnx or program, or leave model_path empty")
    allowed = {"timm": ("", "output"), "transformers": ("cls", "mean", "pooler", "projection"),
               "onnx": ("", "output", "cls", "mean"), "program": ("", "output", "cls", "mean"), "stored": ("",)}
    if v.pooling not in allowed[v.source]:
        shown = ", ".join(repr(p) for p in allowed[v.source])
        raise RecipeError(f"vision.pooling = {v.pooling!r} does not apply to vision.source = {v.source!r}",
                          f"one of: {shown}" + (" (the pooling changes the embedding: name it)"
                                                if v.source == "transformers" else ""))
    if own_preprocessing and pre != PreprocessConfig():
        raise RecipeError(f"[vision.preprocess] is for onnx and program towers; vision.source = {v.source!r} "
                          "brings its own preprocessing", "remove the [vision.preprocess] keys")
    for where, values in (("vision.preprocess.mean", pre.mean), ("vision.preprocess.std", pre.std)):
        if values and (len(values) != 3 or not all(isinstance(x, (int, float)) and not isinstance(x, bool)
                                                   and math.isfinite(x) for x in values)):
            raise RecipeError(f"{where} must be three numbers (R, G, B), got {values!r}",
                              f"for example {where}=[0.485, 0.456, 0.406]")
    if pre.std and min(pre.std) <= 0:
        raise RecipeError(f"vision.preprocess.std must be positive, got {pre.std!r}", "for example [0.229, 0.224, 0.225]")
    if not 0 <= pre.crop_pct <= 1:
        raise RecipeError(f"vision.preprocess.crop_pct must be in (0, 1] (or 0 = the sidecar's), got {pre.crop_pct}",
                          "for example 0.875")
    if v.check_rows < 0:
        raise RecipeError(f"vision.check_rows must be at least 0, got {v.check_rows}", "for example 64 (0 = no check)")
    if v.uses_stored_vectors and v.views > 1:
        raise RecipeError(f"vision.views = {v.views} needs the images, but the training targets are stored vectors",
                          "set vision.views = 1 (augmented views are tower passes over the images)")
