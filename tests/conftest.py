"""Shared fixtures: real open data (scikit-learn's bundled digits), packed once per session."""
from __future__ import annotations

import json

from align.offline import use_offline_defaults

use_offline_defaults()  # before anything imports transformers: models load from local paths only, never a hub

import numpy as np
import pytest
from PIL import Image

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
