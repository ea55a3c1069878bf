"""The loop's data: the training split lined up with its frozen features (and, with validation on,
the fixed validation subset), shared by every rank, and what each step trains on (the seeded batch,
and with several cached views, one view per row per epoch).
"""
from __future__ import annotations

import dataclasses
from dataclasses import dataclass, field

import torch
import torch.nn.functional as F
from rich.console import Console

from ..data.shards import load_table
from ..errors import AlignError
from ..features import split_features
from ..loss import positive_ids
from ..recipe import Recipe
from ..run import shards_dir
from ..seeding import VIEW_STREAM, epoch_generator
from ..vision import FrozenImageTower
from .sampler import EpochSampler
from .validation import ValidationSet, prepare_validation


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
    validation: ValidationSet | None = None  # the fixed validation subset, when train.eval_every is on
    # the tower that embedded the rows, where this process holds it (the rank that ran it), so the
    # loop can prove it unchanged at the end; never sent to other ranks
    image_tower: FrozenImageTower | None = field(default=None, repr=False, compare=False)


def prepare_training_data(recipe: Recipe, console: Console) -> TrainingData:
    """Embed the training images once with the frozen tower and line them up with their captions."""
    data_dir = shards_dir(recipe)
    table = load_table(data_dir, recipe.data.train_split)
    # the tower's cached features or stored vectors; evaluation in the same process reuses the tower
    side = split_features(recipe.vision, data_dir, recipe.data.train_split, console, views=recipe.vision.views)
    feats, tower = side.features, side.tower
    keep = set(feats.keys)
    rows = [i for i, k in enumerate(table.keys) if k in keep]  # images that failed to decode drop out
    keys = [table.keys[i] for i in rows]
    captions = [table.captions[i] for i in rows]
    labels = [table.labels[i] for i in rows]
    caption_ids, label_ids = positive_ids(captions, labels, recipe.loss.positives)
    validation = prepare_validation(recipe, data_dir, console) if recipe.train.eval_every else None
    return TrainingData(keys=keys, captions=captions, labels=labels, image_features=feats.rows_for(keys),
                        caption_ids=caption_ids, label_ids=label_ids, tower_fingerprint=side.fingerprint,
                        image_views=feats.view_rows_for(keys) if feats.views > 1 else None, validation=validation,
                        image_tower=tower)


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
    prepared = None
    if accelerator.is_main_process:
        try:
            prepared = prepare_training_data(recipe, console)
            box[0] = dataclasses.replace(prepared, image_tower=None)  # the table travels, the tower stays
        except AlignError as exc:  # the others must hear of it, or they wait in the broadcast forever
            box[0] = exc
    dist.broadcast_object_list(box, src=0)
    if isinstance(box[0], AlignError):
        raise box[0]
    return prepared if prepared is not None else box[0]


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


def view_batch(image_views: torch.Tensor, rows: torch.Tensor, views: torch.Tensor) -> torch.Tensor:
    """Pick one view per row from (N, K, D) float16 and return unit-norm float32. (B, D)"""
    return F.normalize(image_views[rows, views.to(rows.device)].float(), dim=-1)


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
    batch. With several cached views, each row shows the view the schedule drew for its epoch.
    """

    def __init__(self, data: TrainingData, batch_size: int, seed: int, world: int, rank: int,
                 device: torch.device):
        if batch_size % world:
            raise AlignError(f"train.batch_size {batch_size} does not split over {world} processes",
                             f"use a multiple of {world}")
        self.data, self.rank, self.local = data, rank, batch_size // world
        self.sampler = EpochSampler(len(data.captions), batch_size, seed)
        self.features = data.image_features.to(device)  # (N, D)
        self.image_views = data.image_views.to(device) if data.image_views is not None else None  # (N, K, D)
        self.views = (ViewSchedule(len(data.captions), self.image_views.shape[1], batch_size, seed)
                      if self.image_views is not None else None)

    def __call__(self, step: int) -> StepBatch:
        batch = self.sampler.batch(step)  # (B,) global indices, identical on every rank
        mine = batch[self.rank * self.local:(self.rank + 1) * self.local]  # (b,) this rank's slice
        images = (self.features[batch] if self.views is None
                  else view_batch(self.image_views, batch, self.views.views_for(step, batch)))
        label_ids = self.data.label_ids[batch] if self.data.label_ids is not None else None
        return StepBatch([self.data.captions[i] for i in mine.tolist()], images, self.data.caption_ids[batch],
                         label_ids)

    def epoch_of(self, step: int) -> float:
        return self.sampler.epoch_of(step)
