"""Training: the text tower learns, the image tower stays frozen.

    data.py     TrainingData (the split lined up with its frozen features, shared by every rank),
                the per-epoch view schedule, and what each step trains on
    sampler.py  the seeded batch stream and the learning-rate schedule
    step.py     one contrastive step's forward and backward (whole slice, or gradient caching)
    loop.py     ``train``: the phases, logging, checkpoints, resume

Only the edges (the CLI, the demo pipeline, the service worker) import this package.
"""
from .data import StepBatches, TrainingData, ViewSchedule, prepare_training_data, shared_training_data, view_batch
from .loop import check_tower_untouched, param_groups, start_accelerator, train
from .sampler import EpochSampler, warmup_cosine
from .step import chunk_seed, contrastive_step, step_seed

__all__ = ["EpochSampler", "StepBatches", "TrainingData", "ViewSchedule", "check_tower_untouched", "chunk_seed",
           "contrastive_step", "param_groups", "prepare_training_data", "shared_training_data",
           "start_accelerator", "step_seed", "train", "view_batch", "warmup_cosine"]
