"""Test recipes: one small base, each test states only what it changes.

``tiny_toml(kind, **changes)`` gives recipe TOML text (what a service job posts); ``tiny_recipe``
the parsed Recipe. A change names its key path with double underscores where the TOML has dots:
``tiny_recipe(shards, "lora", train__steps=6, text__lora_rank=4, text__scratch__width=64)``.
"""
from __future__ import annotations

import copy
import json
import math
import re

from align.recipe import Recipe, recipe_from_toml

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

_BARE_KEY = re.compile(r"[A-Za-z0-9_-]+")


def _toml_key(key: str) -> str:
    return key if _BARE_KEY.fullmatch(key) else _toml_string(key)


def _toml_string(text: str) -> str:
    # JSON's escapes are all TOML escapes; DEL is the one control character JSON leaves raw
    return json.dumps(text, ensure_ascii=False).replace("\x7f", "\\u007f")


def _toml_value(value) -> str:
    if isinstance(value, bool):
        return "true" if value else "false"
    if isinstance(value, int):
        return str(value)
    if isinstance(value, float):
        if math.isnan(value):
            return "nan"
        return ("inf" if value > 0 else "-inf") if math.isinf(value) else repr(value)
    if isinstance(value, str):
        return _toml_string(value)
    if isinstance(value, (list, tuple)):
        return "[" + ", ".join(_toml_value(v) for v in value) + "]"
    if isinstance(value, dict):  # only inside a list; a dict under a table becomes a table of its own
        return "{" + ", ".join(f"{_toml_key(k)} = {_toml_value(v)}" for k, v in value.items()) + "}"
    raise TypeError(f"cannot write {value!r} as TOML")


def _write_table(lines: list[str], path: list[str], node: dict) -> None:
    """A table's plain keys, then each dict under it as a table of its own: a header ends its
    parent's keys, so sub-tables come last. ``[eval.field_prompts]`` with ``glaze = [...]`` under it
    reads back as the same dict as an inline ``field_prompts = {glaze = [...]}``."""
    if path:
        lines.append("[" + ".".join(_toml_key(p) for p in path) + "]")
    lines += [f"{_toml_key(k)} = {_toml_value(v)}" for k, v in node.items() if not isinstance(v, dict)]
    for key, value in node.items():
        if isinstance(value, dict):
            _write_table(lines, [*path, key], value)


def tiny_toml(kind: str = "lora", name: str = "tiny", **changes) -> str:
    data: dict = {"name": name, **copy.deepcopy(BASE)}
    data["text"]["kind"] = kind
    if kind == "scratch":
        data["text"] |= copy.deepcopy(SCRATCH)
    for dotted, value in changes.items():
        *path, key = dotted.split("__")
        node = data
        for part in path:
            node = node.setdefault(part, {})
        node[key] = value
    lines: list[str] = []
    _write_table(lines, [], data)
    return "\n".join(lines) + "\n"


def tiny_recipe(shards=None, kind: str = "lora", name: str = "tiny", **changes) -> Recipe:
    overrides = [f"data.shards={json.dumps(str(shards))}"] if shards is not None else []
    return recipe_from_toml(tiny_toml(kind, name, **changes), overrides)
