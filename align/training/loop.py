"""The training loop: a text tower learns to land in the frozen image tower's space.

``train`` reads top to bottom in phases: process group -> run folder -> frozen features (the image
tower runs once, never per step) -> text tower, loss, optimizer, schedule -> resume -> steps (with
validation every ``train.eval_every``, and a checkpoint at each new best when ``train.keep_best``
names a metric) -> final checkpoint -> the image tower proven untouched. Runs on accelerate, so the
same code serves one CPU process and many GPU processes.
"""
from __future__ import annotations

import json
import os
import time
from dataclasses import dataclass
from pathlib import Path
from typing import Callable

import torch
from rich.console import Console
from rich.progress import BarColumn, MofNCompleteColumn, Progress, TextColumn, TimeRemainingColumn

from ..checkpoint import apply_weights, load_training_state, load_weights, save_checkpoint
from ..errors import AlignError
from ..recipe import Recipe, TrainConfig, dump_recipe
from ..run import RunDir, best_logged_step, build_models, quiet_transformers, trainable_parameters
from ..text import TextTower, text_kind
from ..vision import weights_sha256
from .data import StepBatch, StepBatches, TrainingData, shared_training_data
from .sampler import warmup_cosine
from .step import contrastive_step, step_seed
from .validation import PREFIX, improves, validation_recall


def train(recipe: Recipe, run_dir: str | Path, *, resume: bool = False, console: Console | None = None,
          on_step: Callable[[dict], bool | None] | None = None, data: TrainingData | None = None) -> dict:
    """Train the text tower of ``recipe`` into ``run_dir``; returns a summary dict.

    ``on_step`` is called after every logged step with the log record; returning False stops the run
    after a checkpoint (the service uses it for cancel). ``data`` lets callers reuse prepared features.
    """
    console = console or Console(stderr=True)
    quiet_transformers()
    run, cfg = RunDir(run_dir), recipe.train
    # the process group first: every later phase asks it for this process's rank and device
    accelerator = start_accelerator(text_kind(recipe.text.kind).find_unused_parameters)
    # train.precision "auto" -> bf16 or fp32 for this device (a resume: the run's own), recorded as such
    recipe = run.settle_precision(recipe, accelerator.device)
    cfg = recipe.train
    # processes sharing a machine share its cores; more threads than cores only thrash
    torch.set_num_threads(cfg.threads or max(1, (os.cpu_count() or 1) // _local_world_size()))
    # the run folder: the resolved recipe sits beside every checkpoint, so a run can always be
    # evaluated, resumed or exported with exactly what trained it
    previous, changes = _open_run(run, recipe, resume, accelerator.is_main_process)
    # frozen features: the image tower runs once per image here and never again in the loop; every
    # rank opens the same memory-mapped table, and each step reads only its rows
    data = data if data is not None else shared_training_data(recipe, console, accelerator)
    batches = StepBatches(data, cfg.batch_size, cfg.seed, accelerator.num_processes, accelerator.process_index,
                          accelerator.device)
    # text tower, loss (its temperature learns too), AdamW, warm-up + cosine schedule, seeded by the recipe;
    # rank 0 first: a tokenizer it learns (scratch) or extends (added terms) is saved in the run folder,
    # and the other ranks load that one (the WordPiece trainer is not repeatable across processes)
    with accelerator.main_process_first():
        learner = _Learner.build(recipe, run.path, data)
    # resume: weights, optimizer, schedule and RNG come back; the batches need only the step
    start_step, elapsed_before = _restore(learner, run, previous, changes, cfg, console, accelerator.is_main_process)
    learner.prepare(accelerator)
    checkpoint = _checkpointer(run, learner, recipe, data.tower_fingerprint, accelerator)
    validator = _Validator(recipe, run, data, learner, accelerator)
    # steps: each rank encodes its slice of the global batch; the loss sees all of it
    log = _LogWindow(run.metrics_log, accelerator.is_main_process, cfg.batch_size, elapsed_before)
    try:
        last_record, stopped_early = _run_steps(learner, batches, accelerator, cfg, start_step, log, checkpoint,
                                                on_step, console, validator)
    except Diverged as exc:  # nothing after the last checkpoint is saved: it stays the run's newest
        raise exc.for_user(run, recipe) from None
    total_elapsed = log.elapsed()
    # the final checkpoint (a stopped run already wrote its own)
    if not stopped_early:
        checkpoint(cfg.steps, total_elapsed)
    # the features were the frozen tower's: prove it did not change while the text side trained
    check_tower_untouched(data)
    return {"run_dir": str(run.path), "steps": last_record.get("step", start_step), "stopped_early": stopped_early,
            "final_loss": last_record.get("loss"), "pairs_per_s": last_record.get("pairs_per_s"),
            "elapsed_s": total_elapsed, "train_pairs": len(data),
            "tower_fingerprint": data.tower_fingerprint}


class Diverged(Exception):
    """The loss or the gradient of a step is not finite."""

    def __init__(self, step: int, what: str):
        super().__init__(f"step {step}: {what}")
        self.step, self.what = step, what

    def for_user(self, run: RunDir, recipe: Recipe) -> AlignError:
        last = run.latest()
        kept = (f"the last good checkpoint, {last.name}, is kept" if last is not None
                else "no checkpoint was written before it")
        return AlignError(f"training diverged at step {self.step} of {run.path}: the {self.what}; {kept}",
                          f"train again into a new --run-dir with a lower train.lr (now {recipe.train.lr:g}), "
                          f"a longer train.warmup_steps or train.grad_clip > 0")


# ---------------------------------------------------------------------------------------------
# the phases


def start_accelerator(find_unused_parameters: bool = False):
    """Accelerate's Accelerator: one process, or one rank of a torchrun / accelerate launch group.

    On CPU under a launcher, accelerate starts a gloo group itself (MULTI_CPU); on GPUs, NCCL.
    find_unused_parameters: a kind whose encoder keeps a trainable parameter the head never uses (a
    full fine-tune keeps the encoder's pooler) would leave DDP waiting forever for its gradient; the
    check costs a walk of the autograd graph per backward, so only such a kind pays it.
    """
    from accelerate import Accelerator
    from accelerate.utils import DistributedDataParallelKwargs

    return Accelerator(cpu=not torch.cuda.is_available(),
                       kwargs_handlers=[DistributedDataParallelKwargs(find_unused_parameters=find_unused_parameters)])


def _local_world_size() -> int:
    return int(os.environ.get("LOCAL_WORLD_SIZE", "1"))


def _open_run(run: RunDir, recipe: Recipe, resume: bool, is_main: bool) -> tuple[Path | None, dict]:
    """The checkpoint to resume from (None: a fresh start) and the free recipe fields a resume changes."""
    previous = run.latest()
    if previous is not None and not resume:
        raise AlignError(f"{run.path} already holds a run", "pass --resume to continue it, or a new --run-dir")
    # a resume may change only fields that do not shape the weights (steps, logging, cadence, ...)
    changes = run.check_resume(recipe) if previous is not None else {}
    if is_main:
        run.write_recipe(recipe)
        if previous is None:
            run.truncate_log(0)  # lines of an attempt cut before its first checkpoint back nothing
    return previous, changes


def param_groups(named: list[tuple[str, torch.nn.Parameter]], weight_decay: float) -> list[dict]:
    # no decay on biases, norms and the loss's scale/temperature (common practice), nor on rows of
    # added vocabulary: decay would pull them from their mean-of-pieces start towards zero
    def decays(name: str, p: torch.nn.Parameter) -> bool:
        return p.ndim >= 2 and "trainable_tokens" not in name
    decay = [p for n, p in named if decays(n, p)]
    no_decay = [p for n, p in named if not decays(n, p)]
    return [{"params": decay, "weight_decay": weight_decay}, {"params": no_decay, "weight_decay": 0.0}]


@dataclass
class _Learner:
    """What learns and what moves it."""

    tower: TextTower  # unwrapped: tokenizer, and the names checkpoints store
    loss_fn: torch.nn.Module
    named: dict[str, torch.nn.Parameter]  # every parameter that learns, by checkpoint name
    optimizer: torch.optim.Optimizer
    scheduler: torch.optim.lr_scheduler.LambdaLR
    model: torch.nn.Module | None = None  # the tower as accelerate wraps it (DDP under several processes)

    @classmethod
    def build(cls, recipe: Recipe, run_dir: Path, data: TrainingData) -> _Learner:
        cfg = recipe.train
        tower, loss_fn = build_models(recipe, run_dir, data.feature_dim, data.captions)
        named = trainable_parameters(tower, loss_fn)
        optimizer = torch.optim.AdamW(param_groups(list(named.items()), cfg.weight_decay), lr=cfg.lr)
        scheduler = torch.optim.lr_scheduler.LambdaLR(optimizer, warmup_cosine(cfg.warmup_steps, cfg.steps))
        return cls(tower, loss_fn, named, optimizer, scheduler)

    def prepare(self, accelerator) -> None:
        self.model, self.optimizer = accelerator.prepare(self.tower, self.optimizer)
        self.loss_fn.to(accelerator.device)


def _restore(learner: _Learner, run: RunDir, previous: Path | None, changes: dict, cfg: TrainConfig,
             console: Console, is_main: bool) -> tuple[int, float]:
    """(first step, seconds trained before): (0, 0.0) on a fresh start."""
    if previous is None:
        return 0, 0.0
    apply_weights(learner.named, load_weights(previous), previous)
    state = load_training_state(previous, learner.optimizer, learner.scheduler)
    start_step = int(state["step"])
    if is_main:
        run.truncate_log(start_step)
        run.record_resume(start_step, changes)
        console.print(f"resuming from {previous.name} (step {start_step} of {cfg.steps})")
    return start_step, float(state.get("elapsed_s", 0.0))


def _checkpointer(run: RunDir, learner: _Learner, recipe: Recipe, tower_fingerprint: dict,
                  accelerator) -> Callable[[int, float], None]:
    """checkpoint(step, elapsed): the main process writes, every rank waits for it to finish."""
    recipe_toml, cfg = dump_recipe(recipe), recipe.train

    def checkpoint(step: int, elapsed: float) -> None:
        if accelerator.is_main_process:
            save_checkpoint(run.path, step, dict(learner.named), learner.optimizer, learner.scheduler,
                            {"elapsed_s": elapsed, "recipe": recipe.name, "tower": tower_fingerprint},
                            recipe_toml, keep=0)
            run.prune_checkpoints(cfg.keep_checkpoints)  # the newest ones, and the best validation's
        accelerator.wait_for_everyone()
    return checkpoint


def _optimizer_step(learner: _Learner, batch: StepBatch, accelerator, autocast, cfg: TrainConfig,
                    step: int) -> torch.Tensor:
    loss = contrastive_step(learner.model, learner.tower, learner.loss_fn, batch.captions, batch.image_features,
                            batch.caption_ids, batch.label_ids, accelerator, autocast, chunk_size=cfg.chunk_size,
                            length_buckets=cfg.length_buckets, seed=step_seed(cfg.seed, step))
    # a non-finite loss or gradient would turn every weight into NaN at the optimizer step: stop before it
    if not torch.isfinite(loss):
        raise Diverged(step + 1, f"loss is {float(loss)}")
    if cfg.grad_clip > 0:
        norm = accelerator.clip_grad_norm_(list(learner.named.values()), cfg.grad_clip)
    else:  # the norm alone (no rescale), so the unclipped path stays bit-identical
        norm = torch.nn.utils.get_total_norm([p.grad for p in learner.named.values() if p.grad is not None])
    if not torch.isfinite(norm):
        raise Diverged(step + 1, f"gradient norm is {float(norm)}")
    learner.optimizer.step()
    learner.scheduler.step()
    learner.optimizer.zero_grad(set_to_none=True)
    return loss


def _run_steps(learner: _Learner, batches: StepBatches, accelerator, cfg: TrainConfig, start_step: int,
               log: _LogWindow, checkpoint: Callable[[int, float], None],
               on_step: Callable[[dict], bool | None] | None, console: Console,
               validator: _Validator) -> tuple[dict, bool]:
    """Steps from ``start_step`` on, logging, validating and checkpointing on cadence. Returns (the
    last log record, whether ``on_step`` stopped the run). A validation step is always logged, so its
    val/... keys ride on that step's one log line."""
    autocast = torch.autocast(device_type=accelerator.device.type, dtype=torch.bfloat16,
                              enabled=cfg.precision == "bf16")
    learner.model.train()
    last_record: dict = {}
    with _progress(console) if accelerator.is_main_process else _NullProgress() as progress:
        task = progress.add_task("train", total=cfg.steps, completed=start_step, loss="-", rate="-")
        for step in range(start_step, cfg.steps):
            loss = _optimizer_step(learner, batches(step), accelerator, autocast, cfg, step)
            log.add(float(loss.detach()))
            done = step + 1
            validates = validator.due(done)
            new_best = False
            if done % cfg.log_every == 0 or done == cfg.steps or validates:
                scores, new_best = validator(done) if validates else ({}, False)
                last_record = log.record(done, learner, batches.epoch_of(done), scores)
                progress.update(task, completed=done, loss=f"{last_record['loss']:.3f}",
                                rate=f"{last_record['pairs_per_s']:.0f}")
                if on_step is not None and on_step(last_record) is False:
                    checkpoint(done, last_record["elapsed_s"])
                    return last_record, True
            on_cadence = cfg.checkpoint_every and done % cfg.checkpoint_every == 0
            if (on_cadence or new_best) and done < cfg.steps:  # the last step's checkpoint comes after the loop
                checkpoint(done, log.elapsed())
    return last_record, False


class _LogWindow:
    """Loss and pairs/s since the last logged step; the metrics log line (main process only)."""

    def __init__(self, path: Path, write: bool, batch_size: int, elapsed_before: float):
        self.path, self.write, self.batch_size, self.elapsed_before = path, write, batch_size, elapsed_before
        self.started = time.perf_counter()
        self.loss, self.pairs, self.window_start = 0.0, 0, self.started

    def add(self, loss: float) -> None:
        self.loss += loss
        self.pairs += self.batch_size

    def elapsed(self, now: float | None = None) -> float:
        """Seconds trained in all, earlier attempts included."""
        return self.elapsed_before + (time.perf_counter() if now is None else now) - self.started

    def record(self, step: int, learner: _Learner, epoch: float, validation: dict | None = None) -> dict:
        now = time.perf_counter()
        rate = self.pairs / max(now - self.window_start, 1e-9)
        record = {"step": step, "loss": self.loss / (self.pairs // self.batch_size),
                  "lr": learner.scheduler.get_last_lr()[0], "temperature": float(learner.loss_fn.temperature()),
                  "pairs_per_s": rate, "epoch": epoch, "elapsed_s": self.elapsed(now), **(validation or {})}
        if self.write:
            with open(self.path, "a", encoding="utf-8") as fh:
                fh.write(json.dumps(record) + "\n")
        self.loss, self.pairs, self.window_start = 0.0, 0, now
        return record


class _Validator:
    """Recall on the fixed validation subset at ``train.eval_every`` steps (and the last one).

    The main process scores (the unwrapped tower, no collective call inside) and tells the other
    ranks the scores and whether they beat the best logged so far, so every rank agrees on when to
    checkpoint. The best so far comes from the log, which a resume has already cut back to its step.
    """

    def __init__(self, recipe: Recipe, run: RunDir, data: TrainingData, learner: _Learner, accelerator):
        cfg = recipe.train
        self.every, self.last, self.ks = cfg.eval_every, cfg.steps, recipe.eval.recall_ks
        self.validation, self.learner, self.accelerator = data.validation, learner, accelerator
        self.key = PREFIX + cfg.keep_best if cfg.keep_best else None
        best = (best_logged_step(run.log_records(), self.key)
                if self.key and accelerator.is_main_process else None)
        self.best = best[1] if best else None
        if self.every and self.validation is None:
            raise AlignError("train.eval_every is on but the training data carries no validation subset",
                             "let train() prepare the data, or pass TrainingData from prepare_training_data")

    def due(self, step: int) -> bool:
        return bool(self.every) and (step % self.every == 0 or step == self.last)

    def __call__(self, step: int) -> tuple[dict, bool]:
        answer: list = [None]
        if self.accelerator.is_main_process:
            scores = validation_recall(self.learner.tower, self.validation, self.ks, self.accelerator.device)
            new_best = self.key is not None and improves(scores[self.key], self.best)
            if new_best:
                self.best = scores[self.key]
            answer[0] = (scores, new_best)
        if self.accelerator.num_processes > 1:
            import torch.distributed as dist
            dist.broadcast_object_list(answer, src=0)
        return answer[0]


def _progress(console: Console) -> Progress:
    return Progress(TextColumn("[bold]training"), BarColumn(), MofNCompleteColumn(),
                    TextColumn("loss {task.fields[loss]}"), TextColumn("{task.fields[rate]} pairs/s"),
                    TimeRemainingColumn(), console=console, transient=False)


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


# ---------------------------------------------------------------------------------------------
# after training


def check_tower_untouched(data: TrainingData) -> None:
    """Re-hash the frozen tower that embedded the rows; raise if its weights changed since.

    Only where this process holds that tower (the rank that ran it, for data it prepared itself);
    other ranks and callers' own tables have no tower here to hash. Costs one pass over the weights.
    """
    if data.image_tower is None:
        return
    now = weights_sha256(data.image_tower.model)
    if now != data.tower_fingerprint["weights_sha256"]:
        raise RuntimeError(f"the frozen image tower changed while the text tower trained (weights sha256 "
                           f"{data.tower_fingerprint['weights_sha256'][:12]}… -> {now[:12]}…): "
                           "something in this process wrote to its weights")
