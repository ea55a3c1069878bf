"""The training service as a user meets it: a real ``align serve`` subprocess on a loopback port.

One service (module fixture) trains on scikit-learn's bundled digits (conftest's 300-image, 32 px
pack) with a tiny LoRA recipe. The jobs run in the order of the tests: a full job with export and
gallery index, the same recipe again cut by ``kill -9`` of the service, a cancelled one, a failing
one; then embed and search load, and the refusals.
"""
from __future__ import annotations

import asyncio
import hashlib
import json
import os
import shutil
import sqlite3
import stat
import subprocess
import sys
import time

import httpx
import numpy as np
import psutil
import pytest
import torch

from service_harness import REPO, Service, file_tree, store_counts, wait_for
from recipes import tiny_toml

TINY_RECIPE = tiny_toml("lora", name="svc-digits", train__steps=16, train__warmup_steps=3, train__checkpoint_every=4,
                        train__log_every=2)
STEPS = 16
# threads = 1: a tiny model gains nothing from a second thread, and when the machine is busy an
# OpenMP team waits at every barrier for its descheduled twin (measured on a loaded 2-core box:
# 0.22 s per step with one thread, 1.6 s with two)
# CPU, one process, same seed and data: the resumed run is expected to be bit-identical to the
# uninterrupted one (tests/test_resume.py shows it for the loop); 1e-6 absolute leaves room only
# for float noise, far below any real difference a lost or repeated step makes (~1e-3 in loss).
RESUME_TOLERANCE = 1e-6


@pytest.fixture(scope="module")
def service(small_digits_shards, tmp_path_factory):
    root = tmp_path_factory.mktemp("service")
    svc = Service(root / "home", [small_digits_shards.parent])
    svc.start()
    yield svc
    svc.close()


@pytest.fixture(scope="module")
def reference_job(service, small_digits_shards):
    """The uninterrupted job (with export and gallery index) the other tests compare against."""
    with service.client() as http:
        response = http.post("/jobs", json={"recipe_toml": TINY_RECIPE, "data": str(small_digits_shards),
                                            "export": "digits", "index": str(small_digits_shards)})
    assert response.status_code == 201, response.text
    submitted = response.json()
    assert submitted["state"] == "queued" and submitted["steps"] == STEPS
    job = service.wait_job(submitted["id"])
    assert job["state"] == "finished", job
    return job


def _metrics_file(service, job):
    return json.loads((service.home / "runs" / f"job-{job['id']:06d}" / "metrics.json").read_text())


def test_submit_runs_to_completion(service, reference_job):
    job = reference_job
    run_dir = service.home / "runs" / f"job-{job['id']:06d}"
    assert job["step"] == STEPS and job["attempts"] == 1 and job["error"] is None
    # the metrics the job reports are the metrics.json evaluate wrote into its run folder
    assert job["metrics"] == _metrics_file(service, job)
    for key in ("text_to_image_recall@1", "image_to_text_recall@10", "zero_shot_accuracy/digit",
                "linear_probe_accuracy/digit"):
        assert 0.0 <= job["metrics"][key] <= 1.0, key
    assert (run_dir / "checkpoints" / f"step-{STEPS:06d}" / "trainable.safetensors").is_file()
    assert (service.home / "exports" / "digits" / "export.json").is_file()
    assert (service.home / "indexes" / "digits" / "index.json").is_file()
    assert [e["text"] for e in job["events"]][-4:] == ["evaluate", "export", "index", "finished"]

    with service.client(token=False) as http:  # reads need no token on loopback
        stream = http.get(f"/jobs/{job['id']}/metrics").json()
        assert [r["step"] for r in stream["records"]] == list(range(2, STEPS + 1, 2))
        assert stream["evaluation"] == job["metrics"]
        assert [r["step"] for r in http.get(f"/jobs/{job['id']}/metrics", params={"after": 10}).json()["records"]] \
            == [12, 14, 16]
        files = {f["path"]: f["bytes"] for f in http.get(f"/jobs/{job['id']}/artifacts").json()["files"]}
        weights = f"checkpoints/step-{STEPS:06d}/trainable.safetensors"
        assert "metrics.json" in files and weights in files
        downloaded = http.get(f"/jobs/{job['id']}/artifacts/{weights}")
        assert downloaded.status_code == 200 and len(downloaded.content) == files[weights]
        # sha256 (hashlib) of the download equals that of the file on disk
        assert hashlib.sha256(downloaded.content).hexdigest() == \
            hashlib.sha256((run_dir / weights).read_bytes()).hexdigest()
        assert http.get(f"/jobs/{job['id']}/artifacts/../token").status_code in (403, 404)
        listed = http.get("/jobs").json()["jobs"]
        assert [j["id"] for j in listed] == [job["id"]] and "recipe_toml" not in listed[0]


def test_kill9_mid_job_resumes_from_checkpoint(service, reference_job, small_digits_shards):
    with service.client() as http:
        job_id = http.post("/jobs", json={"recipe_toml": TINY_RECIPE, "data": str(small_digits_shards)}).json()["id"]
    run_dir = service.home / "runs" / f"job-{job_id:06d}"

    def past_first_checkpoint():
        job = service.job(job_id)
        assert job["state"] in ("queued", "running"), f"job ended before the kill: {job}"
        return job if job["step"] >= 6 else None

    wait_for(past_first_checkpoint, 600, "the second job to pass its first checkpoint", every_s=0.2)
    workers = service.kill9()
    # the worker dies with the service (PR_SET_PDEATHSIG), so it cannot race the next service's workers
    _, alive = psutil.wait_procs(workers, timeout=20)
    assert not alive, f"workers outlived the service: {alive}"
    checkpoints = sorted(p.name for p in (run_dir / "checkpoints").iterdir() if not p.name.startswith("."))
    resume_step = int(checkpoints[-1].split("-")[1])
    assert 4 <= resume_step < STEPS, checkpoints
    with sqlite3.connect(service.home / "jobs.db") as db:  # the store as the crash left it
        state, step = db.execute("SELECT state, step FROM jobs WHERE id = ?", (job_id,)).fetchone()
    assert state == "running" and step >= 6
    killed_at = step

    service.start()
    job = service.wait_job(job_id)
    assert job["state"] == "finished", job
    assert job["attempts"] == 2 and job["resumed_from"] == resume_step
    assert f"resuming from the checkpoint at step {resume_step}" in [e["text"] for e in job["events"]]

    reference = _metrics_file(service, reference_job)
    resumed = _metrics_file(service, job)
    assert reference.keys() == resumed.keys()
    worst_metric = max(abs(reference[k] - resumed[k]) for k in reference if isinstance(reference[k], float))
    assert worst_metric <= RESUME_TOLERANCE, (reference, resumed)
    log_a = [json.loads(line) for line in (service.home / "runs" / f"job-{reference_job['id']:06d}" /
                                           "metrics.jsonl").read_text().splitlines()]
    log_b = [json.loads(line) for line in (run_dir / "metrics.jsonl").read_text().splitlines()]
    assert [r["step"] for r in log_b] == [r["step"] for r in log_a] == list(range(2, STEPS + 1, 2))
    worst_loss = max(abs(a["loss"] - b["loss"]) for a, b in zip(log_a, log_b))
    assert worst_loss <= RESUME_TOLERANCE
    from safetensors.torch import load_file
    final = f"checkpoints/step-{STEPS:06d}/trainable.safetensors"
    wa = load_file(str(service.home / "runs" / f"job-{reference_job['id']:06d}" / final))
    wb = load_file(str(run_dir / final))
    worst_weight = max(float((wa[k] - wb[k]).abs().max()) for k in wa)
    assert worst_weight <= RESUME_TOLERANCE
    print(f"\nrestart: kill -9 at step {killed_at}, resumed from checkpoint step {resume_step}; vs the uninterrupted "
          f"run: max |d metric| {worst_metric:.1e}, max |d loss| {worst_loss:.1e}, max |d weight| {worst_weight:.1e} "
          f"(tolerance {RESUME_TOLERANCE:g}); text->image R@1 {resumed['text_to_image_recall@1']:.4f} both")


def test_cancel_stops_at_next_step_and_keeps_what_was_written(service, reference_job, small_digits_shards):
    long = TINY_RECIPE.replace(f"steps = {STEPS}", "steps = 400").replace("checkpoint_every = 4", "checkpoint_every = 0")
    with service.client() as http:
        running = http.post("/jobs", json={"recipe_toml": long, "data": str(small_digits_shards), "name": "long"}).json()
        waiting = http.post("/jobs", json={"recipe_toml": long, "data": str(small_digits_shards), "name": "wait"}).json()
        wait_for(lambda: service.job(running["id"])["step"] >= 2, 600, "the long job to log a step")
        # queued: cancelled at once, never started
        assert http.post(f"/jobs/{waiting['id']}/cancel").json()["state"] == "cancelled"
        answer = http.post(f"/jobs/{running['id']}/cancel").json()
        assert answer["state"] == "running" and answer["cancel_requested"]
        job = service.wait_job(running["id"], timeout_s=300)
        assert job["state"] == "cancelled" and job["step"] < 400
        assert http.post(f"/jobs/{running['id']}/cancel").status_code == 409
    run_dir = service.home / "runs" / f"job-{running['id']:06d}"
    # train() checkpoints where it stopped; the log it wrote stays
    assert (run_dir / "checkpoints" / f"step-{job['step']:06d}" / "trainable.safetensors").is_file()
    steps = [json.loads(line)["step"] for line in (run_dir / "metrics.jsonl").read_text().splitlines()]
    assert steps == list(range(2, job["step"] + 1, 2))
    assert not (run_dir / "metrics.json").exists()  # stopped before evaluation
    assert service.job(waiting["id"])["attempts"] == 0
    assert not (service.home / "runs" / f"job-{waiting['id']:06d}").exists()


def test_failure_stores_a_readable_error(service, small_digits_shards):
    bad = service.home / "data" / "not-weights.pth"
    bad.write_bytes(b"this is not a state dict" * 10)
    with service.client() as http:
        job_id = http.post("/jobs", json={"recipe_toml": TINY_RECIPE, "data": str(small_digits_shards),
                                          "overrides": [f"vision.weights={json.dumps(str(bad))}"]}).json()["id"]
    job = service.wait_job(job_id, timeout_s=300)
    assert job["state"] == "failed"
    assert job["error"]["message"].startswith(f"cannot read weights {bad}")
    assert "safetensors" in job["error"]["hint"] and "Traceback" not in json.dumps(job["error"])


def _reference_embed(export_dir, texts):
    """Independent of align: transformers forward, then mean pooling over the mask, projection and L2
    normalisation in float64 numpy (the text-side contract in DESIGN.md)."""
    from safetensors.numpy import load_file
    from transformers import AutoModel, AutoTokenizer

    folder = export_dir / "text_encoder"
    head = json.loads((folder / "head.json").read_text())
    tokenizer = AutoTokenizer.from_pretrained(str(folder), local_files_only=True)
    model = AutoModel.from_pretrained(str(folder), local_files_only=True).eval()
    weight = load_file(str(folder / "projection.safetensors"))["weight"].astype(np.float64)  # (D, H)
    flat = [t for group in texts for t in group]  # one padded batch: padding moves nothing past float noise
    enc = tokenizer(flat, padding=True, truncation=True, max_length=head["max_length"], return_tensors="pt")
    with torch.no_grad():
        hidden = model(input_ids=enc["input_ids"], attention_mask=enc["attention_mask"]).last_hidden_state
    hidden = hidden.numpy().astype(np.float64)  # (B, T, H)
    mask = enc["attention_mask"].numpy()[..., None].astype(np.float64)  # (B, T, 1)
    pooled = (hidden * mask).sum(1) / mask.sum(1)  # (B, H)
    projected = pooled @ weight.T  # (B, D)
    unit = projected / np.linalg.norm(projected, axis=1, keepdims=True)
    bounds = np.cumsum([0] + [len(group) for group in texts])
    return [unit[a:b] for a, b in zip(bounds[:-1], bounds[1:])]


WORDS = ["zero", "one", "two", "three", "four", "five", "six", "seven", "eight", "nine"]


def test_fifty_concurrent_embed_requests(service, reference_job):
    groups = [[f"a handwritten {WORDS[i % 10]}", f"the digit {WORDS[(i * 3) % 10]} written by hand, request {i}"]
              for i in range(50)]
    expected = _reference_embed(service.home / "exports" / "digits", groups)
    headers = {"Authorization": f"Bearer {service.token}"}
    httpx.post(f"{service.url}/exports/digits/embed", json={"texts": ["warm up"]}, headers=headers,
               timeout=120).raise_for_status()  # loads the export once; not part of the figures

    async def one(client, texts):
        started = time.perf_counter()
        response = await client.post("/exports/digits/embed", json={"texts": texts})
        return response, time.perf_counter() - started

    async def fire():
        limits = httpx.Limits(max_connections=50, max_keepalive_connections=50)
        async with httpx.AsyncClient(base_url=service.url, headers=headers, timeout=120, limits=limits) as client:
            return await asyncio.gather(*(one(client, g) for g in groups))

    wall = time.perf_counter()
    answers = asyncio.run(fire())
    wall = time.perf_counter() - wall
    latencies = np.array([seconds for _, seconds in answers]) * 1000
    worst = 0.0
    for (response, _), want in zip(answers, expected):
        assert response.status_code == 200, response.text
        got = np.array(response.json()["embeddings"])  # (2, D)
        assert got.shape == want.shape == (2, 1280)
        worst = max(worst, float(np.abs(got - want).max()))
    # float32 encoder against the float64 numpy pooling: agreement to 1e-5 (measured ~1e-7)
    assert worst <= 1e-5, worst
    print(f"\n50 concurrent embed requests (2 texts each): p50 {np.percentile(latencies, 50):.0f} ms, "
          f"p95 {np.percentile(latencies, 95):.0f} ms, max {latencies.max():.0f} ms, wall {wall:.2f}s; "
          f"max |diff| vs numpy reference {worst:.1e}")


def test_search_matches_brute_force(service, reference_job):
    texts = ["a handwritten seven", "the digit zero written by hand"]
    with service.client() as http:
        answer = http.post("/exports/digits/search", json={"texts": texts, "k": 5}).json()
    index = service.home / "indexes" / "digits"
    gallery = np.load(index / "embeddings.npy").astype(np.float64)  # (N, D)
    keys = (index / "keys.txt").read_text().splitlines()
    queries = _reference_embed(service.home / "exports" / "digits", [texts])[0]  # (2, D)
    scores = queries @ gallery.T  # (2, N): exact cosine, rows are unit length
    assert answer["gallery_size"] == len(keys) == 300
    row_of = {key: i for i, key in enumerate(keys)}
    for row, item in zip(scores, answer["queries"]):
        got = [hit["score"] for hit in item["results"]]
        # each hit's score is its brute-force cosine, in descending order, and nothing left out scores
        # higher than the last hit (a tie-proof statement of "exact top-k"; a barely trained tower
        # gives many near-equal scores)
        assert np.allclose(got, [row[row_of[hit["key"]]] for hit in item["results"]], atol=1e-5)
        assert all(a >= b - 1e-6 for a, b in zip(got, got[1:]))
        assert np.allclose(got, np.sort(row)[::-1][:5], atol=1e-5)
        assert len({hit["key"] for hit in item["results"]}) == 5


def test_refusals_write_nothing(service, reference_job, small_digits_shards, tmp_path):
    home = service.home
    assert stat.S_IMODE((home / "token").stat().st_mode) == 0o600
    outside = tmp_path / "outside"  # a packed-looking folder outside every root
    outside.mkdir()
    shutil.copy(small_digits_shards / "manifest.json", outside / "manifest.json")
    (home / "data" / "escape").symlink_to(outside, target_is_directory=True)
    (home / "recipes" / "escape.toml").symlink_to(tmp_path / "recipe.toml")
    (tmp_path / "recipe.toml").write_text(TINY_RECIPE)
    good = {"recipe_toml": TINY_RECIPE, "data": str(small_digits_shards)}
    before_tree = file_tree(home / "runs", home / "exports", home / "indexes", home / "features", home / "data",
                        home / "recipes", small_digits_shards.parent)
    before_store = store_counts(home)

    with service.client(token=False) as anon, service.client() as http:
        refusals = [
            (anon.post("/jobs", json=good), 401),
            (anon.post("/jobs", json=good, headers={"Authorization": "Bearer wrong-token-000000"}), 401),
            (anon.post(f"/jobs/{reference_job['id']}/cancel"), 401),
            (anon.post("/exports/digits/embed", json={"texts": ["x"]}), 401),
            (http.post("/jobs", json={**good, "data": "../" + small_digits_shards.name}), 403),
            (http.post("/jobs", json={**good, "data": str(outside)}), 403),
            (http.post("/jobs", json={**good, "data": str(home / "data" / "escape")}), 403),  # symlink in a root
            (http.post("/jobs", json={"recipe_toml": TINY_RECIPE,
                                      "overrides": [f"data.shards={json.dumps(str(outside))}"]}), 403),
            (http.post("/jobs", json={**good, "overrides": ['vision.feature_cache="/tmp"']}), 403),
            (http.post("/jobs", json={"recipe_name": "../jobs.toml", "data": str(small_digits_shards)}), 403),
            (http.post("/jobs", json={"recipe_name": "escape.toml", "data": str(small_digits_shards)}), 403),
            (http.post("/jobs", json={**good, "export": "x", "index": str(outside)}), 403),
            (http.post("/jobs", json={**good, "export": "../exports"}), 403),
            (http.post("/jobs", json={**good, "recipe_toml": TINY_RECIPE + "#" * (2 << 20)}), 413),
            (http.post("/jobs", content=(b"x" * 65536 for _ in range(40)),  # chunked: no Content-Length
                       headers={"content-type": "application/json"}), 413),
            (http.post("/jobs", json={**good, "overrides": ["train.stepz=3"]}), 422),
            (http.post("/jobs", json={**good, "surprise": 1}), 422),
            (http.get("/jobs", headers={"Host": "attacker.example"}), 421),  # a rebinding page's name
            (http.get("/jobs", headers={"Host": f"127.0.0.1:{service.port}@attacker.example"}), 400),
        ]
    for index, (response, status) in enumerate(refusals):
        assert response.status_code == status, (index, response.status_code, response.text)
        assert response.json()["error"], index  # a message for the user, not a bare status
    assert "train.stepz" in refusals[15][0].json()["error"] and "steps" in refusals[15][0].json()["hint"]
    assert "surprise" in refusals[16][0].json()["error"]
    assert "outside the allowed roots" in refusals[6][0].json()["error"]  # the link, followed, leaves the roots
    assert "outside the allowed roots" in refusals[10][0].json()["error"]
    assert store_counts(home) == before_store
    assert file_tree(home / "runs", home / "exports", home / "indexes", home / "features", home / "data",
                 home / "recipes", small_digits_shards.parent) == before_tree


def test_token_needed_for_reads_beyond_loopback(tmp_path):
    """Bound to a non-loopback address, reads need the token too (in-process app, no workers)."""
    from fastapi.testclient import TestClient

    from align.service.app import create_app
    from align.service.home import Home, Settings, ensure_token

    home = Home(tmp_path / "home").prepare()
    token = ensure_token(home)
    settings = Settings(home=home.root, host="0.0.0.0")
    with TestClient(create_app(settings, token, start_workers=False)) as client:
        assert client.get("/jobs").status_code == 401
        assert client.get("/health").status_code == 401
        assert client.get("/jobs", headers={"Authorization": f"Bearer {token}"}).status_code == 200
        # the token travels only as a header: one in the address is not read, for reads or writes
        assert client.get(f"/jobs?token={token}").status_code == 401
        assert client.get(f"/jobs/1/artifacts/recipe.resolved.toml?token={token}").status_code == 401
        assert client.post(f"/jobs?token={token}", json={}).status_code == 401
        # the status page is static and holds no data: it loads without the token, then asks for it
        page = client.get("/")
        assert page.status_code == 200 and 'id="login"' in page.text and token not in page.text
        assert "form-action 'none'" in page.headers["content-security-policy"]
        assert client.post("/", json={}).status_code == 401  # public for reading only


def test_jobs_cli_talks_to_the_service(service, reference_job):
    env = dict(os.environ, ALIGN_URL=service.url)
    run = lambda *args: subprocess.run([sys.executable, "-m", "align.cli", "jobs", *args, "--home", str(service.home)],
                                       capture_output=True, text=True, cwd=REPO, env=env, timeout=120)
    shown = run("show", str(reference_job["id"]), "--json")
    assert shown.returncode == 0, shown.stderr
    assert json.loads(shown.stdout)["metrics"] == reference_job["metrics"]
    listed = run("list", "--json")
    assert listed.returncode == 0, listed.stderr
    jobs = {j["id"]: j for j in json.loads(listed.stdout)}
    assert jobs[reference_job["id"]]["state"] == "finished" and jobs[reference_job["id"]]["name"] == "svc-digits"
    table = run("list")
    assert table.returncode == 0 and "finished" in table.stdout and "cancelled" in table.stdout
    refused = run("cancel", str(reference_job["id"]))
    assert refused.returncode == 2 and "already finished" in refused.stderr
