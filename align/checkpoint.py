"""Checkpoints: what a run must keep to resume exactly, and to be evaluated or exported.

A checkpoint is a folder ``checkpoints/step-000123/`` holding the trainable weights (safetensors),
AdamW's moments, the learning-rate schedule's position, the RNG streams, a small JSON progress
record and the resolved recipe. It is written under a temporary name and renamed, so a folder with that name is complete.
Pickled states are read back with ``weights_only=True``.
"""
from __future__ import annotations

import json
import os
import random
import shutil
import tempfile
from pathlib import Path

import numpy as np
import torch
from safetensors.torch import load_file, save_file

from . import artifacts as A
from .errors import AlignError
from .fileio import swap_dir_in, write_json_atomic, write_text_atomic  # noqa: F401 - re-exported for old importers


def list_checkpoints(run_dir: Path) -> list[Path]:
    root = Path(run_dir) / A.CHECKPOINTS
    if not root.is_dir():
        return []
    found = [p for p in root.iterdir() if p.is_dir() and p.name.startswith(A.CHECKPOINT_PREFIX)
             and (p / A.PROGRESS).is_file()]
    return sorted(found, key=lambda p: int(p.name[len(A.CHECKPOINT_PREFIX):]))


def latest_checkpoint(run_dir: Path) -> Path | None:
    found = list_checkpoints(run_dir)
    return found[-1] if found else None


def rng_state() -> dict:
    """All RNG states as tensors and plain values, so ``torch.load(weights_only=True)`` reads them."""
    kind, keys, pos, has_gauss, gauss = np.random.get_state()
    version, internal, gauss_next = random.getstate()
    return {"torch": torch.get_rng_state(),
            "numpy": {"kind": kind, "keys": torch.from_numpy(keys.astype(np.int64)), "pos": int(pos),
                      "has_gauss": int(has_gauss), "gauss": float(gauss)},
            "python": {"version": version, "internal": list(internal), "gauss_next": gauss_next}}


def set_rng_state(state: dict) -> None:
    torch.set_rng_state(state["torch"])
    n = state["numpy"]
    np.random.set_state((n["kind"], n["keys"].numpy().astype(np.uint32), n["pos"], n["has_gauss"], n["gauss"]))
    p = state["python"]
    random.setstate((p["version"], tuple(p["internal"]), p["gauss_next"]))


def save_checkpoint(run_dir: Path, step: int, weights: dict[str, torch.Tensor], optimizer, scheduler,
                    trainer_state: dict, recipe_toml: str, keep: int = 2) -> Path:
    root = Path(run_dir) / A.CHECKPOINTS
    root.mkdir(parents=True, exist_ok=True)
    final = root / f"{A.CHECKPOINT_PREFIX}{step:06d}"
    tmp = Path(tempfile.mkdtemp(dir=root, prefix=f".{final.name}."))
    save_file({k: v.detach().cpu().contiguous() for k, v in weights.items()}, str(tmp / A.TRAINABLE_WEIGHTS))
    torch.save(optimizer.state_dict(), tmp / A.OPTIMIZER_STATE)
    torch.save(scheduler.state_dict(), tmp / A.SCHEDULER_STATE)
    torch.save(rng_state(), tmp / A.RNG_STATE)
    (tmp / A.RESOLVED_RECIPE).write_text(recipe_toml, encoding="utf-8")
    (tmp / A.PROGRESS).write_text(json.dumps({"step": step, **trainer_state}, indent=2), encoding="utf-8")
    if final.exists():
        shutil.rmtree(final)
    os.replace(tmp, final)
    for old in list_checkpoints(run_dir)[:-keep] if keep > 0 else []:
        shutil.rmtree(old, ignore_errors=True)
    return final


def read_progress(checkpoint: Path) -> dict:
    """The progress record of a complete checkpoint: step, elapsed_s, the image tower's fingerprint."""
    return json.loads((Path(checkpoint) / A.PROGRESS).read_text(encoding="utf-8"))


def load_weights(checkpoint: Path) -> dict[str, torch.Tensor]:
    path = Path(checkpoint) / A.TRAINABLE_WEIGHTS
    if not path.is_file():
        raise AlignError(f"checkpoint {checkpoint} has no {A.TRAINABLE_WEIGHTS}", "train the run again or pick another")
    return load_file(str(path))


def load_training_state(checkpoint: Path, optimizer, scheduler) -> dict:
    """Restore optimizer, scheduler and RNG; return the trainer state (step, ...)."""
    checkpoint = Path(checkpoint)
    optimizer.load_state_dict(torch.load(checkpoint / A.OPTIMIZER_STATE, weights_only=True))
    scheduler.load_state_dict(torch.load(checkpoint / A.SCHEDULER_STATE, weights_only=True))
    set_rng_state(torch.load(checkpoint / A.RNG_STATE, weights_only=True))
    return read_progress(checkpoint)


def apply_weights(named_params: dict[str, torch.nn.Parameter], weights: dict[str, torch.Tensor], where: Path) -> None:
    """Copy saved tensors into the live parameters; every name must match both ways."""
    missing = sorted(set(named_params) - set(weights))
    unexpected = sorted(set(weights) - set(named_params))
    if missing or unexpected:
        raise AlignError(f"checkpoint {where} does not fit this recipe's text tower "
                         f"({len(missing)} missing, {len(unexpected)} unexpected tensors, e.g. "
                         f"{(missing or unexpected)[0]})",
                         "evaluate or resume with the recipe the run was trained with (recipe.resolved.toml)")
    with torch.no_grad():
        for name, param in named_params.items():
            param.copy_(weights[name].to(param.dtype))
