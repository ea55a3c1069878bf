"""One rank of the two-process training test; launched by tests/test_distributed.py as

    python -m torch.distributed.run --standalone --nproc_per_node 2 tests/distributed_worker.py SPEC.json

SPEC.json: {"shards": DIR, "out": DIR, "runs": [{"name": ..., "toml": ..., "cut_at": null | step}]}.
Every rank calls align's own ``train()`` (the code ``align train`` runs); a run with ``cut_at`` is
stopped after that step and resumed, the way a crash after a checkpoint leaves it. Each rank
writes what it saw of the process group to rank<R>.json.
"""
from __future__ import annotations

import hashlib
import json
import os
import sys
from pathlib import Path

from align.offline import use_offline_defaults  # noqa: E402

use_offline_defaults()

import torch  # noqa: E402
import torch.distributed as dist  # noqa: E402
from rich.console import Console  # noqa: E402

from align.checkpoint import latest_checkpoint  # noqa: E402
from align.recipe import recipe_from_toml  # noqa: E402
from align.training import shared_training_data, start_accelerator, train  # noqa: E402


def main(spec_path: str) -> None:
    spec = json.loads(Path(spec_path).read_text())
    out = Path(spec["out"])
    console = Console(stderr=True, quiet=True)
    accelerator = start_accelerator()  # torchrun's env -> accelerate starts the gloo group
    rank = accelerator.process_index
    data = None
    report = {"rank": rank, "world": accelerator.num_processes,
              "backend": dist.get_backend() if dist.is_initialized() else None, "runs": {}}
    for run in spec["runs"]:
        recipe = recipe_from_toml(run["toml"], [f"data.shards={json.dumps(spec['shards'])}"])
        if data is None:  # built once (under a lock), then every rank opens the same files by path
            data = shared_training_data(recipe, console, accelerator)
            report["features_sha256"] = hashlib.sha256(data.image_features.numpy().tobytes()).hexdigest()
            report["keys"] = data.keys
            if rank == 0:  # the one-process reference trains on exactly these rows
                torch.save(data.image_features, out / "image_features.pt")
        run_dir = out / run["name"]
        if run.get("cut_at"):
            summary = train(recipe, run_dir, console=console, data=data,
                            on_step=lambda rec, stop=run["cut_at"]: rec["step"] < stop)
            assert summary["stopped_early"], summary
            train(recipe, run_dir, resume=True, console=console, data=data)
        else:
            train(recipe, run_dir, console=console, data=data)
        report["runs"][run["name"]] = {"checkpoint": latest_checkpoint(run_dir).name}
    (out / f"rank{rank}.json").write_text(json.dumps(report))
    accelerator.wait_for_everyone()


if __name__ == "__main__":
    main(sys.argv[1])
