"""The recipe: one typed object that says everything a run does.

A recipe is a TOML file with the sections below. Every field has a default and a one-line
documentation string (the ``doc`` metadata), unknown keys are rejected by name with the closest
valid key as a hint, and values are checked before any work starts. ``--set section.key=value``
overrides are parsed as TOML values ("3", "1e-4", "true", "[1, 5]", or a bare string).
"""
from __future__ import annotations

import dataclasses
import difflib
import math
import tomllib
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any, get_args, get_origin, get_type_hints

from .errors import RecipeError
from .recipe_vision import PreprocessConfig, VisionConfig, validate_vision  # noqa: F401 - PreprocessConfig re-exported
from .recipe_vision import doc_field as _f


# Larger inputs buy nothing a tower was trained for, and cost memory with the square of the side.
MAX_IMAGE_SIZE = 1024


@dataclass
class ScratchConfig:
    """The size of a tower trained from nothing (``text.kind = "scratch"``); lora and full ignore it."""

    width: int = _f(256, "hidden size: the length of every token vector inside the encoder")
    layers: int = _f(4, "transformer layers stacked in the encoder")
    attention_heads: int = _f(4, "attention heads per layer (width must divide by it)")
    vocabulary_size: int = _f(2000, "WordPiece vocabulary learned from the training captions")
    dropout: float = _f(0.1, "dropout inside the encoder")


@dataclass
class TextConfig:
    kind: str = _f("lora", "text tower: lora (adapter on a pretrained encoder), full (fine-tune it all), "
                           "scratch (a small encoder trained from nothing)", ("lora", "full", "scratch"))
    model: str = _f("", "local directory of a pretrained transformers encoder; empty = the offline "
                        "MiniLM-L6 package (ignored by kind=scratch)")
    max_length: int = _f(64, "captions are truncated to this many tokens")
    lora_rank: int = _f(8, "LoRA rank r")
    lora_alpha: float = _f(16.0, "LoRA scaling alpha (update is alpha/r * B A)")
    lora_dropout: float = _f(0.0, "dropout on the LoRA branch")
    lora_targets: list = _f(["query", "value"], "module names that get LoRA adapters")
    new_tokens: Any = _f([], "domain terms added to the tokenizer: a list of terms, or \"auto\" to mine "
                             "the captions for terms the tokenizer splits into 3+ pieces")
    new_tokens_cap: int = _f(64, "at most this many terms are added when new_tokens = \"auto\"")
    scratch: ScratchConfig = field(default_factory=ScratchConfig,
                                   metadata={"doc": "the scratch tower's size (kind = \"scratch\" only)"})


@dataclass
class DataConfig:
    shards: str = _f("", "folder written by `align pack` (holds manifest.json and the tar shards)")
    train_split: str = _f("train", "split used for training")
    eval_split: str = _f("val", "split used by evaluate")


@dataclass
class LossConfig:
    kind: str = _f("softmax", "softmax = symmetric InfoNCE; sigmoid = pairwise sigmoid loss",
                   ("softmax", "sigmoid"))
    init_temperature: float = _f(0.07, "softmax: initial temperature (logit scale = 1/temperature)")
    max_logit_scale: float = _f(100.0, "softmax: the logit scale is clamped at this value")
    learn_temperature: bool = _f(True, "learn the temperature (and the sigmoid bias) with the tower")
    init_sigmoid_scale: float = _f(10.0, "sigmoid: initial scale t = exp(t'), t' learned")
    init_sigmoid_bias: float = _f(-10.0, "sigmoid: initial bias b")
    positives: str = _f("caption+labels", "which in-batch pairs count as positives of each other: "
                        "caption (same caption text), caption+labels (same text or same labels), pair (only the pair)",
                        ("pair", "caption", "caption+labels"))
    block_size: int = _f(0, "compute the loss in blocks of this many rows so B x B is never held; 0 = all at once")


@dataclass
class TrainConfig:
    steps: int = _f(200, "optimizer steps")
    batch_size: int = _f(64, "global batch (pairs per step, summed over processes)")
    chunk_size: int = _f(0, "encode the batch in chunks of this many captions (GradCache; exact "
                            "gradient in bounded memory); 0 = whole batch at once")
    lr: float = _f(5e-4, "peak learning rate of the text tower")
    weight_decay: float = _f(0.01, "AdamW weight decay")
    warmup_steps: int = _f(20, "linear warm-up steps before the cosine decay")
    grad_clip: float = _f(1.0, "clip the global gradient norm at this value; 0 = off")
    seed: int = _f(0, "seed for initialisation, sampling and dropout")
    precision: str = _f("auto", "text-step precision: bf16 autocast (weights, optimizer and loss stay fp32), "
                                "fp32, or auto = bf16 where the CPU or GPU multiplies bf16 natively, else fp32; "
                                "the run records the one it used", ("auto", "fp32", "bf16"))
    threads: int = _f(0, "torch CPU threads; 0 = one per core")
    log_every: int = _f(10, "write a metrics.jsonl line every N steps")
    checkpoint_every: int = _f(100, "checkpoint every N steps (and always at the end); 0 = only at the end")
    keep_checkpoints: int = _f(2, "keep this many newest checkpoints")
    length_buckets: bool = _f(True, "group captions of similar token length inside each batch's chunks")
    eval_every: int = _f(0, "every N steps (and at the last), recall on a fixed subset of data.eval_split from "
                            "cached features, logged to metrics.jsonl as val/...; 0 = off")
    eval_samples: int = _f(512, "validation pairs drawn (seeded by train.seed) for eval_every; fewer if the split "
                                "is smaller")
    keep_best: str = _f("", "keep the checkpoint of the best validation step by this metric (a recall key such as "
                            "text_to_image_recall@1, or mean_recall); evaluate, export and the service use it. "
                            "Empty = the newest")


@dataclass
class EvalConfig:
    recall_ks: list = _f([1, 5, 10], "K values for recall@K")
    prompts: list = _f(["a photo of {}.", "an image of {}."], "zero-shot prompt templates ({} = class name)")
    field_prompts: dict = _f({}, "per label field templates, e.g. {glaze = [\"a {} glazed tile\"]}; "
                                 "fields not listed use prompts")
    probe_c: float = _f(1.0, "inverse regularisation strength of the linear probe (logistic regression)")
    probe_max_iter: int = _f(1000, "linear probe solver iterations")
    probe_rows: int = _f(20000, "the linear probe fits on at most this many training rows: a sample seeded by "
                                "train.seed that keeps each class's share (0 = every row)")
    recall_method: str = _f("exact", "how recall ranks the gallery: exact (every rank, scored in blocks) or faiss "
                                     "(a flat inner-product index; ranks past the largest K only read as that deep)",
                            ("exact", "faiss"))
    block_rows: int = _f(4096, "rows per side of one block of scores (a 4096 x 4096 block is 64 MiB); images "
                               "are classified this many at a time too")


@dataclass
class Recipe:
    name: str = _f("run", "a short name for the run")
    vision: VisionConfig = field(default_factory=VisionConfig)
    text: TextConfig = field(default_factory=TextConfig)
    data: DataConfig = field(default_factory=DataConfig)
    loss: LossConfig = field(default_factory=LossConfig)
    train: TrainConfig = field(default_factory=TrainConfig)
    eval: EvalConfig = field(default_factory=EvalConfig)

    def to_dict(self) -> dict:
        return dataclasses.asdict(self)


SECTIONS = {"vision": VisionConfig, "text": TextConfig, "data": DataConfig,
            "loss": LossConfig, "train": TrainConfig, "eval": EvalConfig}

# keys that moved: an old recipe is told the new name instead of "unknown key"
MOVED_KEYS = {"text.width": "text.scratch.width", "text.depth": "text.scratch.layers",
              "text.heads": "text.scratch.attention_heads", "text.vocab_size": "text.scratch.vocabulary_size",
              "text.dropout": "text.scratch.dropout"}


def _suggest(name: str, options) -> str:
    close = difflib.get_close_matches(name, list(options), n=1)
    return f"did you mean '{close[0]}'?" if close else "valid keys: " + ", ".join(sorted(options))


def _coerce(where: str, value: Any, kind: type, default: Any) -> Any:
    """Check one value against its field's type; ints are accepted where floats are expected."""
    if where == "text.new_tokens":
        if value == "auto" or (isinstance(value, list) and all(isinstance(v, str) for v in value)):
            return value
        raise RecipeError(f"{where} must be \"auto\" or a list of terms, got {value!r}")
    if kind is bool:
        if isinstance(value, bool):
            return value
    elif kind is int:
        if isinstance(value, int) and not isinstance(value, bool):
            return value
    elif kind is float:
        if isinstance(value, (int, float)) and not isinstance(value, bool):
            if not math.isfinite(value):  # TOML spells nan and inf; no hyper-parameter means them
                raise RecipeError(f"{where} must be a finite number, got {value!r}", f"for example {where}={default!r}")
            return float(value)
    elif kind is str:
        if isinstance(value, str):
            return value
    elif kind is list or get_origin(kind) is list:
        if isinstance(value, list):
            return value
    elif kind is dict or get_origin(kind) is dict:
        if isinstance(value, dict):
            return value
    else:
        return value
    raise RecipeError(f"{where} must be {kind.__name__}, got {value!r} ({type(value).__name__})",
                      f"for example {where}={default!r}")


def _build(cls, data: dict, prefix: str):
    hints = get_type_hints(cls)
    known = {f.name: f for f in dataclasses.fields(cls)}
    kwargs = {}
    for key, value in data.items():
        where = f"{prefix}{key}"
        if where in MOVED_KEYS:
            new = MOVED_KEYS[where]
            raise RecipeError(f"recipe key '{where}' is now '{new}'",
                              f"write it as {new.rsplit('.', 1)[1]} = {value!r} under [{new.rsplit('.', 1)[0]}]")
        if key not in known:
            raise RecipeError(f"unknown recipe key '{where}'", _suggest(key, known))
        kind = hints[key]
        if dataclasses.is_dataclass(kind):
            if not isinstance(value, dict):
                raise RecipeError(f"[{where}] must be a table (section), got {value!r}")
            kwargs[key] = _build(kind, value, f"{where}.")
            continue
        default = known[key].default if known[key].default is not dataclasses.MISSING else known[key].default_factory()
        value = _coerce(where, value, kind, default)
        choices = known[key].metadata.get("choices")
        if choices and value not in choices:
            raise RecipeError(f"{where} = {value!r} is not one of {', '.join(map(repr, choices))}")
        kwargs[key] = value
    return cls(**kwargs)


def _parse_override(text: str) -> tuple[list[str], Any]:
    if "=" not in text:
        raise RecipeError(f"override '{text}' has no '='", "write --set section.key=value, e.g. --set train.steps=50")
    path, raw = text.split("=", 1)
    parts = path.strip().split(".")
    try:
        value = tomllib.loads(f"v = {raw}")["v"]
    except tomllib.TOMLDecodeError:
        value = raw  # a bare word such as a path: keep it as a string
    return parts, value


def apply_overrides(data: dict, overrides: list[str]) -> dict:
    for text in overrides or []:
        parts, value = _parse_override(text)
        node = data
        for part in parts[:-1]:
            node = node.setdefault(part, {})
            if not isinstance(node, dict):
                raise RecipeError(f"override '{text}': '{part}' is not a section")
        node[parts[-1]] = value
    return data


def _validate(recipe: Recipe) -> None:
    """Every value a later phase would refuse, refused here with its key and a fix, before any work."""
    t, sc, tr, v, lo, ev = recipe.text, recipe.text.scratch, recipe.train, recipe.vision, recipe.loss, recipe.eval
    positive = {"train.steps": tr.steps, "train.batch_size": tr.batch_size, "text.max_length": t.max_length,
                "vision.batch_size": v.batch_size, "vision.views": v.views, "text.lora_rank": t.lora_rank,
                "text.scratch.width": sc.width, "text.scratch.layers": sc.layers,
                "text.scratch.attention_heads": sc.attention_heads, "text.scratch.vocabulary_size": sc.vocabulary_size}
    for where, value in positive.items():
        if value < 1:
            raise RecipeError(f"{where} must be at least 1, got {value}", f"for example {where}=1")
    if tr.batch_size < 2:
        raise RecipeError(f"train.batch_size must be at least 2, got {tr.batch_size}",
                          "a contrastive loss scores each pair against the others in its batch; for example 64")
    _validate_counts(recipe)
    if tr.lr <= 0:
        raise RecipeError(f"train.lr must be positive, got {tr.lr}", "for example train.lr=5e-4")
    if tr.chunk_size < 0 or tr.chunk_size > tr.batch_size:
        raise RecipeError(f"train.chunk_size must be between 0 and train.batch_size ({tr.batch_size}), got {tr.chunk_size}",
                          "0 encodes the whole batch at once")
    if t.kind == "scratch" and sc.width % sc.attention_heads:
        raise RecipeError(f"text.scratch.width ({sc.width}) must be divisible by text.scratch.attention_heads "
                          f"({sc.attention_heads})", "each head gets width / attention_heads of every token vector")
    if t.kind == "scratch" and not 0 <= sc.dropout < 1:
        raise RecipeError(f"text.scratch.dropout must be in [0, 1), got {sc.dropout}", "for example 0.1")
    _validate_loss(lo)
    validate_vision(v)
    if v.image_size and not 32 <= v.image_size <= MAX_IMAGE_SIZE:
        raise RecipeError(f"vision.image_size must be 0 (native) or between 32 and {MAX_IMAGE_SIZE}, got {v.image_size}",
                          "the tower's native size (0) is what its weights were trained at; 160 or 224 are usual")
    _validate_eval(ev)
    _validate_validation(tr, ev)


def validation_metric_names(recall_ks: list[int]) -> list[str]:
    """What train.keep_best may name: each recall the validation logs, and their mean."""
    return [f"{d}_recall@{k}" for d in ("text_to_image", "image_to_text") for k in recall_ks] + ["mean_recall"]


def _validate_validation(tr: TrainConfig, ev: EvalConfig) -> None:
    if tr.eval_every < 0:
        raise RecipeError(f"train.eval_every must be 0 (off) or a number of steps, got {tr.eval_every}",
                          "for example train.eval_every=50")
    if tr.eval_samples < 2:
        raise RecipeError(f"train.eval_samples must be at least 2, got {tr.eval_samples}",
                          "recall ranks each caption among the drawn images; for example 512")
    if tr.keep_best:
        names = validation_metric_names(ev.recall_ks)
        if tr.keep_best not in names:
            raise RecipeError(f"train.keep_best = {tr.keep_best!r} is not a validation metric",
                              f"one of: {', '.join(names)}; or \"\" to keep the newest checkpoints")
        if not tr.eval_every:
            raise RecipeError("train.keep_best needs validation during training, but train.eval_every is 0",
                              "set train.eval_every, e.g. train.eval_every=50")


def _validate_counts(recipe: Recipe) -> None:
    """Counts and rates with a lower bound (the types are already checked)."""
    t, tr, v, ev = recipe.text, recipe.train, recipe.vision, recipe.eval
    at_least = {"train.log_every": (tr.log_every, 1, "10"), "train.keep_checkpoints": (tr.keep_checkpoints, 1, "2"),
                "eval.probe_max_iter": (ev.probe_max_iter, 1, "1000"), "eval.probe_rows": (ev.probe_rows, 0, "20000"),
                "eval.block_rows": (ev.block_rows, 1, "4096"), "train.threads": (tr.threads, 0, "0 (one per core)"),
                "train.warmup_steps": (tr.warmup_steps, 0, "20"), "train.checkpoint_every": (tr.checkpoint_every, 0, "100"),
                "vision.workers": (v.workers, 0, "0"), "text.new_tokens_cap": (t.new_tokens_cap, 0, "64"),
                "train.grad_clip": (tr.grad_clip, 0, "1.0 (0 = off)"), "train.weight_decay": (tr.weight_decay, 0, "0.01")}
    for where, (value, low, example) in at_least.items():
        if value < low:
            raise RecipeError(f"{where} must be at least {low}, got {value}", f"for example {where}={example}")
    if not t.lora_alpha > 0 or not 0 <= t.lora_dropout < 1:
        raise RecipeError(f"text.lora_alpha must be positive and text.lora_dropout in [0, 1), got "
                          f"{t.lora_alpha} and {t.lora_dropout}", "for example lora_alpha=16.0, lora_dropout=0.0")
    if not ev.probe_c > 0:
        raise RecipeError(f"eval.probe_c must be positive, got {ev.probe_c}", "for example eval.probe_c=1.0")


def _validate_loss(lo: LossConfig) -> None:
    if not 0 < lo.init_temperature < 1:
        raise RecipeError(f"loss.init_temperature must be in (0, 1), got {lo.init_temperature}", "for example 0.07")
    if not lo.max_logit_scale > 0:
        raise RecipeError(f"loss.max_logit_scale must be positive, got {lo.max_logit_scale}", "for example 100")
    if not lo.init_sigmoid_scale > 0:
        raise RecipeError(f"loss.init_sigmoid_scale must be positive, got {lo.init_sigmoid_scale}", "for example 10")
    if lo.block_size < 0:
        raise RecipeError(f"loss.block_size must be 0 (all at once) or a positive number of rows, got {lo.block_size}",
                          "0 computes the loss in one piece")


def _validate_eval(ev: EvalConfig) -> None:
    ks = ev.recall_ks
    if not ks or any(isinstance(k, bool) or not isinstance(k, int) or k < 1 for k in ks):
        raise RecipeError(f"eval.recall_ks must be a list of integers of at least 1, got {ks!r}",
                          "for example eval.recall_ks=[1, 5, 10]")
    templates = {"eval.prompts": ev.prompts, **{f"eval.field_prompts.{k}": v for k, v in ev.field_prompts.items()}}
    for where, listed in templates.items():
        if not isinstance(listed, list) or not listed or not all(isinstance(p, str) for p in listed):
            raise RecipeError(f"{where} must be a non-empty list of prompt templates, got {listed!r}",
                              '{} stands for the class name, e.g. ["a photo of {}."]')
        for tpl in listed:
            if "{}" not in tpl:
                raise RecipeError(f"prompt template {tpl!r} in {where} has no '{{}}' for the class name",
                                  'write templates like "a {} tile"')


def recipe_from_dict(data: dict) -> Recipe:
    recipe = _build(Recipe, data, "")
    _validate(recipe)
    return recipe


def load_recipe(path: str | Path | None, overrides: list[str] | None = None) -> Recipe:
    """Read a TOML recipe (or start from defaults when path is None) and apply overrides."""
    data: dict = {}
    if path is not None:
        path = Path(path)
        if not path.is_file():
            raise RecipeError(f"no recipe at {path}", "pass a TOML file, e.g. recipes/lora-cpu.toml")
        try:
            data = tomllib.loads(path.read_text(encoding="utf-8"))
        except tomllib.TOMLDecodeError as exc:
            raise RecipeError(f"{path} is not valid TOML: {exc}") from None
    return recipe_from_dict(apply_overrides(data, overrides or []))


def recipe_from_toml(text: str, overrides: list[str] | None = None) -> Recipe:
    try:
        data = tomllib.loads(text)
    except tomllib.TOMLDecodeError as exc:
        raise RecipeError(f"recipe is not valid TOML: {exc}") from None
    return recipe_from_dict(apply_overrides(data, overrides or []))


def _toml_value(value: Any) -> str:
    if isinstance(value, bool):
        return "true" if value else "false"
    if isinstance(value, (int, float)):
        return repr(value)
    if isinstance(value, str):
        return '"' + value.replace("\\", "\\\\").replace('"', '\\"') + '"'
    if isinstance(value, list):
        return "[" + ", ".join(_toml_value(v) for v in value) + "]"
    if isinstance(value, dict):
        return "{" + ", ".join(f"{k} = {_toml_value(v)}" for k, v in value.items()) + "}"
    raise TypeError(f"cannot write {value!r} as TOML")


def _fields(cls) -> tuple[list, list]:
    """(value fields, nested tables) of a section's dataclass, in declaration order."""
    hints = get_type_hints(cls)
    values = [f for f in dataclasses.fields(cls) if not dataclasses.is_dataclass(hints[f.name])]
    tables = [(f, hints[f.name]) for f in dataclasses.fields(cls) if dataclasses.is_dataclass(hints[f.name])]
    return values, tables


def _dump_table(lines: list[str], name: str, cls, obj) -> None:
    values, tables = _fields(cls)
    lines += ["", f"[{name}]"]
    for f in values:
        lines.append(f"# {f.metadata['doc']}")
        lines.append(f"{f.name} = {_toml_value(getattr(obj, f.name))}")
    for f, kind in tables:  # a nested table's header ends its parent's keys, so tables come last
        lines += ["", f"# {f.metadata['doc']}"]
        _dump_table(lines, f"{name}.{f.name}", kind, getattr(obj, f.name))


def dump_recipe(recipe: Recipe) -> str:
    """The resolved recipe as TOML, every field written out, each with its documentation."""
    lines = [f"name = {_toml_value(recipe.name)}"]
    for section, cls in SECTIONS.items():
        _dump_table(lines, section, cls, getattr(recipe, section))
    return "\n".join(lines) + "\n"


def _describe_table(rows: list, name: str, cls) -> None:
    values, tables = _fields(cls)
    for f in values:
        default = f.default if f.default is not dataclasses.MISSING else f.default_factory()
        rows.append((f"{name}.{f.name}", _toml_value(default), f.metadata["doc"]))
    for f, kind in tables:
        _describe_table(rows, f"{name}.{f.name}", kind)


def describe_fields() -> list[tuple[str, str, str]]:
    """(key, default, doc) for every recipe field: the recipe reference in the README comes from this."""
    rows = [("name", _toml_value(Recipe().name), "a short name for the run")]
    for section, cls in SECTIONS.items():
        _describe_table(rows, section, cls)
    return rows
