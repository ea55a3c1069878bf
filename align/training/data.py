"""The loop's data: the training split lined up with its frozen features (and, with validation on,
the fixed validation subset), opened by every rank from the same files, and what each step trains
on (the seeded batch, and with several cached views, one view per row per epoch).

Nothing of the table is held in memory: the features stay float16 in the cache's memory map, the
captions and ids in the training table's (``align.features.table``). Each step reads only its B
rows, in the sampler's order, and moves them to the device. Memory therefore does not grow with the
split beyond the page cache (4M pairs of 1,280-d float32 held per process would be ~20 GB).
"""
from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np
import torch
import torch.nn.functional as F
from rich.console import Console

from ..errors import AlignError
from ..features import FeatureSet, cache_root, split_features
from ..features.table import CaptionColumn, TrainingTable, split_table
from ..recipe import Recipe
from ..run import shards_dir
from ..seeding import VIEW_STREAM, epoch_generator
from ..vision import FrozenImageTower
from .sampler import EpochSampler
from .validation import ValidationSet, prepare_validation


@dataclass
class TrainingData:
    """The training split, rows aligned: caption i describes the feature row ``table.feature_rows[i]``.

    ``positives`` (the recipe's ``loss.positives``) picks which of the table's ids a step carries."""

    table: TrainingTable
    features: FeatureSet  # (M, K, D) float16 memory map; K = vision.views
    positives: str
    tower_fingerprint: dict
    validation: ValidationSet | None = None  # the fixed validation subset, when train.eval_every is on
    # the tower that embedded the rows, where this process holds it, so the loop can prove it
    # unchanged at the end
    image_tower: FrozenImageTower | None = field(default=None, repr=False, compare=False)

    def __len__(self) -> int:
        return len(self.table)

    @property
    def captions(self) -> CaptionColumn:
        return self.table.captions

    @property
    def feature_dim(self) -> int:
        return self.features.dim

    @property
    def views(self) -> int:
        return self.features.views

    def ids(self, rows: torch.Tensor) -> tuple[torch.Tensor, torch.Tensor | None]:
        """(caption_ids, label_ids) of ``rows`` as ``align.loss.positive_ids`` gives them for this
        positives setting: -1 everywhere for ``pair``; label ids only for ``caption+labels``. (B,) each"""
        index = rows.numpy()
        if self.positives == "pair":
            return torch.full((len(index),), -1, dtype=torch.long), None
        caption_ids = torch.from_numpy(np.asarray(self.table.caption_ids[index], dtype=np.int64))
        if self.positives == "caption":
            return caption_ids, None
        return caption_ids, torch.from_numpy(np.asarray(self.table.label_ids[index], dtype=np.int64))

    def image_rows(self, rows: torch.Tensor) -> torch.Tensor:
        """The plain view of ``rows``, float32, re-normalised after the float16 round trip. (B, D)"""
        return self.features.unit_rows(self.table.feature_rows[rows.numpy()])

    def stored_views(self, rows: torch.Tensor, views: torch.Tensor) -> torch.Tensor:
        """View ``views[i]`` of row ``rows[i]``, float16 exactly as cached. (B, D)"""
        picked = self.features.array[self.table.feature_rows[rows.numpy()], views.numpy()]
        return torch.from_numpy(np.ascontiguousarray(picked))

    # the whole table at once: for checks on small data (tests, tools); the loop never calls these

    @property
    def keys(self) -> list[str]:
        keys = self.features.keys
        return [keys[int(i)] for i in self.table.feature_rows]

    @property
    def image_features(self) -> torch.Tensor:
        """Every row's plain view as the steps see it. (N, D) float32"""
        return self.image_rows(torch.arange(len(self)))

    @property
    def image_views(self) -> torch.Tensor | None:
        """Every row's cached views, float16. (N, K, D); None with one view"""
        if self.views == 1:
            return None
        return torch.from_numpy(np.ascontiguousarray(self.features.array[np.asarray(self.table.feature_rows)]))


def prepare_training_data(recipe: Recipe, console: Console) -> TrainingData:
    """The training split's features (the tower's cache, built on a miss, or the stored vectors) and
    its training table (built on a miss), opened by path; the validation subset when it is on."""
    data_dir = shards_dir(recipe)
    split = recipe.data.train_split
    side = split_features(recipe.vision, data_dir, split, console, views=recipe.vision.views)
    table = split_table(side.features, data_dir, split, cache_root(data_dir, recipe.vision), console)
    validation = prepare_validation(recipe, data_dir, console) if recipe.train.eval_every else None
    return TrainingData(table=table, features=side.features, positives=recipe.loss.positives,
                        tower_fingerprint=side.fingerprint, validation=validation, image_tower=side.tower)


def prepare_tables(recipe: Recipe, console: Console) -> list[TrainingTable]:
    """Every training table a recipe's run opens (the train split's, and the validation split's when
    train.eval_every is on), built now so training starts without reading the shards."""
    data_dir = shards_dir(recipe)
    wanted = [(recipe.data.train_split, recipe.vision.views)]
    if recipe.train.eval_every:
        wanted.append((recipe.data.eval_split, 1))
    tables = []
    for split, views in wanted:
        feats = split_features(recipe.vision, data_dir, split, console, views=views).features
        tables.append(split_table(feats, data_dir, split, cache_root(data_dir, recipe.vision), console))
    return tables


def shared_training_data(recipe: Recipe, console: Console, accelerator) -> TrainingData:
    """The training table on every rank, each opening the same files by path; nothing is sent.

    Every rank asks for the features and the table at once: the first to take an entry's lock
    builds it (the feature build may share the work out over the ranks), the others wait on the
    lock and open what it wrote. Ranks must therefore see the same cache folder (a shared disk, or
    each machine building its own identical copy). An ``AlignError`` on any rank reaches every rank,
    so none waits forever in the loop's first collective call."""
    if accelerator.num_processes == 1:
        return prepare_training_data(recipe, console)
    import torch.distributed as dist

    data, failure = None, None
    try:
        data = prepare_training_data(recipe, console if accelerator.is_main_process else Console(stderr=True, quiet=True))
    except AlignError as exc:
        failure = exc
    failures: list = [None] * accelerator.num_processes
    dist.all_gather_object(failures, failure)
    first = next((f for f in failures if f is not None), None)
    if first is not None:
        raise first
    return data


class ViewSchedule:
    """Which cached view each training row shows in each epoch.

    Drawn from (seed, epoch) alone, like the batch order, so a resumed run replays the same views.
    """

    def __init__(self, n: int, views: int, batch_size: int, seed: int):
        self.n, self.views, self.batch_size, self.seed = n, views, batch_size, seed
        self._epoch, self._choice = -1, torch.empty(0, dtype=torch.long)

    def _for_epoch(self, epoch: int) -> torch.Tensor:
        if epoch != self._epoch:
            generator = epoch_generator(self.seed, epoch, VIEW_STREAM)
            self._epoch, self._choice = epoch, torch.randint(self.views, (self.n,), generator=generator)
        return self._choice  # (n,)

    def views_for(self, step: int, rows: torch.Tensor) -> torch.Tensor:
        """The view of each row of ``step``'s batch (``rows`` as the sampler gave them). (B,) long"""
        positions = torch.arange(step * self.batch_size, step * self.batch_size + len(rows))
        epochs = (positions // self.n).tolist()
        return torch.tensor([int(self._for_epoch(e)[int(r)]) for e, r in zip(epochs, rows.tolist())])


def unit_float(rows: torch.Tensor) -> torch.Tensor:
    """float16 rows as unit-norm float32, on the rows' device. (B, D)"""
    return F.normalize(rows.float(), dim=-1)


def view_batch(image_views: torch.Tensor, rows: torch.Tensor, views: torch.Tensor) -> torch.Tensor:
    """Pick one view per row from (N, K, D) float16 and return unit-norm float32. (B, D)"""
    return unit_float(image_views[rows, views.to(rows.device)])


@dataclass
class StepBatch:
    """One step's inputs: this rank's captions (b), the global batch's image rows and ids (B)."""

    captions: list[str]
    image_features: torch.Tensor  # (B, D) float32, unit norm
    caption_ids: torch.Tensor  # (B,)
    label_ids: torch.Tensor | None  # (B,)


class StepBatches:
    """What each step trains on: a function of (seed, step) only, the same global batch on every rank.

    Each rank encodes its own slice of the captions (rows ``rank * b`` on); the loss sees the whole
    batch. With several cached views, each row shows the view the schedule drew for its epoch. Only
    the step's rows are read from the memory maps; the plain view is normalised on the CPU and the
    picked views on the device, where the in-memory table normalised them, so the numbers match.
    """

    def __init__(self, data: TrainingData, batch_size: int, seed: int, world: int, rank: int,
                 device: torch.device):
        if batch_size % world:
            raise AlignError(f"train.batch_size {batch_size} does not split over {world} processes",
                             f"use a multiple of {world}")
        self.data, self.rank, self.local, self.device = data, rank, batch_size // world, device
        self.sampler = EpochSampler(len(data), batch_size, seed)
        self.views = ViewSchedule(len(data), data.views, batch_size, seed) if data.views > 1 else None

    def __call__(self, step: int) -> StepBatch:
        batch = self.sampler.batch(step)  # (B,) global indices, identical on every rank
        mine = batch[self.rank * self.local:(self.rank + 1) * self.local]  # (b,) this rank's slice
        if self.views is None:
            images = self.data.image_rows(batch).to(self.device)  # (B, D)
        else:
            images = unit_float(self.data.stored_views(batch, self.views.views_for(step, batch)).to(self.device))
        caption_ids, label_ids = self.data.ids(batch)
        return StepBatch([self.data.captions[i] for i in mine.tolist()], images, caption_ids, label_ids)

    def epoch_of(self, step: int) -> float:
        return self.sampler.epoch_of(step)
