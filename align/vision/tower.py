"""The one interface every frozen image tower offers, whatever format it came in.

The image side never changes. Every source loads its model frozen (eval mode where the format has
one, no gradients) and runs it only under ``torch.inference_mode()``; the embedding is the pooled
output, L2-normalised. Preprocessing travels with the tower (``preprocess``, ``transform``), and the
fingerprint says everything the embedding depends on.

A source subclasses ``FrozenImageTower`` and implements ``_forward`` (pixels to pooled features)
and ``rebuild_record`` (how to make the same embedding without align).
"""
from __future__ import annotations

from abc import ABC, abstractmethod
from typing import Callable

import torch
import torch.nn.functional as F
from PIL import Image

from .identity import NORMALISATION, plain_json
from .memory import peak_op_elements


class FrozenImageTower(ABC):
    """A locked image model with its preprocessing and provenance."""

    source = ""

    def __init__(self, *, name: str, model, transform: Callable, preprocessing: dict, weights_sha256: str,
                 weights_path: str, feature_dim: int, pooling: str, channels_last: bool = False,
                 files_sha256: str | None = None):
        self.name = name  # the architecture: a timm name, a transformers class, "onnx graph", ...
        self.model = model  # what runs: a torch module, an exported program's module, an onnxruntime session
        self.transform = transform  # PIL RGB image -> (3, H, W) float32, picklable (DataLoader workers)
        # input_size (3, H, W), mean, std, interpolation (+ crop, or the image processor's settings):
        # what the fingerprint records and what augmented views are drawn with
        self.preprocessing = preprocessing
        self.weights_sha256 = weights_sha256
        self.weights_path = weights_path  # the file or folder the tower was loaded from
        self.feature_dim = feature_dim
        self.pooling = pooling  # what the pooled vector is, in words precise enough to redo it
        self.channels_last = channels_last
        self.files_sha256 = files_sha256
        self.forward_passes = 0  # counted so tests and the cache can prove when the tower ran

    @property
    def input_side(self) -> int:
        return int(self.preprocessing["input_size"][-1])

    @property
    def fingerprint(self) -> dict:
        return plain_json({"source": self.source, "model": self.name, "weights_sha256": self.weights_sha256,
                           "files_sha256": self.files_sha256, "preprocessing": self.preprocessing,
                           "pooling": self.pooling, "normalisation": NORMALISATION, "feature_dim": self.feature_dim})

    def preprocess(self, image: Image.Image) -> torch.Tensor:
        return self.transform(image.convert("RGB"))  # (3, H, W)

    def pooled(self, pixels: torch.Tensor) -> torch.Tensor:
        """Raw pooled features of a preprocessed batch (B, 3, H, W) -> (B, D), float32."""
        with torch.inference_mode():
            self.forward_passes += 1
            return self._forward(pixels).float()

    def embed_pixels(self, pixels: torch.Tensor) -> torch.Tensor:
        """The image embedding: pooled output, L2-normalised. (B, 3, H, W) -> (B, D)."""
        return F.normalize(self.pooled(pixels), dim=-1)

    # -- what a source implements ---------------------------------------------------------------

    @abstractmethod
    def _forward(self, pixels: torch.Tensor) -> torch.Tensor:
        """(B, 3, H, W) -> (B, D) pooled features, under inference mode (not counted)."""

    @abstractmethod
    def rebuild_record(self) -> dict:
        """How to make the same embedding without align: library, build, weights, rules (image_side.json)."""

    @abstractmethod
    def recipe_keys(self) -> dict:
        """The [vision] recipe keys that load this tower again (api.load rebuilds it from them)."""

    def probe_side(self) -> int:
        """The input side a memory probe runs at (any side for a convolutional timm tower; the native
        side where the model's input shape is fixed)."""
        return self.input_side

    def activation_elements(self, side: int) -> int:
        """Elements alive at the worst step of one image's forward pass at ``side`` px, weights excluded."""
        return peak_op_elements(self._forward, self.model, side)
