"""Load an export and use it: ``align.load(EXPORT_DIR)``.

The text side comes from ``text_encoder/`` (the merged, self-contained encoder: plain transformers,
mean pooling over the attention mask, the saved projection, L2 normalisation). The image side is
rebuilt from ``image_side.json`` with local weights and refused when its fingerprint differs from
the one the text side was trained against: a text embedding is only meaningful next to image
embeddings from exactly that tower.

    model = align.load("exports/demo")
    model.scores(["a cobalt herringbone tile"], ["tile.png"])   # (1, 1) cosine similarities
"""
from __future__ import annotations

import json
from pathlib import Path
from typing import Sequence

import numpy as np
import torch
from PIL import Image

from . import artifacts as A
from .errors import AlignError, FingerprintMismatch
from .recipe import PreprocessConfig, VisionConfig
from .text import TextTower, text_kind
from .vision import TOWER_IDENTITY, shared_image_tower, tower_differences

def read_json(path: Path, what: str, hint: str) -> dict:
    if not path.is_file():
        raise AlignError(f"{path} is missing: this is not a complete {what}", hint)
    try:
        return json.loads(path.read_text(encoding="utf-8"))
    except (UnicodeDecodeError, json.JSONDecodeError) as exc:
        raise AlignError(f"{path} is not valid JSON ({exc})", hint) from None


def _export_hint(export_dir: Path) -> str:
    return f"run `align export RUN_DIR --out {export_dir}` again"


def load_projection(folder: Path) -> torch.Tensor:
    from safetensors.torch import load_file

    path = Path(folder) / A.PROJECTION
    if not path.is_file():
        raise AlignError(f"{path} is missing", "export the run again")
    return load_file(str(path))["weight"]  # (D, H)


def _tower(folder: Path, encoder: torch.nn.Module, tokenizer, head: dict) -> TextTower:
    """The shared text head around a loaded encoder, with the saved projection, frozen."""
    tower = TextTower.with_projection(encoder, tokenizer, load_projection(folder), head["kind"],
                                      int(head["max_length"]))
    return tower.eval().requires_grad_(False)


def load_text_encoder(folder: Path, attn_implementation: str | None = None):
    """(TextTower, tokenizer, head.json) from a ``text_encoder/`` folder, plain transformers only."""
    from transformers import AutoModel, AutoTokenizer
    from transformers.utils import logging as hf_logging

    folder = Path(folder)
    head = read_json(folder / A.TEXT_HEAD, "text encoder export", _export_hint(folder.parent))
    hf_logging.set_verbosity_error()  # a scratch tower has no pooler: transformers would warn about it
    hf_logging.disable_progress_bar()
    kwargs = {"attn_implementation": attn_implementation} if attn_implementation else {}
    encoder = AutoModel.from_pretrained(str(folder), local_files_only=True, **kwargs).eval()
    tokenizer = AutoTokenizer.from_pretrained(str(folder), local_files_only=True)
    return _tower(folder, encoder, tokenizer, head), tokenizer, head


def load_adapter_encoder(folder: Path, base_model: str | Path | None = None):
    """(TextTower, tokenizer, head.json) from ``adapter/``: the base encoder with its kind's adapter on it.

    ``base_model`` defaults to the folder recorded in head.json. When the adapter's tokenizer is
    larger than the base's vocabulary (terms were added), the base's embedding matrix is resized
    first; peft then restores the trained rows from the adapter.
    """
    from transformers import AutoTokenizer
    from transformers.utils import logging as hf_logging

    folder = Path(folder)
    head = read_json(folder / A.TEXT_HEAD, "adapter export", _export_hint(folder.parent))
    base_dir = Path(base_model or head["base_model"])
    if not (base_dir / "config.json").is_file():
        raise AlignError(f"the adapter's base encoder is not at {base_dir}",
                         "pass base_model=DIR (the text.model the run was trained on), or use text_encoder/ "
                         "(merged, needs no base)")
    hf_logging.set_verbosity_error()
    hf_logging.disable_progress_bar()
    tokenizer = AutoTokenizer.from_pretrained(str(folder), local_files_only=True)
    encoder = text_kind(head["kind"]).load_adapter(folder, base_dir, len(tokenizer))
    return _tower(folder, encoder, tokenizer, head), tokenizer, head


def vision_config_for(image_side: dict, weights: str | Path | None = None) -> VisionConfig:
    """The VisionConfig that rebuilds the tower image_side.json describes.

    timm: ``weights`` defaults to the file recorded at export when it still exists on this machine
    and is not the offline package; otherwise the offline package. Other sources: ``weights`` names
    the model file or folder (default: the one recorded at export).
    """
    keys = image_side.get("recipe") or {"source": "timm"}  # exports before tower sources: timm
    if keys["source"] == "stored":
        raise AlignError(f"this export was trained against stored vectors of {image_side.get('model')!r}, with no "
                         "image tower align can run", "embed images with that model yourself (image_side.json says "
                         "how they were made) and compare them with embed_text's output")
    if keys["source"] != "timm":
        plain = {k: v for k, v in keys.items() if k != "preprocess"} | ({"model_path": str(weights)} if weights else {})
        return VisionConfig(**plain, preprocess=PreprocessConfig(**keys.get("preprocess", {})))
    recorded = image_side.get("weights", {})
    if weights is None and recorded.get("source") == "file" and Path(recorded.get("path", "")).is_file():
        weights = recorded["path"]
    size = int(image_side["preprocessing"]["input_size"][-1])
    return VisionConfig(model=image_side["model"], weights=str(weights or ""), image_size=size,
                        channels_last=bool(image_side.get("channels_last", True)))


def load_checked_tower(image_side: dict, weights: str | Path | None = None):
    """The frozen tower image_side.json describes, refused when its fingerprint differs."""
    cfg = vision_config_for(image_side, weights)
    tower = shared_image_tower(cfg)  # the service's index phase reuses the tower its job trained with
    differences = tower_differences(image_side, tower.fingerprint)
    if differences:
        recorded = image_side.get("weights", {})
        origin = cfg.model_path if cfg.source != "timm" else cfg.weights or "the offline package"
        raise FingerprintMismatch(
            f"the {cfg.source} image tower loaded from {origin} is not the one this export "
            f"was trained against ({'; '.join(differences)})",
            f"pass the weights file or model the export names (weights=PATH / --weights PATH; it was "
            f"{recorded.get('file') or recorded.get('folder', '?')}, weights sha256 {image_side['weights_sha256'][:12]}…)")
    return tower


def check_image_side_matches(export_dir: str | Path, fingerprint: dict) -> None:
    """Refuse to pair an export with image embeddings made by another tower (index, query)."""
    export_dir, _, image_side = read_export(export_dir)
    differences = tower_differences(image_side, fingerprint)
    if differences:
        raise FingerprintMismatch(f"{export_dir} was trained against another image tower than these image "
                                  f"embeddings ({'; '.join(differences)})",
                                  "use the export made for this gallery's tower, or index the gallery again with it")


def open_rgb(item: Image.Image | str | Path) -> Image.Image:
    """An upright RGB image from a PIL image or a path (EXIF orientation applied, as a viewer shows it)."""
    from .data.pixels import UnsupportedPixels, to_rgb8
    from .data.shards import decode_image

    if isinstance(item, Image.Image):
        try:  # the same rule as packed images: 16-bit samples scaled, not clipped
            return to_rgb8(item)
        except UnsupportedPixels as exc:
            raise AlignError(f"cannot use this image: {exc}", "convert it to 8- or 16-bit RGB or grayscale") from None
    path = Path(item)
    if not path.is_file():
        raise AlignError(f"no image at {path}", "pass existing image paths or PIL images")
    try:
        return decode_image(path.read_bytes())
    except Exception as exc:  # PIL raises many types for damaged files
        raise AlignError(f"cannot decode image {path}: {exc}", "check the file is a readable image") from None


class AlignedModel:
    """Text and image embeddings in one shared space, from an export folder."""

    def __init__(self, export_dir: Path, text: TextTower, tokenizer, head: dict, image_side: dict,
                 info: dict, weights: str | Path | None, tower=None):
        self.export_dir = export_dir
        self.text = text
        self.tokenizer = tokenizer
        self.head = head
        self.image_side = image_side
        self.info = info
        self._weights = weights
        self._tower = tower
        self._passes_before = tower.forward_passes if tower is not None else 0

    @property
    def embedding_dim(self) -> int:
        return int(self.head["embedding_dim"])

    @property
    def vision_config(self) -> VisionConfig:
        """The recipe section that rebuilds this export's frozen tower (for the feature cache)."""
        return vision_config_for(self.image_side, self._weights)

    @property
    def has_tower(self) -> bool:
        """False for an export trained against stored vectors alone: it embeds text only."""
        return (self.image_side.get("recipe") or {}).get("source") != "stored"

    @property
    def image_fingerprint(self) -> dict:
        """The image side's identity: the (loaded, checked) tower's fingerprint, or the stored vectors'."""
        if not self.has_tower:
            return {key: self.image_side.get(key) for key in TOWER_IDENTITY}
        return self.image_tower.fingerprint

    @property
    def tower_forward_passes(self) -> int:
        # counted from when this model took the tower: a shared tower may have run for others before
        return self._tower.forward_passes - self._passes_before if self._tower is not None else 0

    @property
    def image_tower(self):
        """The frozen tower, rebuilt and fingerprint-checked on first use."""
        if self._tower is None:
            self._tower = load_checked_tower(self.image_side, self._weights)
            self._passes_before = self._tower.forward_passes
        return self._tower

    def tokenize(self, texts: Sequence[str]) -> dict[str, torch.Tensor]:
        return self.text.tokenize(texts)

    def embed_text(self, texts: Sequence[str] | str, batch_size: int = 64) -> np.ndarray:
        """(N, D) float32, L2-normalised."""
        texts = [texts] if isinstance(texts, str) else list(texts)
        if not all(isinstance(t, str) for t in texts):
            raise AlignError("embed_text takes a list of strings")
        out = []
        with torch.inference_mode():
            for start in range(0, len(texts), batch_size):
                out.append(self.text(**self.tokenize(texts[start:start + batch_size])).numpy())
        return np.concatenate(out) if out else np.zeros((0, self.embedding_dim), np.float32)

    def embed_images(self, images: Sequence[Image.Image | str | Path], batch_size: int = 32) -> np.ndarray:
        """(N, D) float32, L2-normalised: the frozen tower's pooled output, exactly as at training."""
        images = [images] if isinstance(images, (str, Path, Image.Image)) else list(images)
        tower = self.image_tower
        out = []
        for start in range(0, len(images), batch_size):
            pixels = torch.stack([tower.preprocess(open_rgb(item)) for item in images[start:start + batch_size]])
            out.append(tower.embed_pixels(pixels).numpy())  # (b, D)
        return np.concatenate(out) if out else np.zeros((0, self.embedding_dim), np.float32)

    def scores(self, texts: Sequence[str] | str, images: Sequence[Image.Image | str | Path]) -> np.ndarray:
        """Cosine similarity of every text with every image, (T, I)."""
        return self.embed_text(texts) @ self.embed_images(images).T


def read_export(export_dir: str | Path) -> tuple[Path, dict, dict]:
    """(folder, export.json, image_side.json) of an export, with clear errors when incomplete."""
    export_dir = Path(export_dir)
    if not export_dir.is_dir():
        raise AlignError(f"no export at {export_dir}", "write one with `align export RUN_DIR --out DIR`")
    hint = _export_hint(export_dir)
    info = read_json(export_dir / A.EXPORT_INFO, "align export", hint)
    image_side = read_json(export_dir / A.IMAGE_SIDE, "align export", hint)
    return export_dir, info, image_side


def load(export_dir: str | Path, *, weights: str | Path | None = None, image_tower: bool = True) -> AlignedModel:
    """Load an export folder written by ``align export``.

    ``weights``: the frozen tower's local weights file (default: the file recorded at export if it
    is still there, else the offline EfficientNet-Lite0 package). The tower is rebuilt from
    ``image_side.json`` and refused (``FingerprintMismatch``) when it is not the one the export was
    trained against. ``image_tower=False`` defers that to the first ``embed_images`` call, for
    text-only use such as answering queries against a stored gallery.
    """
    export_dir, info, image_side = read_export(export_dir)
    text, tokenizer, head = load_text_encoder(export_dir / A.EXPORT_TEXT_ENCODER)
    tower_less = (image_side.get("recipe") or {}).get("source") == "stored"  # text only: nothing to check
    tower = load_checked_tower(image_side, weights) if image_tower and not tower_less else None
    return AlignedModel(export_dir, text, tokenizer, head, image_side, info, weights, tower)
