"""The text side's exported forms: the adapter (kinds that train one), the merged encoder, ONNX.

Each folder carries the tower's own tokenizer, ``projection.safetensors`` and ``head.json`` (how a
plain encoder's output becomes the embedding), so any of them is usable without align.
"""
from __future__ import annotations

import copy
import warnings
from pathlib import Path

import torch

from .. import artifacts as A
from ..api import load_text_encoder
from ..fileio import write_json_atomic, write_text_atomic
from ..recipe import TextConfig
from ..text import TextKind, TextTower

FORMAT_VERSION = 1
ONNX_OPSET = 17

_TEXT_README = """# Text encoder (merged, self-contained)

Plain transformers; nothing of align is needed. Embedding = mean of `last_hidden_state` over the
tokens where `attention_mask` is 1, times `projection.safetensors["weight"]` transposed
({dim} x {hidden}, no bias), divided by its L2 norm. Captions are truncated at {max_length} tokens.

```python
import torch
from safetensors.torch import load_file
from transformers import AutoModel, AutoTokenizer

folder = "text_encoder"
tokenizer = AutoTokenizer.from_pretrained(folder)
encoder = AutoModel.from_pretrained(folder).eval()
weight = load_file(f"{{folder}}/projection.safetensors")["weight"]            # ({dim}, {hidden})
batch = tokenizer(["a caption"], padding=True, truncation=True, max_length={max_length}, return_tensors="pt")
with torch.no_grad():
    hidden = encoder(input_ids=batch["input_ids"], attention_mask=batch["attention_mask"]).last_hidden_state
mask = batch["attention_mask"].unsqueeze(-1).float()
pooled = (hidden * mask).sum(1) / mask.sum(1).clamp(min=1)
embedding = torch.nn.functional.normalize(pooled @ weight.T, dim=-1)          # (B, {dim})
```

The folder is also a sentence-embedding model (modules.json: this encoder, mean pooling, the projection
as a dense layer without bias or activation, L2 normalisation), so sentence-transformers loads it as is:

```python
from sentence_transformers import SentenceTransformer

embedding = SentenceTransformer("text_encoder").encode(["a caption"])        # (B, {dim}), L2-normalised
```
"""


def text_head(tower: TextTower, embedding_dim: int) -> dict:
    """How a plain encoder's output becomes the embedding: what head.json says."""
    hidden = tower.encoder.config.hidden_size
    return {
        "format_version": FORMAT_VERSION, "kind": tower.kind, "embedding_dim": embedding_dim,
        "hidden_size": hidden, "max_length": tower.max_length, "vocab_size": len(tower.tokenizer),
        "inputs": ["input_ids", "attention_mask"],
        "tokenizer": {"padding": "longest", "truncation": True, "max_length": tower.max_length},
        "pooling": "mean",
        "pooling_rule": "mean of last_hidden_state over the positions where attention_mask is 1",
        "projection": {"file": A.PROJECTION, "tensor": "weight", "shape": [embedding_dim, hidden], "bias": False,
                       "rule": "projected = pooled @ weight.T"},
        "normalisation": "l2",
    }


def _save_head(folder: Path, tower: TextTower, head: dict) -> None:
    from safetensors.torch import save_file

    tokenizer = copy.deepcopy(tower.tokenizer)
    tokenizer.model_max_length = tower.max_length  # plain `truncation=True` then cuts where align does
    tokenizer.save_pretrained(str(folder))  # the tokenizer the tower actually uses, extra terms included
    save_file({"weight": tower.projection.weight.detach().cpu().contiguous()}, str(folder / A.PROJECTION))
    write_json_atomic(folder / A.TEXT_HEAD, head)


def write_adapter(tower: TextTower, kind: TextKind, folder: Path, head: dict, cfg: TextConfig) -> None:
    """The kind's own adapter format (for LoRA: peft's config + safetensors, any trainable token rows) + head."""
    folder.mkdir(parents=True)
    base = kind.save_adapter(tower.encoder, folder, cfg)
    _save_head(folder, tower, {**head, **base})


def write_text_encoder(tower: TextTower, kind: TextKind, folder: Path, head: dict) -> None:
    """The merged encoder: a plain transformers model holding every trained weight."""
    folder.mkdir(parents=True)
    kind.merged_encoder(tower.encoder).save_pretrained(str(folder))
    _save_head(folder, tower, head)
    write_text_atomic(folder / A.TEXT_HEAD_README, _TEXT_README.format(
        dim=head["embedding_dim"], hidden=head["hidden_size"], max_length=head["max_length"]))


def export_onnx(encoder_dir: Path, path: Path) -> None:
    """Trace encoder + pooling + projection + normalisation as one graph (TorchScript exporter)."""
    # eager attention traces to plain matmuls and softmax that every ONNX runtime has
    model, _, _ = load_text_encoder(encoder_dir, attn_implementation="eager")
    sample = model.tokenize(["a short caption", "a somewhat longer caption to trace with"])
    dynamic = {"input_ids": {0: "batch", 1: "sequence"}, "attention_mask": {0: "batch", 1: "sequence"},
               "embedding": {0: "batch"}}
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")  # tracer warnings about Python-side shape checks
        torch.onnx.export(model, (sample["input_ids"], sample["attention_mask"]), str(path),
                          input_names=["input_ids", "attention_mask"], output_names=["embedding"],
                          dynamic_axes=dynamic, opset_version=ONNX_OPSET, do_constant_folding=True, dynamo=False)
