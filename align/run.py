"""A run folder: what ``align train`` writes and what evaluate, export, index and the service read.

    RUN/recipe.resolved.toml     the recipe the run trains with (every default filled in)
    RUN/metrics.jsonl            one line per logged step (with val/... keys where validation ran)
    RUN/resumes.jsonl            one line per resume that changed a free field (steps, logging, ...)
    RUN/tokenizer/               the scratch tower's tokenizer, or the extended one with added terms
    RUN/checkpoints/step-N/      see ``align.checkpoint``
    RUN/metrics.json             what ``align evaluate`` measured
    RUN/evaluation.json          its details (intervals, confusion matrices, gallery) for the report
    RUN/report.html, RUN/plots/  the report ``align evaluate`` / ``align report`` write

``RunDir`` is the one place that knows this layout: it reads the resolved recipe, finds checkpoints,
reads their progress record, picks the checkpoint evaluate and export default to (the best
validation step when ``train.keep_best`` names a metric, else the newest) and keeps it from being
pruned, rebuilds the trained text tower and loss from a checkpoint, refuses a different image tower,
settles ``train.precision = "auto"`` to the precision the run records, and decides whether a recipe may
resume the run.
"""
from __future__ import annotations

import dataclasses
import json
import shutil
import time
from dataclasses import dataclass
from pathlib import Path

import torch

from . import artifacts as A
from .checkpoint import apply_weights, list_checkpoints, load_weights, read_progress
from .data.shards import read_manifest
from .errors import AlignError, DataError, FingerprintMismatch
from .fileio import write_text_atomic
from .loss import build_loss
from .recipe import Recipe, dump_recipe, load_recipe
from .text import TextTower, build_text_tower
from .text.precision import resolve_precision
from .vision import tower_differences

# Recipe fields a resumed run may change: they steer how long the run goes, how it logs and
# checkpoints, how fast features are built and how it is evaluated, never what a step computes.
# Every other field shapes the weights (tower, text kind, LoRA shape, loss, batch, seed, schedule).
RESUMABLE_CHANGES = ("name", "train.steps", "train.log_every", "train.checkpoint_every",
                     "train.keep_checkpoints", "train.threads", "train.eval_every", "train.eval_samples",
                     "train.keep_best", "vision.batch_size", "vision.workers",
                     "vision.feature_cache", "vision.check_rows", "data.eval_split", "eval.")


def quiet_transformers() -> None:
    # the library's own weight-loading bars would interleave with ours
    from transformers.utils import logging as hf_logging
    hf_logging.disable_progress_bar()
    hf_logging.set_verbosity_error()


def shards_dir(recipe: Recipe) -> Path:
    """The recipe's packed data folder, checked to be one."""
    if not recipe.data.shards:
        raise AlignError("the recipe names no data", "pass --set data.shards=DIR (a folder written by `align pack`)")
    path = Path(recipe.data.shards)
    read_manifest(path)  # a clear error when the folder is not packed
    return path


def build_models(recipe: Recipe, run_dir: Path, feature_dim: int, captions: list[str] | None):
    """Text tower + loss, freshly initialised from the recipe's seed (weights loaded separately)."""
    tower = build_text_tower(recipe.text, feature_dim, seed=recipe.train.seed, train_captions=captions,
                             tokenizer_dir=Path(run_dir) / A.TOKENIZER_DIR)
    return tower, build_loss(recipe.loss)


def trainable_parameters(tower: TextTower, loss_fn: torch.nn.Module) -> dict[str, torch.nn.Parameter]:
    """Every parameter that learns, under the names checkpoints store them by."""
    named = {f"text.{n}": p for n, p in tower.named_parameters() if p.requires_grad}
    named |= {f"loss.{n}": p for n, p in loss_fn.named_parameters() if p.requires_grad}
    return named


def best_logged_step(records: list[dict], key: str, steps: set[int] | None = None) -> tuple[int, float] | None:
    """(step, value) of the logged record with the highest ``key``, among ``steps`` when given; a tie
    goes to the earlier step. None when no record has the key."""
    best = None
    for record in records:
        step, value = record.get("step"), record.get(key)
        if isinstance(value, (int, float)) and (steps is None or step in steps):
            if best is None or value > best[1] or (value == best[1] and step < best[0]):
                best = (int(step), float(value))
    return best


@dataclass
class CheckpointChoice:
    """The checkpoint a command uses, and why, in words for the user."""

    path: Path
    reason: str
    best: tuple[int, float] | None = None  # (step, value) of the best validation, when chosen by it


@dataclass
class TrainedText:
    """A checkpoint's text side, in eval mode."""

    tower: TextTower
    loss_fn: torch.nn.Module
    checkpoint: Path


def _flat(data: dict, prefix: str = "") -> dict:
    out = {}
    for key, value in data.items():
        if isinstance(value, dict) and not (prefix.startswith("eval.") and key == "field_prompts"):
            out |= _flat(value, f"{prefix}{key}.")
        else:
            out[f"{prefix}{key}"] = value
    return out


def recipe_changes(old: Recipe, new: Recipe) -> dict[str, tuple]:
    """Dotted recipe fields whose values differ: {field: (old, new)}."""
    a, b = _flat(old.to_dict()), _flat(new.to_dict())
    return {k: (a.get(k), b.get(k)) for k in sorted(set(a) | set(b)) if a.get(k) != b.get(k)}


def _resumable(field: str) -> bool:
    return any(field == f or (f.endswith(".") and field.startswith(f)) for f in RESUMABLE_CHANGES)


class RunDir:
    """One run folder (see the module docstring for its layout)."""

    def __init__(self, path: str | Path):
        self.path = Path(path)

    @property
    def recipe_path(self) -> Path:
        return self.path / A.RESOLVED_RECIPE

    @property
    def metrics_log(self) -> Path:
        return self.path / A.METRICS_LOG

    @property
    def tokenizer_dir(self) -> Path:
        return self.path / A.TOKENIZER_DIR

    def recipe(self) -> Recipe:
        if not self.recipe_path.is_file():
            raise AlignError(f"{self.path} is not a run folder (no {A.RESOLVED_RECIPE})",
                             "pass the --run-dir you trained into, e.g. runs/demo")
        return load_recipe(self.recipe_path)

    def write_recipe(self, recipe: Recipe) -> str:
        text = dump_recipe(recipe)
        self.path.mkdir(parents=True, exist_ok=True)
        write_text_atomic(self.recipe_path, text)
        return text

    # -- checkpoints -------------------------------------------------------------------------
    def checkpoints(self) -> list[Path]:
        return list_checkpoints(self.path)

    def latest(self) -> Path | None:
        found = self.checkpoints()
        return found[-1] if found else None

    def checkpoint(self, chosen: str | Path | None = None) -> Path:
        """The named checkpoint (a path, or a name under checkpoints/), else the default one:
        the best validation step's with ``train.keep_best``, otherwise the newest."""
        if chosen is None:
            return self.default_checkpoint().path
        path = Path(chosen)
        if not path.is_dir():
            path = self.path / A.CHECKPOINTS / str(chosen)
        if path not in self.checkpoints():
            names = ", ".join(p.name for p in self.checkpoints()) or "none"
            raise AlignError(f"no complete checkpoint {chosen} in {self.path}", f"pick one of: {names}")
        return path

    def log_records(self) -> list[dict]:
        """The training log's records (a line torn by a kill is skipped)."""
        return [record for _, record in self._log_lines() if "step" in record]

    def _log_lines(self):
        """(line, record) for each readable line of the training log; a line torn by a kill is skipped."""
        if not self.metrics_log.is_file():
            return
        for line in self.metrics_log.read_text(encoding="utf-8").splitlines():
            try:
                record = json.loads(line)
            except json.JSONDecodeError:
                continue
            if isinstance(record, dict):
                yield line, record

    def best_checkpoint(self, recipe: Recipe | None = None) -> tuple[Path, int, float] | None:
        """(checkpoint, step, value) of the best logged validation by ``train.keep_best`` among the
        steps that have a checkpoint (ties: the earlier step); None when the recipe names no metric."""
        metric = (recipe or self.recipe()).train.keep_best
        if not metric:
            return None
        by_step = {int(read_progress(p).get("step", -1)): p for p in self.checkpoints()}
        best = best_logged_step(self.log_records(), f"val/{metric}", set(by_step))
        return (by_step[best[0]], *best) if best else None

    def default_checkpoint(self) -> CheckpointChoice:
        """What evaluate, export and the service use when no checkpoint is named, and why."""
        latest = self.latest()
        if latest is None:
            raise AlignError(f"{self.path} has no checkpoint", "train it first: align train RECIPE --run-dir DIR")
        recipe = self.recipe()
        best = self.best_checkpoint(recipe)
        if best is None:
            why = (f"; no validation of val/{recipe.train.keep_best} is logged beside a checkpoint"
                   if recipe.train.keep_best else "")
            return CheckpointChoice(latest, f"{latest.name}, the newest{why}")
        path, step, value = best
        key = f"val/{recipe.train.keep_best}"
        last = max((r for r in self.log_records() if key in r), key=lambda r: r["step"], default=None)
        tail = f"; the last validation, step {last['step']}, scored {last[key]:.4f}" if last else ""
        return CheckpointChoice(path, f"{path.name}, the best by {key} ({value:.4f} at step {step}{tail})",
                                (step, value))

    def describe(self, checkpoint: Path) -> str:
        """A checkpoint in words: why the default was chosen, or that it was asked for."""
        choice = self.default_checkpoint()
        return choice.reason if Path(checkpoint) == choice.path else f"{Path(checkpoint).name}, as asked"

    def prune_checkpoints(self, keep: int) -> None:
        """Remove all but the newest ``keep`` checkpoints and the best one (``train.keep_best``)."""
        found = self.checkpoints()
        best = self.best_checkpoint() if self.recipe_path.is_file() else None
        for old in found[:-keep] if keep > 0 else []:
            if best is None or old != best[0]:
                shutil.rmtree(old, ignore_errors=True)

    def progress(self, checkpoint: Path | None = None) -> dict:
        """A checkpoint's progress record (step, elapsed time, the tower it trained against); {} if none."""
        checkpoint = checkpoint or self.latest()
        return read_progress(checkpoint) if checkpoint is not None else {}

    def step(self) -> int:
        """The step the newest checkpoint reached (0 without one)."""
        return int(self.progress().get("step", 0))

    # -- the trained text side ---------------------------------------------------------------
    def load_trained(self, feature_dim: int, checkpoint: str | Path | None = None,
                     recipe: Recipe | None = None) -> TrainedText:
        quiet_transformers()
        ckpt = self.checkpoint(checkpoint)
        tower, loss_fn = build_models(recipe or self.recipe(), self.path, feature_dim, captions=None)
        weights = load_weights(ckpt)
        broken = sorted(name for name, t in weights.items() if t.is_floating_point() and not torch.isfinite(t).all())
        if broken:  # such weights embed every caption as NaN: nothing downstream could be trusted
            raise DataError(f"checkpoint {ckpt} holds non-finite weights ({len(broken)} tensors, e.g. {broken[0]})",
                            "evaluate or export an earlier checkpoint (--checkpoint), or train the run again")
        apply_weights(trainable_parameters(tower, loss_fn), weights, ckpt)
        return TrainedText(tower.eval(), loss_fn.eval(), ckpt)

    def check_tower(self, checkpoint: Path, fingerprint: dict) -> None:
        """Refuse an image tower other than the one the checkpoint was trained against."""
        trained_with = self.progress(checkpoint).get("tower")
        differences = tower_differences(trained_with, fingerprint) if trained_with else []
        if differences:
            raise FingerprintMismatch(
                f"the run was trained against another image tower than the recipe now loads "
                f"({'; '.join(differences)})",
                "use the [vision] settings the run was trained with (source, model or model_path, weights, "
                "image_size, pooling; recipe.resolved.toml has them)")

    # -- resuming ----------------------------------------------------------------------------
    def settle_precision(self, recipe: Recipe, device: torch.device) -> Recipe:
        """``recipe`` with ``train.precision`` concrete, so the run folder and its checkpoints record
        what the steps compute in. "auto" means this device's native choice on a fresh start, but the
        run's own recorded precision on a resume: bf16 and fp32 steps give different numbers, so a
        run resumed on another machine keeps the precision it began with (bf16 on a CPU without bf16
        instructions is emulated: slower, the same arithmetic). An explicit precision other than the
        run's is refused by ``check_resume``, like any field that shapes the weights."""
        requested = recipe.train.precision
        if requested == "auto" and self.latest() is not None and self.recipe_path.is_file():
            recorded = self.recipe().train.precision
            settled = recorded if recorded != "auto" else resolve_precision("auto", device)
        else:
            settled = resolve_precision(requested, device)
        return dataclasses.replace(recipe, train=dataclasses.replace(recipe.train, precision=settled))

    def check_resume(self, recipe: Recipe) -> dict[str, tuple]:
        """Refuse a resume whose recipe changes a field that shapes the weights; return the free changes."""
        if not self.recipe_path.is_file():
            return {}
        changes = recipe_changes(self.recipe(), recipe)
        locked = {k: v for k, v in changes.items() if not _resumable(k)}
        if locked:
            listed = "; ".join(f"{k}: {v[0]!r} -> {v[1]!r}" for k, v in locked.items())
            raise AlignError(f"this recipe cannot resume {self.path}: it changes what the run trains ({listed})",
                             f"resume with the run's own recipe ({self.recipe_path}), changing only "
                             f"steps, logging, checkpoint cadence, threads or evaluation settings; "
                             f"or train into a new --run-dir")
        return changes

    def record_resume(self, step: int, changes: dict[str, tuple]) -> None:
        if changes:
            line = {"step": step, "time": time.strftime("%Y-%m-%dT%H:%M:%S"),
                    "changed": {k: list(v) for k, v in changes.items()}}
            with open(self.path / A.RESUMES_LOG, "a", encoding="utf-8") as fh:
                fh.write(json.dumps(line) + "\n")

    def truncate_log(self, after_step: int) -> None:
        """Keep only the log lines a checkpoint backs: lines past ``after_step`` (written by an
        interrupted attempt) and lines torn by a kill mid-write are dropped. ``after_step = 0``
        empties the log: a fresh start owns no earlier line."""
        if not self.metrics_log.is_file():
            return
        kept = [line for line, record in self._log_lines() if record.get("step", 0) <= after_step]
        write_text_atomic(self.metrics_log, "".join(line + "\n" for line in kept))
