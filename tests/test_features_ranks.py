"""A cache entry built by several processes is the one a single process builds, byte for byte:
ranks under torchrun (a real gloo group), local build processes (``--processes N``), two commands
at once with one of them killed, a build killed and resumed by another number of processes, and
one torch thread against two (the last, partial chunk included).

The reference throughout is the one-process build of the same split: byte-equality with it is the
claim (issue: "the one-process build stays byte-identical").
"""
from __future__ import annotations

import io
import json
import os
import subprocess
import sys
import textwrap
import time
from pathlib import Path

import pytest
import torch
from rich.console import Console

from align import artifacts as A
from align.features import image_features
from align.features import processes as build_processes
from align.offline import offline_env
from align.recipe import VisionConfig
from align.vision import load_image_tower

REPO = Path(__file__).resolve().parent.parent
SIZE, CHUNK = 64, 32  # 238 training digits: 7 full chunks of 32 and a last one of 14


def _cfg(**kw) -> VisionConfig:
    return VisionConfig(image_size=SIZE, batch_size=CHUNK, **kw)


def _console() -> tuple[Console, io.StringIO]:
    buffer = io.StringIO()
    return Console(file=buffer, width=400), buffer


def _entry_files(entry: Path) -> dict[str, bytes]:
    return {name: (entry / name).read_bytes() for name in (A.FINGERPRINT, A.FEATURE_KEYS, A.FEATURE_SKIPPED,
                                                            A.FEATURES)}


@pytest.fixture(scope="module")
def tower():
    return load_image_tower(_cfg())


@pytest.fixture(scope="module")
def one_process(tower, small_digits_shards, tmp_path_factory):
    """The training split built by one process at torch's default thread count: the reference."""
    return image_features(tower, small_digits_shards, "train", _cfg(), _console()[0],
                          cache_dir=tmp_path_factory.mktemp("one-process"))


def _env() -> dict:
    return offline_env(dict(os.environ, PYTHONPATH=str(REPO), OMP_NUM_THREADS="1"))


def test_one_thread_and_two_threads_give_the_same_bytes(tower, small_digits_shards, one_process, tmp_path):
    # every chunk runs through the tower as a batch of CHUNK rows, the last one padded: the same
    # shape picks the same kernels at any thread count (a 14-row batch did not: issue 15)
    threads = torch.get_num_threads()
    try:
        for count in (1, 2):
            torch.set_num_threads(count)
            feats = image_features(tower, small_digits_shards, "train", _cfg(), _console()[0],
                                   cache_dir=tmp_path / f"threads-{count}")
            assert feats.build is not None and len(feats) % CHUNK != 0  # a partial last chunk is in the test
            assert _entry_files(feats.path) == _entry_files(one_process.path), f"{count} thread(s)"
    finally:
        torch.set_num_threads(threads)


def test_two_local_processes_give_the_one_process_bytes(tower, small_digits_shards, one_process, tmp_path):
    seen: list[int] = []
    before = tower.forward_passes
    feats = image_features(tower, small_digits_shards, "train", _cfg(), _console()[0], cache_dir=tmp_path,
                           processes=2, on_chunk=seen.append)
    assert feats.build is not None and feats.build.images == len(feats) and feats.build.images_per_s > 0
    assert sorted(seen) == list(range(-(-len(feats) // CHUNK)))  # every chunk once, whoever embedded it
    assert _entry_files(feats.path) == _entry_files(one_process.path)
    assert tower.forward_passes == before  # the build processes ran the tower, this one only waited
    assert not (feats.path / A.FEATURE_CHUNKS).exists()


def test_spawned_processes_load_the_tower_themselves(tower, small_digits_shards, tmp_path, monkeypatch):
    # the path for towers that are not torch modules (onnxruntime sessions do not survive a fork),
    # taken here by the timm tower: each process loads it from the recipe and must match it
    reference = image_features(tower, small_digits_shards, "val", _cfg(), _console()[0], cache_dir=tmp_path / "one")
    monkeypatch.setattr(build_processes, "_start_method", lambda _tower: "spawn")
    feats = image_features(tower, small_digits_shards, "val", _cfg(), _console()[0], cache_dir=tmp_path / "two",
                           processes=2)
    assert feats.build is not None and _entry_files(feats.path) == _entry_files(reference.path)


RANK_SCRIPT = textwrap.dedent("""
    import json, os, sys, time
    from align.offline import use_offline_defaults
    use_offline_defaults()
    import torch.distributed as dist
    from rich.console import Console
    from align.features import image_features
    from align.recipe import VisionConfig
    from align.vision import load_image_tower
    shards, root, out = sys.argv[1], sys.argv[2], sys.argv[3]
    dist.init_process_group("gloo")  # the group `align train` runs in; the build itself needs none
    rank = dist.get_rank()
    cfg = VisionConfig(image_size={size}, batch_size={chunk})
    tower = load_image_tower(cfg)
    dist.barrier()  # both ranks hold their tower: both start walking the split together
    # a pause per chunk keeps either rank from finishing the split before the other starts
    feats = image_features(tower, shards, "train", cfg, Console(stderr=True), cache_dir=root,
                           on_chunk=lambda index: time.sleep(0.2))
    dist.barrier()
    with open(os.path.join(out, f"rank{{rank}}.json"), "w") as fh:
        json.dump({{"entry": str(feats.path), "images": feats.build.images if feats.build else 0,
                    "rows": len(feats)}}, fh)
    dist.destroy_process_group()
""").format(size=SIZE, chunk=CHUNK)


def test_two_ranks_under_torchrun_give_the_one_process_bytes(small_digits_shards, one_process, tmp_path):
    script = tmp_path / "rank_build.py"
    script.write_text(RANK_SCRIPT)
    proc = subprocess.run([sys.executable, "-m", "torch.distributed.run", "--standalone", "--nproc_per_node=2",
                           str(script), str(small_digits_shards), str(tmp_path / "cache"), str(tmp_path)],
                          env=_env(), cwd=REPO, capture_output=True, text=True, timeout=300)
    assert proc.returncode == 0, proc.stderr[-3000:]
    ranks = [json.loads((tmp_path / f"rank{r}.json").read_text()) for r in (0, 1)]
    assert ranks[0]["entry"] == ranks[1]["entry"] and ranks[0]["rows"] == ranks[1]["rows"] == len(one_process)
    assert all(r["images"] > 0 for r in ranks)  # each rank embedded a share
    assert ranks[0]["images"] + ranks[1]["images"] == len(one_process)  # and no image twice
    assert _entry_files(Path(ranks[0]["entry"])) == _entry_files(one_process.path)


BUILD_SCRIPT = textwrap.dedent("""
    import sys, time
    from rich.console import Console
    from align.features import image_features
    from align.recipe import VisionConfig
    from align.vision import load_image_tower
    shards, root, workers = sys.argv[1], sys.argv[2], int(sys.argv[3])
    cfg = VisionConfig(image_size={size}, batch_size={chunk}, workers=workers)
    # a pause after each finished chunk gives the test time to kill the build in the middle
    image_features(load_image_tower(cfg), shards, "train", cfg, Console(stderr=True), cache_dir=root,
                   on_chunk=lambda index: time.sleep(0.5))
""").format(size=SIZE, chunk=CHUNK)


def _start_build(shards: Path, root: Path, workers: int) -> subprocess.Popen:
    return subprocess.Popen([sys.executable, "-c", BUILD_SCRIPT, str(shards), str(root), str(workers)],
                            env=_env(), stdout=subprocess.DEVNULL, stderr=subprocess.PIPE)


def _wait_for_chunks(proc: subprocess.Popen, root: Path, count: int) -> Path:
    deadline = time.monotonic() + 240
    chunks: list[Path] = []
    while time.monotonic() < deadline and proc.poll() is None:
        chunks = list(root.glob(f"*/{A.FEATURE_CHUNKS}/*.npz"))
        if len(chunks) >= count:
            break
        time.sleep(0.02)
    if len(chunks) < count:
        proc.kill()
        pytest.fail(proc.stderr.read().decode()[-2000:])
    return chunks[0].parent.parent


def test_killed_build_resumed_by_two_processes_gives_the_same_bytes(tower, small_digits_shards, one_process,
                                                                     tmp_path):
    root = tmp_path / "cache"
    proc = _start_build(small_digits_shards, root, workers=0)
    entry = _wait_for_chunks(proc, root, 3)
    proc.kill()  # SIGKILL: no handler runs, whatever was being written stays half written
    proc.wait()
    assert not (entry / A.FEATURES).exists(), "the build finished before it was killed"
    finished = len(list((entry / A.FEATURE_CHUNKS).glob("*.npz")))

    console, out = _console()
    resumed = image_features(tower, small_digits_shards, "train", _cfg(), console, cache_dir=root, processes=2)
    assert "resuming the train feature build" in out.getvalue()
    assert resumed.build.resumed_chunks == finished and resumed.build.images == len(one_process) - finished * CHUNK
    assert _entry_files(resumed.path) == _entry_files(one_process.path)


def test_second_command_joins_and_finishes_what_a_killed_one_left(tower, small_digits_shards, one_process,
                                                                   tmp_path):
    # two commands build one entry at once; the first, with a decoding worker claiming chunks
    # ahead of its tower, is killed half-way: the second skips its claims while building, then
    # (alone, the lock exclusive) embeds the chunks it left and assembles the entry
    root = tmp_path / "cache"
    first = _start_build(small_digits_shards, root, workers=1)
    entry = _wait_for_chunks(first, root, 2)
    killed: list[set[str]] = []

    def kill_first(_index: int) -> None:
        if not killed:
            first.kill()
            first.wait()
            chunks = entry / A.FEATURE_CHUNKS
            killed.append({p.stem for p in chunks.glob("*.claim")} - {p.stem for p in chunks.glob("*.npz")})

    console, out = _console()
    feats = image_features(tower, small_digits_shards, "train", _cfg(), console, cache_dir=root, on_chunk=kill_first)
    text = out.getvalue()
    assert "joining the train feature build another process is running" in text
    if killed[0]:  # chunks the killed command had claimed but not written
        assert f"embedding {len(killed[0])} chunk(s) of train that another build process left" in text
    assert _entry_files(feats.path) == _entry_files(one_process.path)


def test_align_features_with_two_processes(small_digits_shards, one_process, tmp_path, capsys):
    from align.cli import main

    args = ["features", str(REPO / "recipes" / "lora-cpu.toml"), "--processes", "2",
            "--set", f"data.shards={json.dumps(str(small_digits_shards))}", "--set", f"vision.image_size={SIZE}",
            "--set", f"vision.batch_size={CHUNK}", "--set", f"vision.feature_cache={json.dumps(str(tmp_path))}"]
    assert main(args) == 0
    text = " ".join(capsys.readouterr().err.split())
    assert "2 processes" in text and f"train: {len(one_process)} images x 1 view(s) (built," in text
    assert _entry_files(tmp_path / one_process.path.name) == _entry_files(one_process.path)
    assert main(args[:2] + ["--processes", "0"] + args[4:]) == 2  # a user mistake: a message, no traceback
    assert "at least 1 process" in capsys.readouterr().err
