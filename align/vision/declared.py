"""The preprocessing of a tower whose file does not carry it (onnx, program): a sidecar JSON and/or
the recipe's ``[vision.preprocess]`` keys, checked against the input shape the model declares.

The sidecar uses timm's data-config keys, so a timm model exported to another format keeps its exact
preprocessing:

    {"input_size": [3, 224, 224], "interpolation": "bicubic", "mean": [0.485, 0.456, 0.406],
     "std": [0.229, 0.224, 0.225], "crop_pct": 0.875, "crop_mode": "center"}

Recipe keys override the sidecar key by key. mean and std are required; the resize defaults to
bilinear, the crop to none (crop_pct 1.0, centre). The input side comes from the model where its
shape is fixed; the sidecar or ``vision.image_size`` must then agree with it.
"""
from __future__ import annotations

import json
from pathlib import Path

from ..errors import AlignError
from ..recipe import VisionConfig

PREPROCESSING_RULE = ("timm.data.create_transform(**preprocessing, is_training=False) on the image converted to RGB "
                      "(EXIF orientation applied)")
SIDECAR_KEYS = ("input_size", "interpolation", "mean", "std", "crop_pct", "crop_mode")
DEFAULTS = {"interpolation": "bilinear", "crop_pct": 1.0, "crop_mode": "center"}


def eval_transform(preprocessing: dict):
    """timm's evaluation transform for a timm-style preprocessing dict: resize, crop, scale, normalise."""
    import timm.data

    return timm.data.create_transform(**preprocessing, is_training=False)


def sidecar_path(cfg: VisionConfig) -> Path | None:
    """The sidecar a recipe names, else MODEL.preprocessing.json beside the model when it exists."""
    if cfg.preprocess.file:
        return Path(cfg.preprocess.file)
    beside = Path(cfg.model_path).with_suffix(".preprocessing.json")
    return beside if beside.is_file() else None


def write_sidecar(path: str | Path, preprocessing: dict) -> Path:
    """Write a tower's preprocessing as a sidecar (e.g. a timm tower's, beside its ONNX export)."""
    data = {k: list(v) if isinstance(v, tuple) else v for k, v in preprocessing.items() if k in SIDECAR_KEYS}
    Path(path).write_text(json.dumps(data, indent=2) + "\n", encoding="utf-8")
    return Path(path)


def _read_sidecar(path: Path) -> dict:
    hint = "write it as JSON with " + ", ".join(SIDECAR_KEYS) + " (timm's data-config keys)"
    if not path.is_file():
        raise AlignError(f"no preprocessing sidecar at {path}", "set vision.preprocess.file to an existing file, "
                         "or give the [vision.preprocess] keys in the recipe")
    try:
        data = json.loads(path.read_text(encoding="utf-8"))
    except (UnicodeDecodeError, json.JSONDecodeError) as exc:
        raise AlignError(f"preprocessing sidecar {path} is not valid JSON ({exc})", hint) from None
    if not isinstance(data, dict):
        raise AlignError(f"preprocessing sidecar {path} must hold a JSON object", hint)
    unknown = sorted(set(data) - set(SIDECAR_KEYS))
    if unknown:
        raise AlignError(f"preprocessing sidecar {path} has unknown keys {unknown}", "valid keys: " + ", ".join(SIDECAR_KEYS))
    return data


def _side_of(input_size, where: str) -> tuple[int, int]:
    if (not isinstance(input_size, list) or len(input_size) != 3 or input_size[0] != 3
            or not all(isinstance(x, int) and x > 0 for x in input_size)):
        raise AlignError(f"{where}: input_size must be [3, height, width], got {input_size!r}", "e.g. [3, 224, 224]")
    return input_size[1], input_size[2]


def declared_preprocessing(cfg: VisionConfig, declared: tuple[int, int] | None) -> dict:
    """The timm-style preprocessing dict (input_size, interpolation, mean, std, crop_pct, crop_mode).

    ``declared`` is the (height, width) the model's input shape fixes, or None where it is free."""
    path = sidecar_path(cfg)
    data = _read_sidecar(path) if path else {}
    where = str(path) if path else "[vision.preprocess]"
    pre = cfg.preprocess
    for key, value in (("mean", pre.mean), ("std", pre.std), ("interpolation", pre.interpolation),
                       ("crop_pct", pre.crop_pct), ("crop_mode", pre.crop_mode)):
        if value:
            data[key] = value
    missing = [k for k in ("mean", "std") if k not in data]
    if missing:
        raise AlignError(f"no {' or '.join(missing)} for the {cfg.source} tower {cfg.model_path}: the file does not "
                         "carry its preprocessing",
                         f"write {Path(cfg.model_path).with_suffix('.preprocessing.json')} (input_size, mean, std, "
                         "interpolation, crop_pct, crop_mode) or set [vision.preprocess] mean and std")
    side = _input_side(cfg, data, declared, where)
    resolved = {"input_size": (3, side[0], side[1]), **DEFAULTS,
                **{k: data[k] for k in ("interpolation", "crop_pct", "crop_mode") if k in data},
                "mean": tuple(float(x) for x in data["mean"]), "std": tuple(float(x) for x in data["std"])}
    return resolved


def _input_side(cfg: VisionConfig, data: dict, declared: tuple[int, int] | None, where: str) -> tuple[int, int]:
    """The input (height, width): the model's fixed shape, checked against the sidecar and the recipe."""
    claimed = _side_of(data["input_size"], where) if "input_size" in data else None
    if declared and claimed and claimed != declared:
        raise AlignError(f"{where} says input_size {list(claimed)}, but {cfg.model_path} declares a "
                         f"{declared[0]}x{declared[1]} input",
                         "fix the sidecar's input_size: the model only accepts the shape it was exported with")
    side = declared or claimed or ((cfg.image_size, cfg.image_size) if cfg.image_size else None)
    if side is None:
        raise AlignError(f"the input size of {cfg.model_path} is not fixed by the model", f"set input_size in {where} "
                         "or vision.image_size")
    if cfg.image_size and (cfg.image_size, cfg.image_size) != side:
        raise AlignError(f"vision.image_size = {cfg.image_size}, but the {cfg.source} tower takes {side[0]}x{side[1]} "
                         "inputs", "set vision.image_size = 0 (the tower's own size)")
    return side
