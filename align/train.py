"""The training loop: a text tower learns to land in the frozen image tower's space.

Reads top to bottom in phases: recipe and run folder -> frozen features (the image tower runs
once, never per step) -> text tower, loss, optimizer, schedule -> resume -> steps -> final
checkpoint. Runs on accelerate, so the same code serves one CPU process and many GPU processes.
"""
from __future__ import annotations

import json
import math
import os
import time
from dataclasses import dataclass
from pathlib import Path
from typing import Callable

import torch
from rich.console import Console
from rich.progress import BarColumn, MofNCompleteColumn, Progress, TextColumn, TimeRemainingColumn

from . import artifacts as A
from .checkpoint import (apply_weights, latest_checkpoint, load_training_state, load_weights, save_checkpoint,
                         write_text_atomic)
from .data.shards import load_table, read_manifest
from .errors import AlignError
from .features import ViewSchedule, image_features, view_batch
from .loss import build_loss, positive_ids
from .recipe import Recipe, dump_recipe
from .step import contrastive_step, step_seed
from .text import TextTower, build_text_tower
from .vision import load_image_tower


@dataclass
class TrainingData:
    """The training split, rows aligned: caption i describes image feature row i."""

    keys: list[str]
    captions: list[str]
    labels: list[dict]
    image_features: torch.Tensor  # (N, D) float32, L2-normalised
    caption_ids: torch.Tensor  # (N,) equal id = same caption text
    label_ids: torch.Tensor | None  # (N,) equal id = same labels; -1 = none
    tower_fingerprint: dict
    image_views: torch.Tensor | None = None  # (N, K, D) float16 when vision.views > 1; view 0 = image_features


def _quiet_transformers() -> None:
    # the library's own weight-loading bars would interleave with ours
    from transformers.utils import logging as hf_logging
    hf_logging.disable_progress_bar()
    hf_logging.set_verbosity_error()


def shards_dir(recipe: Recipe) -> Path:
    if not recipe.data.shards:
        raise AlignError("the recipe names no data", "pass --set data.shards=DIR (a folder written by `align pack`)")
    path = Path(recipe.data.shards)
    read_manifest(path)  # a clear error when the folder is not packed
    return path


def prepare_training_data(recipe: Recipe, console: Console) -> TrainingData:
    """Embed the training images once with the frozen tower and line them up with their captions."""
    data_dir = shards_dir(recipe)
    table = load_table(data_dir, recipe.data.train_split)
    tower = load_image_tower(recipe.vision)
    feats = image_features(tower, data_dir, recipe.data.train_split, recipe.vision, console,
                           views=recipe.vision.views)
    keep = set(feats.keys)
    rows = [i for i, k in enumerate(table.keys) if k in keep]  # images that failed to decode drop out
    keys = [table.keys[i] for i in rows]
    captions = [table.captions[i] for i in rows]
    labels = [table.labels[i] for i in rows]
    caption_ids, label_ids = positive_ids(captions, labels, recipe.loss.positives)
    return TrainingData(keys=keys, captions=captions, labels=labels, image_features=feats.rows_for(keys),
                        caption_ids=caption_ids, label_ids=label_ids, tower_fingerprint=tower.fingerprint,
                        image_views=feats.view_rows_for(keys) if feats.views > 1 else None)


class EpochSampler:
    """Deterministic batches: a seeded permutation per epoch, read as one endless stream.

    The batch for a step depends only on (seed, step), so a resumed run sees exactly the batches the
    uninterrupted run would have seen, with no sampler state to save.
    """

    def __init__(self, n: int, batch_size: int, seed: int):
        if n < 2:
            raise AlignError(f"only {n} training pair(s): a contrastive loss needs at least 2",
                             "pack more data or lower --val-fraction")
        self.n, self.batch_size, self.seed = n, batch_size, seed
        self._cache: dict[int, torch.Tensor] = {}

    def _perm(self, epoch: int) -> torch.Tensor:
        if epoch not in self._cache:
            self._cache = {epoch: torch.randperm(self.n, generator=torch.Generator().manual_seed(
                self.seed * 1_000_003 + epoch))} | {e: p for e, p in self._cache.items() if e == epoch - 1}
        return self._cache[epoch]

    def batch(self, step: int) -> torch.Tensor:
        positions = torch.arange(step * self.batch_size, (step + 1) * self.batch_size)
        epochs, offsets = positions // self.n, positions % self.n
        return torch.stack([self._perm(int(e))[int(o)] for e, o in zip(epochs, offsets)])  # (B,)

    def epoch_of(self, step: int) -> float:
        return step * self.batch_size / self.n


def warmup_cosine(warmup: int, total: int) -> Callable[[int], float]:
    """Linear warm-up to the peak, then cosine decay to zero at the last step (common practice)."""
    def factor(step: int) -> float:
        if step < warmup:
            return (step + 1) / (warmup + 1)
        progress = (step - warmup) / max(1, total - warmup)
        return 0.5 * (1.0 + math.cos(math.pi * min(1.0, progress)))
    return factor


def param_groups(named: list[tuple[str, torch.nn.Parameter]], weight_decay: float) -> list[dict]:
    # no decay on biases, norms and the loss's scale/temperature (common practice), nor on rows of
    # added vocabulary: decay would pull them from their mean-of-pieces start towards zero
    def decays(name: str, p: torch.nn.Parameter) -> bool:
        return p.ndim >= 2 and "trainable_tokens" not in name
    decay = [p for n, p in named if decays(n, p)]
    no_decay = [p for n, p in named if not decays(n, p)]
    return [{"params": decay, "weight_decay": weight_decay}, {"params": no_decay, "weight_decay": 0.0}]


def trainable_parameters(tower: TextTower, loss_fn: torch.nn.Module) -> dict[str, torch.nn.Parameter]:
    named = {f"text.{n}": p for n, p in tower.named_parameters() if p.requires_grad}
    named |= {f"loss.{n}": p for n, p in loss_fn.named_parameters() if p.requires_grad}
    return named


def build_models(recipe: Recipe, run_dir: Path, feature_dim: int, captions: list[str] | None):
    """Text tower + loss, freshly initialised from the recipe's seed (weights loaded separately)."""
    tower = build_text_tower(recipe.text, feature_dim, seed=recipe.train.seed, train_captions=captions,
                             tokenizer_dir=Path(run_dir) / A.TOKENIZER_DIR)
    loss_fn = build_loss(recipe.loss)
    return tower, loss_fn


def load_trained(run_dir: Path, recipe: Recipe, feature_dim: int, checkpoint: Path | None = None):
    """The text tower and loss of a finished (or interrupted) run, in eval mode."""
    _quiet_transformers()
    checkpoint = checkpoint or latest_checkpoint(run_dir)
    if checkpoint is None:
        raise AlignError(f"{run_dir} has no checkpoint", "train it first: align train RECIPE --run-dir DIR")
    tower, loss_fn = build_models(recipe, run_dir, feature_dim, captions=None)
    apply_weights(trainable_parameters(tower, loss_fn), load_weights(checkpoint), checkpoint)
    return tower.eval(), loss_fn.eval(), checkpoint


def _truncate_metrics(path: Path, after_step: int) -> None:
    """On resume, drop log lines the interrupted run wrote past its last checkpoint."""
    if not path.is_file():
        return
    kept = [line for line in path.read_text(encoding="utf-8").splitlines()
            if line.strip() and json.loads(line).get("step", 0) <= after_step]
    write_text_atomic(path, "".join(line + "\n" for line in kept))


def _progress(console: Console) -> Progress:
    return Progress(TextColumn("[bold]training"), BarColumn(), MofNCompleteColumn(),
                    TextColumn("loss {task.fields[loss]}"), TextColumn("{task.fields[rate]} pairs/s"),
                    TimeRemainingColumn(), console=console, transient=False)


def train(recipe: Recipe, run_dir: str | Path, *, resume: bool = False, console: Console | None = None,
          on_step: Callable[[dict], bool | None] | None = None, data: TrainingData | None = None) -> dict:
    """Train the text tower of ``recipe`` into ``run_dir``; returns a summary dict.

    ``on_step`` is called after every logged step with the log record; returning False stops the run
    after a checkpoint (the service uses it for cancel). ``data`` lets callers reuse prepared features.
    """
    console = console or Console(stderr=True)
    _quiet_transformers()
    run_dir = Path(run_dir)
    cfg = recipe.train

    # Phase 1: the process group and the run folder. The resolved recipe sits beside every
    # checkpoint, so a run can always be evaluated, resumed or exported with exactly what trained it.
    accelerator = _accelerator(find_unused_parameters=recipe.text.kind == "full")
    # processes sharing a machine share its cores; more threads than cores only thrash
    torch.set_num_threads(cfg.threads or max(1, (os.cpu_count() or 1) // _local_world_size()))
    is_main = accelerator.is_main_process
    recipe_toml = dump_recipe(recipe)
    previous = latest_checkpoint(run_dir) if resume else None
    if not resume and latest_checkpoint(run_dir) is not None:
        raise AlignError(f"{run_dir} already holds a run", "pass --resume to continue it, or a new --run-dir")
    if is_main:
        run_dir.mkdir(parents=True, exist_ok=True)
        write_text_atomic(run_dir / A.RESOLVED_RECIPE, recipe_toml)

    # Phase 2: frozen features. The image tower runs once per image here and never again in the loop.
    data = data or shared_training_data(recipe, console, accelerator)
    world, rank = accelerator.num_processes, accelerator.process_index
    if cfg.batch_size % world:
        raise AlignError(f"train.batch_size {cfg.batch_size} does not split over {world} processes",
                         f"use a multiple of {world}")
    local_batch = cfg.batch_size // world
    sampler = EpochSampler(len(data.captions), cfg.batch_size, cfg.seed)

    # Phase 3: text tower, loss (its temperature learns too), AdamW, warm-up + cosine schedule.
    tower, loss_fn = build_models(recipe, run_dir, data.image_features.shape[1], data.captions)
    named = trainable_parameters(tower, loss_fn)
    optimizer = torch.optim.AdamW(param_groups(list(named.items()), cfg.weight_decay), lr=cfg.lr)
    scheduler = torch.optim.lr_scheduler.LambdaLR(optimizer, warmup_cosine(cfg.warmup_steps, cfg.steps))

    # Phase 4: resume. Weights, optimizer, schedule and RNG come back; the sampler needs only the step.
    start_step, elapsed_before = 0, 0.0
    if previous is not None:
        apply_weights(named, load_weights(previous), previous)
        state = load_training_state(previous, optimizer, scheduler)
        start_step, elapsed_before = int(state["step"]), float(state.get("elapsed_s", 0.0))
        if is_main:
            _truncate_metrics(run_dir / A.METRICS_LOG, start_step)
            console.print(f"resuming from {previous.name} (step {start_step} of {cfg.steps})")
    model, optimizer = accelerator.prepare(tower, optimizer)
    loss_fn.to(accelerator.device)
    feats = data.image_features.to(accelerator.device)
    # several cached views: each row shows one per epoch, drawn from (seed, epoch) so resume replays it
    image_views = data.image_views.to(accelerator.device) if data.image_views is not None else None
    views = (ViewSchedule(len(data.captions), image_views.shape[1], cfg.batch_size, cfg.seed)
             if image_views is not None else None)
    autocast = torch.autocast(device_type=accelerator.device.type, dtype=torch.bfloat16,
                              enabled=cfg.precision == "bf16")

    def checkpoint(step: int, elapsed: float) -> None:
        if is_main:
            save_checkpoint(run_dir, step, {n: p for n, p in named.items()}, optimizer, scheduler,
                            {"elapsed_s": elapsed, "recipe": recipe.name,
                             "tower": data.tower_fingerprint}, recipe_toml, keep=cfg.keep_checkpoints)
        accelerator.wait_for_everyone()

    # Phase 5: steps. Each rank encodes its slice of the global batch; the loss sees all of it.
    model.train()
    log_path = run_dir / A.METRICS_LOG
    started, window_loss, window_pairs, window_start = time.perf_counter(), 0.0, 0, time.perf_counter()
    stopped_early = False
    last_record: dict = {}
    with _progress(console) if is_main else _NullProgress() as progress:
        task = progress.add_task("train", total=cfg.steps, completed=start_step, loss="-", rate="-")
        for step in range(start_step, cfg.steps):
            batch = sampler.batch(step)  # (B,) global indices, identical on every rank
            mine = batch[rank * local_batch:(rank + 1) * local_batch]  # (b,) this rank's slice
            loss = contrastive_step(
                model, tower, loss_fn, [data.captions[i] for i in mine.tolist()],
                feats[batch] if views is None else view_batch(image_views, batch, views.views_for(step, batch)),
                data.caption_ids[batch], data.label_ids[batch] if data.label_ids is not None else None,
                accelerator, autocast, chunk_size=cfg.chunk_size, length_buckets=cfg.length_buckets,
                seed=step_seed(cfg.seed, step))
            if cfg.grad_clip > 0:
                accelerator.clip_grad_norm_(list(named.values()), cfg.grad_clip)
            optimizer.step()
            scheduler.step()
            optimizer.zero_grad(set_to_none=True)

            window_loss += float(loss.detach())
            window_pairs += cfg.batch_size
            done = step + 1
            if done % cfg.log_every == 0 or done == cfg.steps:
                now = time.perf_counter()
                rate = window_pairs / max(now - window_start, 1e-9)
                steps_in_window = window_pairs // cfg.batch_size
                last_record = {"step": done, "loss": window_loss / steps_in_window, "lr": scheduler.get_last_lr()[0],
                               "temperature": float(loss_fn.temperature()), "pairs_per_s": rate,
                               "epoch": sampler.epoch_of(done), "elapsed_s": elapsed_before + now - started}
                if is_main:
                    with open(log_path, "a", encoding="utf-8") as fh:
                        fh.write(json.dumps(last_record) + "\n")
                progress.update(task, completed=done, loss=f"{last_record['loss']:.3f}", rate=f"{rate:.0f}")
                window_loss, window_pairs, window_start = 0.0, 0, now
                if on_step is not None and on_step(last_record) is False:
                    checkpoint(done, elapsed_before + now - started)
                    stopped_early = True
                    break
            if cfg.checkpoint_every and done % cfg.checkpoint_every == 0 and done < cfg.steps:
                checkpoint(done, elapsed_before + time.perf_counter() - started)

    # Phase 6: the final checkpoint (and the tower untouched: the fingerprint is re-checked).
    total_elapsed = elapsed_before + time.perf_counter() - started
    if not stopped_early:
        checkpoint(cfg.steps, total_elapsed)
    return {"run_dir": str(run_dir), "steps": last_record.get("step", start_step), "stopped_early": stopped_early,
            "final_loss": last_record.get("loss"), "pairs_per_s": last_record.get("pairs_per_s"),
            "elapsed_s": total_elapsed, "train_pairs": len(data.captions),
            "tower_fingerprint": data.tower_fingerprint}


def _accelerator(find_unused_parameters: bool = False):
    """Accelerate's Accelerator: one process, or one rank of a torchrun / accelerate launch group.

    On CPU under a launcher, accelerate starts a gloo group itself (MULTI_CPU); on GPUs, NCCL.
    find_unused_parameters: a full fine-tune keeps the encoder's pooler trainable although the tower
    pools its own way, and DDP would otherwise wait forever for the pooler's gradient; the check
    costs a walk of the autograd graph per backward, so only kind = "full" pays it.
    """
    from accelerate import Accelerator
    from accelerate.utils import DistributedDataParallelKwargs

    return Accelerator(cpu=not torch.cuda.is_available(),
                       kwargs_handlers=[DistributedDataParallelKwargs(find_unused_parameters=find_unused_parameters)])


def _local_world_size() -> int:
    return int(os.environ.get("LOCAL_WORLD_SIZE", "1"))


def shared_training_data(recipe: Recipe, console: Console, accelerator) -> TrainingData:
    """The training table on every rank, built once.

    Rank 0 reads the shards and embeds (or loads the cached) image features; the other ranks wait
    and receive the same table over the process group, so no rank decodes an image twice and every
    rank holds identical rows (the sampler and the loss rely on that). Works across machines
    without a shared disk. Cost: one broadcast of the (N, D) features per run.
    """
    if accelerator.num_processes == 1:
        return prepare_training_data(recipe, console)
    import torch.distributed as dist

    box: list = [None]
    if accelerator.is_main_process:
        try:
            box[0] = prepare_training_data(recipe, console)
        except AlignError as exc:  # the others must hear of it, or they wait in the broadcast forever
            box[0] = exc
    dist.broadcast_object_list(box, src=0)
    if isinstance(box[0], AlignError):
        raise box[0]
    return box[0]


class _NullProgress:
    """Progress stand-in for non-main ranks: they train silently."""

    def __enter__(self):
        return self

    def __exit__(self, *exc):
        return False

    def add_task(self, *args, **kwargs):
        return 0

    def update(self, *args, **kwargs):
        pass
