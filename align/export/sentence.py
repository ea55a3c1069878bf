"""``text_encoder/`` is also a sentence-embedding model folder, in the layout the ``sentence-transformers``
library loads with its own loader (``SentenceTransformer("text_encoder")``), nothing of align needed.

The layout is that library's (its file and folder names, not align's): ``modules.json`` lists four
modules run in order, each configured by its own files:

    modules.json                       0 Transformer (this folder), 1 Pooling, 2 Dense, 3 Normalize
    sentence_bert_config.json          max_seq_length (align's max_length), do_lower_case false
    config_sentence_transformers.json  the model type and its similarity (cosine)
    1_Pooling/config.json              mean over the tokens where attention_mask is 1
    2_Dense/config.json                in = hidden size, out = embedding size, no bias, identity activation
    2_Dense/model.safetensors          ``linear.weight``: the projection, bit for bit (D, H)
    3_Normalize/                       L2 normalisation (no configuration)

The Transformer module is the merged encoder and tokenizer already in the folder (so added terms come
along), and the module types are named by their long-standing ``sentence_transformers.models.*``
paths, which every release of the library resolves.
"""
from __future__ import annotations

import json
from pathlib import Path

import torch

from ..fileio import write_json_atomic

MODULES = "modules.json"
TRANSFORMER_CONFIG = "sentence_bert_config.json"
MODEL_CONFIG = "config_sentence_transformers.json"
POOLING_DIR, DENSE_DIR, NORMALIZE_DIR = "1_Pooling", "2_Dense", "3_Normalize"
DENSE_WEIGHTS = "model.safetensors"
IDENTITY = "torch.nn.modules.linear.Identity"


def _module(idx: int, path: str, kind: str) -> dict:
    return {"idx": idx, "name": str(idx), "path": path, "type": f"sentence_transformers.models.{kind}"}


def write_sentence_modules(folder: Path, projection: torch.Tensor, max_length: int) -> None:
    """Add the module files to a merged encoder folder; ``projection`` is the (D, H) weight, no bias."""
    from safetensors.torch import save_file

    dim, hidden = projection.shape
    write_json_atomic(folder / MODULES, [_module(0, "", "Transformer"), _module(1, POOLING_DIR, "Pooling"),
                                         _module(2, DENSE_DIR, "Dense"), _module(3, NORMALIZE_DIR, "Normalize")])
    write_json_atomic(folder / TRANSFORMER_CONFIG, {"max_seq_length": max_length, "do_lower_case": False})
    write_json_atomic(folder / MODEL_CONFIG, {"model_type": "SentenceTransformer", "prompts": {},
                                              "default_prompt_name": None, "similarity_fn_name": "cosine"})
    (folder / POOLING_DIR).mkdir()
    write_json_atomic(folder / POOLING_DIR / "config.json", {
        "word_embedding_dimension": hidden, "pooling_mode_cls_token": False, "pooling_mode_mean_tokens": True,
        "pooling_mode_max_tokens": False, "pooling_mode_mean_sqrt_len_tokens": False,
        "pooling_mode_weightedmean_tokens": False, "pooling_mode_lasttoken": False, "include_prompt": True})
    (folder / DENSE_DIR).mkdir()
    write_json_atomic(folder / DENSE_DIR / "config.json", {"in_features": hidden, "out_features": dim, "bias": False,
                                                           "activation_function": IDENTITY})
    save_file({"linear.weight": projection.detach().cpu().float().contiguous()}, str(folder / DENSE_DIR / DENSE_WEIGHTS))
    (folder / NORMALIZE_DIR).mkdir()


def read_sentence_modules(folder: Path) -> dict:
    """What the module files say, read back as plain JSON and safetensors (the check without the library)."""
    from safetensors.torch import load_file

    modules = json.loads((folder / MODULES).read_text(encoding="utf-8"))
    pooling = json.loads((folder / POOLING_DIR / "config.json").read_text(encoding="utf-8"))
    dense = json.loads((folder / DENSE_DIR / "config.json").read_text(encoding="utf-8"))
    return {"types": [m["type"].rsplit(".", 1)[-1] for m in modules], "paths": [m["path"] for m in modules],
            "mean_pooling": bool(pooling.get("pooling_mode_mean_tokens")), "dense": dense,
            "weight": load_file(str(folder / DENSE_DIR / DENSE_WEIGHTS))["linear.weight"],
            "max_seq_length": json.loads((folder / TRANSFORMER_CONFIG).read_text(encoding="utf-8"))["max_seq_length"]}
