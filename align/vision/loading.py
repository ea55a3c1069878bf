"""Loading the tower a recipe names, from whichever source, and sharing it within a process."""
from __future__ import annotations

from pathlib import Path

from ..errors import AlignError
from ..recipe import VisionConfig
from .declared import sidecar_path
from .from_onnx import load_onnx_tower
from .from_program import load_program_tower
from .from_timm import default_vision_weights, load_timm_tower
from .from_transformers import load_transformers_tower
from .tower import FrozenImageTower

LOADERS = {"timm": load_timm_tower, "transformers": load_transformers_tower, "onnx": load_onnx_tower,
           "program": load_program_tower}


def load_image_tower(cfg: VisionConfig) -> FrozenImageTower:
    """Load the frozen tower a recipe names: eval mode, no gradients, ever."""
    if cfg.source not in LOADERS:
        raise AlignError(f"vision.source = {cfg.source!r} has no image tower: the image side is the stored vectors",
                         "set vision.source to timm, transformers, onnx or program to embed images")
    return LOADERS[cfg.source](cfg)


def _stamp(path: Path | None) -> tuple | None:
    """(path, size, modification time) of a file, or of every file in a folder: a replaced file
    changes it, so a shared tower is loaded afresh."""
    if path is None or not path.exists():
        return None
    files = sorted(p for p in path.rglob("*") if p.is_file()) if path.is_dir() else [path]
    return tuple((str(p), p.stat().st_size, p.stat().st_mtime_ns) for p in files)


def tower_files(cfg: VisionConfig) -> list[Path]:
    """The files a recipe's tower is read from (what a changed file would change)."""
    if cfg.source == "timm":
        return [Path(cfg.weights) if cfg.weights else default_vision_weights()]
    if cfg.source == "stored":
        return []
    sidecar = sidecar_path(cfg) if cfg.source in ("onnx", "program") else None
    return [Path(cfg.model_path)] + ([sidecar] if sidecar else [])


_SHARED: dict[tuple, FrozenImageTower] = {}


def shared_image_tower(cfg: VisionConfig) -> FrozenImageTower:
    """The recipe's frozen tower, loaded and hashed once per process and reused (a service job
    trains, evaluates, exports and indexes against one tower: loading and hashing it costs ~1 s
    each time). The key includes every file's size and modification time, so a replaced file is
    loaded afresh. The tower is frozen, so sharing it cannot change a result."""
    key = (cfg.source, cfg.model, cfg.model_path, cfg.pooling, repr(cfg.preprocess), cfg.image_size,
           cfg.channels_last, tuple(_stamp(p) for p in tower_files(cfg)))
    if key not in _SHARED:
        _SHARED.clear()  # one tower at a time: a process that switches towers does not keep the old one
        _SHARED[key] = load_image_tower(cfg)
    return _SHARED[key]
