"""What makes two image towers the same, and the hashes that pin a tower's numbers.

A fingerprint holds, for every source: ``source`` (timm, transformers, onnx, program, or stored
vectors), ``model`` (the architecture, or the model id declared for stored vectors),
``weights_sha256``, ``files_sha256`` (the files the computation was read from; null for timm, whose
architecture is named by ``model``), ``preprocessing``, ``pooling``, ``normalisation`` and
``feature_dim``. Equal on all of them, two towers give equal embeddings.
"""
from __future__ import annotations

import hashlib
import json
from pathlib import Path

import torch

NORMALISATION = "l2"

# What makes two image towers the same: equal on every one of these, their embeddings are equal.
TOWER_IDENTITY = ("source", "model", "weights_sha256", "files_sha256", "preprocessing", "pooling", "normalisation",
                  "feature_dim")
# fingerprints written before a field existed lack it; this is what they meant
_ABSENT_MEANS = {"source": "timm", "files_sha256": None}


def plain_json(value):
    """``value`` as it reads back from JSON (tuples become lists): fingerprints compare equal either way."""
    return json.loads(json.dumps(value))


def tower_differences(expected: dict, actual: dict) -> list[str]:
    """The one answer to "is this the same image tower?": the identity fields of two fingerprints
    that differ, each as 'field: expected -> actual' (empty when they are the same tower)."""
    out = []
    for key in TOWER_IDENTITY:
        want = plain_json(expected.get(key, _ABSENT_MEANS.get(key)))
        have = plain_json(actual.get(key, _ABSENT_MEANS.get(key)))
        if want != have:
            hashed = key.endswith("sha256")
            short = (lambda v: v[:12] + "…" if v else v) if hashed else (lambda v: v)
            out.append(f"{key}: {short(want)} -> {short(have)}")
    return out


def weights_sha256(model) -> str:
    """sha256 over every parameter and buffer (name, dtype, shape, bytes), in state-dict order.

    A model that is no torch module (an onnxruntime session) answers with its own
    ``weights_sha256()``: the hash of the files it runs."""
    if not isinstance(model, torch.nn.Module) and callable(getattr(model, "weights_sha256", None)):
        return model.weights_sha256()
    digest = hashlib.sha256()
    for name, tensor in model.state_dict().items():
        t = tensor.detach().cpu().contiguous().reshape(-1)
        digest.update(f"{name}|{t.dtype}|{tuple(t.shape)}|".encode())
        digest.update(t.view(torch.uint8).numpy().tobytes() if t.numel() else b"")
    return digest.hexdigest()


def file_sha256(path: Path) -> str:
    """The plain sha256 of one file's bytes (what ``sha256sum`` prints)."""
    digest = hashlib.sha256()
    with open(path, "rb") as fh:
        for block in iter(lambda: fh.read(1 << 20), b""):
            digest.update(block)
    return digest.hexdigest()


def files_sha256(paths: list[Path]) -> str:
    """sha256 over the files in the given order: for each, its byte length as text and '|', then its bytes.

    File names are left out on purpose: a model copied or renamed is still the same model."""
    digest = hashlib.sha256()
    for path in paths:
        digest.update(f"{Path(path).stat().st_size}|".encode())
        with open(path, "rb") as fh:
            for block in iter(lambda: fh.read(1 << 20), b""):
                digest.update(block)
    return digest.hexdigest()


FILES_RULE = ("sha256 over the files in order (for each: its byte length as decimal text, '|', then its bytes); "
              "file names are not part of it")
WEIGHTS_RULE = ("sha256 over model.state_dict() in order: for each tensor the UTF-8 text 'name|dtype|shape|' then "
                "its raw bytes")
