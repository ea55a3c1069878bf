"""Test recipes: one small base, each test states only what it changes.

``tiny_toml(kind, **changes)`` gives recipe TOML text (what a service job posts); ``tiny_recipe``
the parsed Recipe. Changes are dotted keys with underscores for dots where a Python name is
needed: ``tiny_recipe(shards, "lora", train__steps=6, text__lora_rank=4)``.
"""
from __future__ import annotations

import json

from align.recipe import Recipe, dump_recipe, recipe_from_toml

# Small enough that a test trains in seconds on a busy 2-core machine. threads = 1: a tiny model
# gains nothing from a second thread, and on a loaded box an OpenMP team waits at every barrier for
# its descheduled twin (measured: 0.22 s per step with one thread, 1.6 s with two).
BASE = {
    "vision": {"image_size": 32},
    "text": {"max_length": 12},
    "train": {"steps": 6, "batch_size": 16, "lr": 2e-3, "warmup_steps": 1, "checkpoint_every": 0,
              "log_every": 1, "threads": 1},
}
# a scratch tower this size trains its tokenizer and 3 steps in about a second
SCRATCH = {"scratch": {"width": 32, "layers": 1, "attention_heads": 2, "vocabulary_size": 200}}


def _toml_value(value) -> str:
    if isinstance(value, bool):
        return "true" if value else "false"
    if isinstance(value, dict):
        return "{" + ", ".join(f"{k} = {_toml_value(v)}" for k, v in value.items()) + "}"
    return json.dumps(value)


def _tables(data: dict) -> dict:
    """Nested dicts as {table path: {key: value}} with scalar keys only."""
    out: dict = {}

    def walk(node: dict, path: str) -> None:
        for key, value in node.items():
            if isinstance(value, dict) and not key.endswith("prompts"):
                walk(value, f"{path}.{key}" if path else key)
            else:
                out.setdefault(path, {})[key] = value
    walk(data, "")
    return out


def tiny_toml(kind: str = "lora", name: str = "tiny", **changes) -> str:
    data: dict = json.loads(json.dumps(BASE))
    data["text"]["kind"] = kind
    if kind == "scratch":
        data["text"] |= json.loads(json.dumps(SCRATCH))
    for dotted, value in changes.items():
        *path, key = dotted.split("__")
        node = data
        for part in path:
            node = node.setdefault(part, {})
        node[key] = value
    lines = [f"name = {json.dumps(name)}"]
    for table, values in _tables(data).items():
        if table:
            lines.append(f"[{table}]")
        lines += [f"{k} = {_toml_value(v)}" for k, v in values.items()]
    return "\n".join(lines) + "\n"


def tiny_recipe(shards=None, kind: str = "lora", name: str = "tiny", **changes) -> Recipe:
    overrides = [f"data.shards={json.dumps(str(shards))}"] if shards is not None else []
    return recipe_from_toml(tiny_toml(kind, name, **changes), overrides)


def as_toml(recipe: Recipe) -> str:
    return dump_recipe(recipe)
