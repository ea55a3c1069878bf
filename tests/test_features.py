"""The frozen-feature cache: hits run no tower pass, mismatches rebuild and say why, an interrupted
build resumes to the same bytes, and float16 storage stays within half precision of the fp32 tower."""
from __future__ import annotations

import io
import json
import os
import shutil
import subprocess
import sys
import textwrap
import time
from pathlib import Path

import numpy as np
import pytest
import torch
from rich.console import Console

from align import artifacts as A
from align.data.shards import iter_images, read_manifest
from align.features import AUGMENTATION, augmented_view, image_features, load_feature_cache, training_transform
from align.recipe import VisionConfig
from align.training import ViewSchedule, view_batch
from align.vision import load_image_tower

REPO = Path(__file__).resolve().parent.parent
SIZE = 64  # small inputs keep each build to a few seconds; the cache logic does not depend on size
CHUNK = 32  # vision.batch_size = rows per chunk; 238 training digits make 8 chunks


def _cfg(**kw) -> VisionConfig:
    return VisionConfig(image_size=SIZE, batch_size=CHUNK, **kw)


@pytest.fixture(scope="module")
def tower():
    return load_image_tower(_cfg())


def _console() -> tuple[Console, io.StringIO]:
    buffer = io.StringIO()
    return Console(file=buffer, width=400), buffer


def _entry_files(entry: Path) -> dict[str, bytes]:
    names = (A.FINGERPRINT, A.FEATURE_KEYS, A.FEATURE_SKIPPED, A.FEATURES)
    return {name: (entry / name).read_bytes() for name in names}


@pytest.fixture(scope="module")
def one_go(tower, small_digits_shards, tmp_path_factory):
    """The training split cached in a single uninterrupted build (the reference for the other tests)."""
    root = tmp_path_factory.mktemp("cache-one-go")
    before = tower.forward_passes
    feats = image_features(tower, small_digits_shards, "train", _cfg(), _console()[0], cache_dir=root)
    return feats, tower.forward_passes - before


@pytest.fixture(scope="module")
def val_one_go(tower, small_digits_shards, tmp_path_factory):
    """The (smaller) val split cached in one build; tests copy it rather than build it again."""
    root = tmp_path_factory.mktemp("cache-val")
    return image_features(tower, small_digits_shards, "val", _cfg(), _console()[0], cache_dir=root)


def _copy_entry(feats, root: Path) -> Path:
    shutil.copytree(feats.path, root / feats.path.name)
    return root / feats.path.name


def test_second_run_with_same_fingerprint_runs_no_forward_pass(tower, small_digits_shards, one_go):
    feats, passes = one_go
    rows = read_manifest(small_digits_shards)["splits"]["train"]["samples"]
    assert len(feats.keys) == rows and passes == -(-rows // CHUNK)  # one pass per chunk of 32
    assert feats.build is not None and feats.array.shape == (rows, 1, tower.feature_dim)
    assert feats.fingerprint["split_content_hash"] == read_manifest(small_digits_shards)["splits"]["train"][
        "content_hash"]

    # a freshly loaded tower (as a new command would have) with the same weights and preprocessing
    again = load_image_tower(_cfg())
    console, out = _console()
    second = image_features(again, small_digits_shards, "train", _cfg(), console, cache_dir=feats.path.parent)
    assert again.forward_passes == 0 and second.build is None
    assert "reusing cached train features" in out.getvalue()
    assert second.path == feats.path and np.array_equal(np.asarray(second.array), np.asarray(feats.array))
    assert isinstance(second.array, np.memmap) and not second.array.flags.writeable


def test_changed_preprocessing_rebuilds_and_names_the_field(tower, small_digits_shards, one_go):
    root = one_go[0].path.parent
    cfg = VisionConfig(image_size=SIZE + 8, batch_size=CHUNK)
    other = load_image_tower(cfg)
    console, out = _console()
    feats = image_features(other, small_digits_shards, "train", cfg, console, cache_dir=root)
    text = out.getvalue()
    assert other.forward_passes > 0 and feats.path != one_go[0].path
    assert "rebuilding train features" in text
    assert f"tower.preprocessing.input_size: [3, {SIZE}, {SIZE}] -> [3, {SIZE + 8}, {SIZE + 8}]" in text


def test_changed_weights_file_rebuilds_and_names_the_hash(tower, small_digits_shards, val_one_go, tmp_path):
    root = tmp_path / "cache"
    _copy_entry(val_one_go, root)
    state = {k: v.detach().clone().contiguous() for k, v in tower.model.state_dict().items()}
    first = next(k for k in state if k.endswith("bn1.bias"))
    state[first] += 0.01  # a fine-tuned copy of the same architecture
    weights = tmp_path / "tuned.pth"  # a plain state dict keeps timm's tensor order (safetensors sorts names)
    torch.save(state, weights)
    cfg = _cfg(weights=str(weights))
    tuned = load_image_tower(cfg)
    console, out = _console()
    image_features(tuned, small_digits_shards, "val", cfg, console, cache_dir=root)
    assert tuned.forward_passes > 0
    assert "rebuilding val features" in out.getvalue() and "tower.weights_sha256" in out.getvalue()
    assert len([p for p in root.iterdir() if (p / A.FEATURES).is_file()]) == 2


def test_damaged_entry_is_rebuilt_with_the_reason(tower, small_digits_shards, val_one_go, tmp_path):
    reference = _entry_files(val_one_go.path)
    with open(_copy_entry(val_one_go, tmp_path) / A.FEATURES, "r+b") as fh:
        fh.truncate(1000)  # a copy cut short
    console, out = _console()
    again = image_features(tower, small_digits_shards, "val", _cfg(), console, cache_dir=tmp_path)
    assert "rebuilding feature cache" in out.getvalue() and "holds 1000 bytes" in out.getvalue()
    assert again.build is not None and _entry_files(again.path) == reference


BUILD_SCRIPT = textwrap.dedent("""
    import sys, time
    from rich.console import Console
    from align.features import image_features
    from align.recipe import VisionConfig
    from align.vision import load_image_tower
    shards, root = sys.argv[1], sys.argv[2]
    cfg = VisionConfig(image_size={size}, batch_size={chunk})
    # a pause after each finished chunk gives the test time to kill the build in the middle
    image_features(load_image_tower(cfg), shards, "train", cfg, Console(stderr=True), cache_dir=root,
                   on_chunk=lambda index: time.sleep(0.4))
""").format(size=SIZE, chunk=CHUNK)


def test_killed_build_resumes_to_a_byte_identical_cache(tower, small_digits_shards, one_go, tmp_path):
    root = tmp_path / "cache"
    env = dict(os.environ, PYTHONPATH=str(REPO))
    proc = subprocess.Popen([sys.executable, "-c", BUILD_SCRIPT, str(small_digits_shards), str(root)],
                            env=env, stdout=subprocess.DEVNULL, stderr=subprocess.PIPE)
    deadline = time.monotonic() + 240
    chunks = []
    while time.monotonic() < deadline and proc.poll() is None:
        chunks = list(root.glob(f"*/{A.FEATURE_CHUNKS}/*.npz"))
        if len(chunks) >= 3:
            break
        time.sleep(0.02)
    proc.kill()  # SIGKILL: no handler runs, whatever was being written stays half written
    proc.wait()
    assert len(chunks) >= 3, proc.stderr.read().decode()[-2000:]
    entry = chunks[0].parent.parent
    assert not (entry / A.FEATURES).exists(), "the build finished before it was killed"
    finished = len(list((entry / A.FEATURE_CHUNKS).glob("*.npz")))

    seen: list[int] = []
    before = tower.forward_passes
    console, out = _console()
    resumed = image_features(tower, small_digits_shards, "train", _cfg(), console, cache_dir=root,
                             on_chunk=seen.append)
    total_chunks = -(-len(one_go[0].keys) // CHUNK)
    assert "resuming the train feature build" in out.getvalue()
    assert seen[0] == finished and seen[-1] == total_chunks - 1  # it continued, it did not start over
    assert tower.forward_passes - before == total_chunks - finished
    assert resumed.path.name == one_go[0].path.name
    assert _entry_files(resumed.path) == _entry_files(one_go[0].path)
    assert not (resumed.path / A.FEATURE_CHUNKS).exists()


def test_float16_cache_is_within_half_precision_of_the_fp32_tower(tower, small_digits_shards, val_one_go):
    feats = val_one_go
    # read the raw file, not through the loader: float16 rows of (N, K=1, D)
    stored = np.fromfile(feats.path / A.FEATURES, dtype=np.float16).reshape(len(feats.keys), tower.feature_dim)
    keys, pixels = [], []
    for key, image in iter_images(small_digits_shards, "val"):
        keys.append(key)
        pixels.append(tower.preprocess(image))
    assert keys == feats.keys
    reference = torch.cat([tower.embed_pixels(torch.stack(pixels[i:i + CHUNK]))
                           for i in range(0, len(pixels), CHUNK)]).numpy()  # (N, D) fp32, unit norm
    cached = stored.astype(np.float32)
    # IEEE 754 binary16 keeps an 11-bit significand: round-to-nearest error <= 2^-11 relative,
    # plus half the smallest subnormal (2^-25) near zero
    assert np.all(np.abs(cached - reference) <= np.abs(reference) * 2.0 ** -11 + 2.0 ** -25)
    assert np.abs(cached - reference).max() <= 1e-3  # the tolerance
    cosine = (cached * reference).sum(1) / np.linalg.norm(cached, axis=1) / np.linalg.norm(reference, axis=1)
    assert cosine.min() >= 0.9999
    # the loader's float32 view is re-normalised (unit norm to float32 rounding)
    assert torch.allclose(feats.embeddings.norm(dim=1), torch.ones(len(keys)), atol=1e-6)


def test_decoding_workers_give_the_same_bytes(tower, small_digits_shards, val_one_go, tmp_path):
    # two DataLoader worker processes decode alternate samples; the stream must keep canonical order
    feats = image_features(tower, small_digits_shards, "val", _cfg(workers=2), _console()[0], cache_dir=tmp_path)
    assert feats.build is not None and _entry_files(feats.path) == _entry_files(val_one_go.path)


def test_augmented_views_are_seeded_per_key_and_view(tower, small_digits_shards, val_one_go, tmp_path):
    plain = val_one_go
    three = image_features(tower, small_digits_shards, "val", _cfg(), _console()[0], views=3,
                           cache_dir=tmp_path / "a")
    again = image_features(tower, small_digits_shards, "val", _cfg(), _console()[0], views=3,
                           cache_dir=tmp_path / "b")
    assert three.array.shape == (len(plain.keys), 3, tower.feature_dim) and three.path != plain.path
    assert three.fingerprint["augmentation"] == AUGMENTATION and plain.fingerprint["augmentation"] is None
    assert _entry_files(again.path) == _entry_files(three.path)  # seeded by (key, view): rebuilds agree
    views = np.asarray(three.array, dtype=np.float32)
    assert np.array_equal(three.array[:, 0], plain.array[:, 0])  # view 0 is the plain entry's rows, bit for bit
    cos = lambda a, b: (a * b).sum(-1) / np.linalg.norm(a, axis=-1) / np.linalg.norm(b, axis=-1)  # noqa: E731
    assert np.median(cos(views[:, 1], views[:, 0])) < 0.999 and np.median(cos(views[:, 1], views[:, 2])) < 0.999

    # one view by hand: timm's training transform under the (key, view) seed, caller's RNG untouched
    key, image = next(iter(iter_images(small_digits_shards, "val")))
    transform = training_transform(tower.preprocessing)
    torch.manual_seed(123)
    expected_next = torch.rand(1)
    torch.manual_seed(123)
    first = augmented_view(transform, image, key, 1)
    assert torch.equal(torch.rand(1), expected_next)
    assert torch.equal(first, augmented_view(transform, image, key, 1))
    assert not torch.equal(first, augmented_view(transform, image, key, 2))
    embedded = tower.embed_pixels(first[None]).numpy()[0]
    # same image, other batch mates: float16 storage (<= 2^-11, IEEE 754) plus float32 reordering noise
    assert np.abs(embedded - views[three.keys.index(key), 1]).max() <= 2e-3


def test_plain_view_is_computed_once_however_many_views(tower, small_digits_shards, val_one_go, tmp_path):
    # evaluation reads the plain entry, training the K-view one: the plain view runs through the
    # tower once per image for both, the K-view entry taking its view 0 from the plain entry
    chunks = -(-len(val_one_go.keys) // CHUNK)
    before = tower.forward_passes
    three = image_features(tower, small_digits_shards, "val", _cfg(), _console()[0], views=3, cache_dir=tmp_path)
    assert tower.forward_passes - before == 3 * chunks  # per chunk: the plain view and two augmented ones
    before = tower.forward_passes
    console, out = _console()
    plain = image_features(tower, small_digits_shards, "val", _cfg(), console, cache_dir=tmp_path)
    assert tower.forward_passes == before and plain.build is None and "reusing cached val features" in out.getvalue()
    assert _entry_files(plain.path) == _entry_files(val_one_go.path)  # the same bytes as a plain build alone
    assert np.array_equal(three.array[:, 0], plain.array[:, 0])

    # the other order: a plain entry already there, a K-view build runs the tower for views 1..K-1 only
    before = tower.forward_passes
    two = image_features(tower, small_digits_shards, "val", _cfg(), _console()[0], views=2, cache_dir=tmp_path)
    assert tower.forward_passes - before == chunks
    assert np.array_equal(two.array[:, 0], plain.array[:, 0]) and np.array_equal(two.array[:, 1], three.array[:, 1])
    assert sorted(p.name for p in tmp_path.iterdir()) == sorted(f.path.name for f in (plain, two, three))


def test_view_schedule_is_a_function_of_seed_and_epoch():
    schedule = ViewSchedule(n=10, views=3, batch_size=4, seed=5)
    rows = torch.tensor([3, 1, 7, 0])
    a = schedule.views_for(0, rows)
    b = ViewSchedule(n=10, views=3, batch_size=4, seed=5).views_for(0, rows)
    assert torch.equal(a, b) and a.min() >= 0 and a.max() < 3
    # step 2 covers positions 8..11: rows 0-1 of it are in epoch 0, rows 2-3 in epoch 1
    every_epoch = [ViewSchedule(10, 3, 10, 5).views_for(e, torch.arange(10)) for e in range(4)]
    assert any(not torch.equal(every_epoch[0], e) for e in every_epoch[1:])  # views change between epochs
    image_views = torch.randn(10, 3, 8).half()
    picked = view_batch(image_views, rows, a)
    assert picked.dtype == torch.float32 and torch.allclose(picked.norm(dim=1), torch.ones(4), atol=1e-6)
    assert torch.allclose(picked, torch.nn.functional.normalize(image_views[rows, a].float(), dim=-1))


def test_align_features_command_builds_then_reuses(small_digits_shards, tmp_path, capsys):
    from align.cli import main

    args = ["features", str(REPO / "recipes" / "lora-cpu.toml"),
            "--set", f"data.shards={json.dumps(str(small_digits_shards))}",
            "--set", f"vision.image_size={SIZE}", "--set", f"vision.feature_cache={json.dumps(str(tmp_path))}"]
    rows = read_manifest(small_digits_shards)["splits"]["train"]["samples"]
    assert main(args) == 0
    first = " ".join(capsys.readouterr().err.split())  # rich wraps long lines
    assert f"train: {rows} images x 1 view(s) (built," in first and first.count("(built,") == 2
    assert main(args) == 0
    second = " ".join(capsys.readouterr().err.split())
    assert second.count("(already cached)") == 2 and "(built," not in second
    entries = [p for p in tmp_path.iterdir() if (p / A.FEATURES).is_file()]
    assert sorted(load_feature_cache(p).fingerprint["split"] for p in entries) == ["train", "val"]


def test_training_samples_one_cached_view_per_epoch(small_digits_shards, tmp_path):
    from align.training import prepare_training_data, train
    from recipes import tiny_recipe

    recipe = tiny_recipe(small_digits_shards, "lora", name="views", vision__views=2,
                         vision__feature_cache=str(tmp_path / "cache"), train__steps=3, train__lr=5e-4,
                         train__threads=0)
    data = prepare_training_data(recipe, _console()[0])
    n = len(data.keys)
    assert data.image_views.shape == (n, 2, data.image_features.shape[1]) and data.image_views.dtype == torch.float16
    assert (data.image_views[:, 0].float() - data.image_features).abs().max() <= 1e-3  # view 0 is the plain one
    losses = []
    summary = train(recipe, tmp_path / "run", console=_console()[0], data=data,
                    on_step=lambda record: losses.append(record["loss"]))
    assert summary["steps"] == 3 and len(losses) == 3 and all(np.isfinite(losses))
