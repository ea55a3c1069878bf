"""Shared fixtures: real open data (scikit-learn's bundled digits), packed once per session, and one
tiny trained, evaluated and exported run for every test that reads a run folder or an export."""
from __future__ import annotations

import json
from pathlib import Path
from typing import NamedTuple

from align.offline import use_offline_defaults

use_offline_defaults()  # before anything imports transformers: models load from local paths only, never a hub

import numpy as np
import pytest
from PIL import Image

from recipes import tiny_recipe

DIGIT_WORDS = ["zero", "one", "two", "three", "four", "five", "six", "seven", "eight", "nine"]
# Caption templates used for training only; zero-shot tests use different prompt templates.
TRAIN_TEMPLATES = ["a handwritten {}", "the digit {} written by hand", "a scanned {}, handwritten",
                   "handwriting: the number {}"]


def write_digits_folder(root, size: int = 96, limit: int | None = None) -> int:
    """scikit-learn's bundled digits (UCI optical recognition of handwritten digits, 8x8, 0..16)
    as a folder of PNG + caption + labels, upscaled to ``size`` px."""
    from sklearn.datasets import load_digits

    digits = load_digits()
    root.mkdir(parents=True, exist_ok=True)
    n = len(digits.target) if limit is None else min(limit, len(digits.target))
    rng = np.random.default_rng(0)
    for i in range(n):
        pixels = (digits.images[i] * (255.0 / 16.0)).astype(np.uint8)
        image = Image.fromarray(255 - pixels).resize((size, size), Image.BILINEAR).convert("RGB")
        word = DIGIT_WORDS[int(digits.target[i])]
        stem = f"digit-{i:04d}"
        image.save(root / f"{stem}.png")
        (root / f"{stem}.txt").write_text(TRAIN_TEMPLATES[rng.integers(len(TRAIN_TEMPLATES))].format(word))
        (root / f"{stem}.json").write_text(json.dumps({"digit": word}))
    return n


@pytest.fixture(scope="session")
def digits_shards(tmp_path_factory):
    """All 1,797 digits at 96 px, packed with a 20% validation split."""
    from align.data.pack import pack_source

    root = tmp_path_factory.mktemp("digits")
    write_digits_folder(root / "src", size=96)
    pack_source(root / "src", root / "shards", val_fraction=0.2)
    return root / "shards"


@pytest.fixture(scope="session")
def small_digits_shards(tmp_path_factory):
    """300 digits at 32 px: enough for fast loop tests (resume, frozen tower)."""
    from align.data.pack import pack_source

    root = tmp_path_factory.mktemp("digits-small")
    write_digits_folder(root / "src", size=32, limit=300)
    pack_source(root / "src", root / "shards", val_fraction=0.2)
    return root / "shards"


class TinyRun(NamedTuple):
    run: Path  # the trained run folder, evaluated (metrics.json written)
    export: Path  # its export: adapter, merged encoder, ONNX, image_side.json, card


@pytest.fixture(scope="session")
def tiny_lora_run(small_digits_shards, tmp_path_factory) -> TinyRun:
    """One tiny LoRA run on the small digits, trained, evaluated and exported once per session.

    Shared by every test that needs a trained run or an export: read it, never change it (copy the
    folder first). tests/test_export.py checks this recipe's specifics: LoRA rank 4 (alpha 8), 64 px
    images (at 32 px this tower pools photos to all-zero features) and captions cut at 16 tokens.
    """
    from align.cli import main as cli_main
    from align.evaluate import evaluate_run
    from align.training import train

    recipe = tiny_recipe(small_digits_shards, "lora", name="tiny-lora", vision__image_size=64,
                         text__lora_rank=4, text__lora_alpha=8.0, text__max_length=16,
                         train__lr=5e-3, train__log_every=2, train__threads=0)
    root = tmp_path_factory.mktemp("tiny-lora")
    train(recipe, root / "run")
    evaluate_run(root / "run")  # so the export's card carries metrics
    assert cli_main(["export", str(root / "run"), "--out", str(root / "export")]) == 0
    return TinyRun(root / "run", root / "export")
