"""Multi-process service jobs: a real ``align serve`` runs a job as ``align train`` under torchrun.

One service on the CPU (CUDA hidden, so the same test runs anywhere) with one worker trains
conftest's small digits pack with a tiny LoRA recipe, in the order of the tests: the job as one
process (the reference), the same job as two gloo processes, the two-process job again cut by
``kill -9`` of the service and resumed, and a long two-process job stopped with the service,
resumed, then cancelled. The store's GPU
allotment (no two running jobs share a GPU) is checked on the store itself, as a GPU-less machine
can only do.

The reference is what tests/test_distributed.py compares two processes against: one process on
the same global batch, cut into the chunks the two processes hold (chunk_size = 8 of 16), length
buckets off (they would regroup rows across the halves), one torch thread per process on both
sides. There the whole-slice two-process run comes out bit-identical to that reference; the
tolerance here is that file's, 1e-5 absolute on the weights.
"""
from __future__ import annotations

import json
import os
import sqlite3

import psutil
import pytest
from safetensors.torch import load_file

from align.service.launch import LogTail, cuda_devices, launch_failure
from align.service.store import JobStore
from recipes import tiny_toml
from service_harness import Service, store_counts, wait_for

STEPS, BATCH, WORLD = 16, 16, 2
RECIPE = tiny_toml("lora", name="svc-two", train__steps=STEPS, train__batch_size=BATCH, train__warmup_steps=3,
                   train__checkpoint_every=4, train__keep_checkpoints=8, train__log_every=2,
                   train__length_buckets=False)
ONE_PROCESS = [f"train.chunk_size={BATCH // WORLD}"]  # the chunks the two processes hold, in one process
TOLERANCE = 1e-5  # tests/test_distributed.py's, for two processes against one on the global batch
RESUME_TOLERANCE = 1e-6  # tests/test_service.py's: a resumed run against the uninterrupted one


@pytest.fixture(scope="module")
def service(small_digits_shards, tmp_path_factory):
    with pytest.MonkeyPatch.context() as patch:
        patch.setenv("CUDA_VISIBLE_DEVICES", "")  # a CPU service wherever the test runs
        svc = Service(tmp_path_factory.mktemp("service-mp") / "home", [small_digits_shards.parent])
        svc.start()
        yield svc
        svc.close()


def _submit(service, shards, processes: int, overrides: list[str] | None = None, recipe: str = RECIPE) -> dict:
    with service.client() as http:
        response = http.post("/jobs", json={"recipe_toml": recipe, "data": str(shards), "processes": processes,
                                            "overrides": overrides or []})
    assert response.status_code == 201, response.text
    return response.json()


def _run_dir(service, job):
    return service.home / "runs" / f"job-{job['id']:06d}"


def _weights(service, job, step: int = STEPS) -> dict:
    return load_file(str(_run_dir(service, job) / "checkpoints" / f"step-{step:06d}" / "trainable.safetensors"))


def _log(service, job) -> list[dict]:
    return [json.loads(line) for line in (_run_dir(service, job) / "metrics.jsonl").read_text().splitlines()]


def _max_difference(a: dict, b: dict) -> float:
    assert a.keys() == b.keys()
    return max(float((a[k] - b[k]).abs().max()) for k in a)


@pytest.fixture(scope="module")
def one_process_job(service, small_digits_shards):
    job = service.wait_job(_submit(service, small_digits_shards, 1, ONE_PROCESS)["id"])
    assert job["state"] == "finished" and job["processes"] == 1, job
    return job


@pytest.fixture(scope="module")
def two_process_job(service, small_digits_shards, one_process_job):
    submitted = _submit(service, small_digits_shards, WORLD)
    assert submitted["processes"] == WORLD
    job = service.wait_job(submitted["id"])
    assert job["state"] == "finished", (job, (_run_dir(service, job) / "job.log").read_text()[-3000:])
    return job


def test_refused_process_counts_write_nothing(service, small_digits_shards):
    before = store_counts(service.home)
    with service.client() as http:
        for processes, batch, needle, hint in ((0, BATCH, "at least 1", "processes=2"),
                                               (2, 15, "does not split over 2 processes", "train.batch_size=14"),
                                               (10**6, BATCH, "more CPU cores than a job gets", "--workers")):
            response = http.post("/jobs", json={"recipe_toml": RECIPE, "data": str(small_digits_shards),
                                                "processes": processes, "overrides": [f"train.batch_size={batch}"]})
            assert response.status_code == 422, response.text
            assert needle in response.json()["error"] and hint in response.json()["hint"], response.json()
    assert store_counts(service.home) == before


@pytest.mark.slow
def test_two_processes_end_with_the_one_process_weights(service, one_process_job, two_process_job):
    two, one = two_process_job, one_process_job
    assert two["attempts"] == 1 and two["step"] == STEPS and two["error"] is None
    events = [e["text"] for e in two["events"]]
    assert events[-2:] == ["evaluate", "finished"]
    assert f"training in {WORLD} process(es) on CPU" in (_run_dir(service, two) / "job.log").read_text()
    # the job's progress came from the run's log: every logged step, once, written by rank 0 alone
    assert [r["step"] for r in _log(service, two)] == [r["step"] for r in _log(service, one)] \
        == list(range(2, STEPS + 1, 2))
    worst_loss = max(abs(a["loss"] - b["loss"]) for a, b in zip(_log(service, one), _log(service, two)))
    worst_weight = _max_difference(_weights(service, two), _weights(service, one))
    moved = _max_difference(_weights(service, one), _weights(service, one, 4))
    print(f"\ntwo processes vs one on the global batch: max |d weight| {worst_weight:.1e}, "
          f"max |d loss| {worst_loss:.1e}; weights moved {moved:.1e} from step 4")
    assert worst_weight <= TOLERANCE and worst_loss <= TOLERANCE
    assert moved > 1e-4  # the steps did something a wrong gradient would show against
    # evaluated in the worker, one process: the same weights give the same metrics
    assert two["metrics"].keys() == one["metrics"].keys()
    assert max(abs(two["metrics"][k] - one["metrics"][k]) for k in one["metrics"]
               if isinstance(one["metrics"][k], float)) <= 1e-4


@pytest.mark.slow
def test_kill9_mid_two_process_job_resumes_as_two_processes(service, small_digits_shards, two_process_job):
    job_id = _submit(service, small_digits_shards, WORLD)["id"]

    def past_first_checkpoint():
        job = service.job(job_id)
        assert job["state"] in ("queued", "running"), f"job ended before the kill: {job}"
        return job if job["step"] >= 6 else None

    wait_for(past_first_checkpoint, 600, "the two-process job to pass its first checkpoint", every_s=0.2)
    tree = {p: " ".join(p.cmdline()) for p in service.workers()}  # read before they die
    launchers = [p for p, line in tree.items() if "align.service.launch" in line]
    ranks = [p for p, line in tree.items() if "align.cli train" in line and p not in launchers]
    assert len(launchers) == 1 and len(ranks) == WORLD, tree
    tree = service.kill9()  # the worker, the launcher and the two ranks as they were
    assert set(ranks) <= set(tree)
    _, alive = psutil.wait_procs(tree, timeout=30)
    assert not alive, f"outlived the service: {[(p.pid, p.cmdline()) for p in alive]}"
    run_dir = service.home / "runs" / f"job-{job_id:06d}"
    checkpoints = sorted(p.name for p in (run_dir / "checkpoints").iterdir() if not p.name.startswith("."))
    resume_step = int(checkpoints[-1].split("-")[1])
    assert 4 <= resume_step < STEPS, checkpoints
    with sqlite3.connect(service.home / "jobs.db") as db:  # the store as the crash left it
        state, processes = db.execute("SELECT state, processes FROM jobs WHERE id = ?", (job_id,)).fetchone()
    assert state == "running" and processes == WORLD

    service.start()
    job = service.wait_job(job_id)
    assert job["state"] == "finished", (job, (run_dir / "job.log").read_text()[-3000:])
    assert job["attempts"] == 2 and job["resumed_from"] == resume_step and job["processes"] == WORLD
    log = (run_dir / "job.log").read_text()
    assert log.count(f"training in {WORLD} process(es)") == 2 and f"resuming from step {resume_step}" in log
    assert [r["step"] for r in _log(service, {"id": job_id})] == list(range(2, STEPS + 1, 2))
    worst_resumed = _max_difference(_weights(service, {"id": job_id}), _weights(service, two_process_job))
    print(f"\nkill -9 at step >= 6, resumed from {resume_step} in two processes: max |d weight| "
          f"{worst_resumed:.1e} against the uninterrupted two-process job")
    assert worst_resumed <= RESUME_TOLERANCE


@pytest.mark.slow
def test_service_stop_and_cancel_stop_every_rank_at_one_checkpoint(service, small_digits_shards, two_process_job):
    long = RECIPE.replace(f"steps = {STEPS}", "steps = 400").replace("checkpoint_every = 4", "checkpoint_every = 0")
    job_id = _submit(service, small_digits_shards, WORLD, recipe=long)["id"]
    run_dir = service.home / "runs" / f"job-{job_id:06d}"

    def checkpoints():
        return sorted(p.name for p in (run_dir / "checkpoints").iterdir() if not p.name.startswith("."))

    # the service stops (SIGTERM): the ranks checkpoint at one logged step and the job goes back to the queue
    wait_for(lambda: service.job(job_id)["step"] >= 2, 600, "the long two-process job to log a step")
    service.close()
    with sqlite3.connect(service.home / "jobs.db") as db:
        state, stopped_at = db.execute("SELECT state, step FROM jobs WHERE id = ?", (job_id,)).fetchone()
    assert state == "queued" and checkpoints() == [f"step-{stopped_at:06d}"], (state, stopped_at, checkpoints())
    # started again, it resumes from there; a cancel then stops it the same way
    service.start()
    wait_for(lambda: service.job(job_id)["step"] > stopped_at, 600, "the resumed job to log a step")
    with service.client() as http:
        assert http.post(f"/jobs/{job_id}/cancel").json()["cancel_requested"]
    job = service.wait_job(job_id, timeout_s=300)
    assert job["state"] == "cancelled" and stopped_at < job["step"] < 400 and job["resumed_from"] == stopped_at, job
    # one checkpoint per stop, the log contiguous up to the last, nothing evaluated, no stop request left
    assert checkpoints() == [f"step-{stopped_at:06d}", f"step-{job['step']:06d}"]
    assert [r["step"] for r in _log(service, job)] == list(range(2, job["step"] + 1, 2))
    assert not (run_dir / "metrics.json").exists()
    assert not list((service.home / "launch").glob("*.stop"))


def test_store_gives_no_gpu_to_two_running_jobs(tmp_path):
    store = JobStore(tmp_path / "jobs.db")
    submit = [store.submit(f"j{n}", {"processes": n}, 10, lambda i: tmp_path / f"run-{i}")["id"]
              for n in (2, 1, 1, 3)]
    first = store.claim("w1", gpus=3)
    assert first["id"] == submit[0] and first["devices"] == [0, 1]
    second = store.claim("w2", gpus=3)
    assert second["id"] == submit[1] and second["devices"] == [2]
    assert store.claim("w3", gpus=3) is None  # all three held: the next job waits
    store.finish(first["id"], None)
    third = store.claim("w3", gpus=3)
    assert third["id"] == submit[2] and third["devices"] == [0]
    assert store.claim("w1", gpus=3) is None  # the 3-GPU job waits for all three, keeping its place
    store.recover_orphans(lambda worker: worker != "w2")  # w2 died: its GPU comes back with its job
    assert store.get(second["id"])["state"] == "queued" and store.get(second["id"])["devices"] is None
    again = store.claim("w2", gpus=3)
    assert again["id"] == second["id"] and again["devices"] == [1]
    store.finish(third["id"], None)
    assert store.claim("w1", gpus=3) is None  # GPU 1 is still held
    store.finish(again["id"], None)
    fourth = store.claim("w1", gpus=3)
    assert fourth["id"] == submit[3] and fourth["devices"] == [0, 1, 2]
    # more GPUs than the machine has: handed out, without devices, for the worker to fail with a message
    too_big = store.submit("big", {"processes": 4}, 10, lambda i: tmp_path / f"run-{i}")["id"]
    store.finish(fourth["id"], None)
    handed = store.claim("w1", gpus=3)
    assert handed["id"] == too_big and handed["devices"] is None


def test_cuda_devices_follow_the_services_numbering(monkeypatch):
    monkeypatch.delenv("CUDA_VISIBLE_DEVICES", raising=False)
    assert cuda_devices([1, 2]) == "1,2"
    monkeypatch.setenv("CUDA_VISIBLE_DEVICES", "4,6,7")
    assert cuda_devices([0, 2]) == "4,7"


def test_log_tail_reads_whole_lines_once_and_follows_a_rewrite(tmp_path):
    path = tmp_path / "metrics.jsonl"
    tail = LogTail(path, after_step=2)
    assert tail.new_records() == []
    path.write_text('{"step": 1}\n{"step": 2}\n{"step": 3}\n{"step": 4, "lo')
    assert [r["step"] for r in tail.new_records()] == [3]  # at or before the start skipped; a torn line waits
    with open(path, "a") as fh:
        fh.write('ss": 1.0}\n')
    assert tail.new_records() == [{"step": 4, "loss": 1.0}]
    replacement = tmp_path / "new"
    replacement.write_text('{"step": 2}\n{"step": 4}\n{"step": 5}\n')
    os.replace(replacement, path)  # a resume writes the cut log as a new file
    assert [r["step"] for r in tail.new_records()] == [5]


def test_launch_failure_reports_the_error_align_train_printed(tmp_path):
    log = tmp_path / "job.log"
    log.write_text("earlier attempt\nerror: old\n")
    start = log.stat().st_size
    with open(log, "a") as fh:
        fh.write("noise\nerror: cannot read weights /x.pth\n  hint: pass a .safetensors file\n"
                 "error: cannot read weights /x.pth\n")  # the other rank's copy
    failure = launch_failure(log, start, 2)
    assert failure.message == "cannot read weights /x.pth" and failure.hint == "pass a .safetensors file"
    bare = launch_failure(log, log.stat().st_size, 1)
    assert "status 1" in bare.message and str(log) in bare.hint
