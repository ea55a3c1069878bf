"""Hostile and mistaken calls to a real ``align serve`` on loopback: each is refused with a JSON
message and hint, the service logs no traceback, and a refused call queues and writes nothing.

The cases come from an adversarial pass over the service: recipe overrides that fail validation,
job ids past SQLite's 64-bit integers, Host headers that only look like loopback, and packed
folders inside a data root whose files are links to outside it.
"""
from __future__ import annotations

import json
import shutil
import socket
import threading

import httpx
import pytest

from align.errors import RecipeError
from align.recipe import recipe_from_toml
from align.service.security import host_refusal, parse_host
from service_harness import Service, file_tree, store_counts
from recipes import tiny_toml

RECIPE = tiny_toml("lora", name="bad-inputs", train__steps=4, train__checkpoint_every=2)


@pytest.fixture(scope="module")
def roots(small_digits_shards, tmp_path_factory):
    """A data root holding a copy of the small digits pack, and a folder outside every root."""
    base = tmp_path_factory.mktemp("bad-inputs")
    data, outside = base / "data", base / "outside"
    data.mkdir()
    outside.mkdir()
    shutil.copytree(small_digits_shards, data / "digits")
    return {"base": base, "data": data, "outside": outside, "digits": data / "digits"}


@pytest.fixture(scope="module")
def service(roots):
    svc = Service(roots["base"] / "home", [roots["data"]])
    svc.start()
    yield svc
    svc.close()


@pytest.fixture(autouse=True)
def no_traceback_in_the_service_log(request):
    """Whatever a test sends, the service answers it: its log gains no traceback."""
    if "service" not in request.fixturenames:
        yield
        return
    service = request.getfixturevalue("service")
    start = service.log_path.stat().st_size
    yield
    with open(service.log_path, "rb") as log:
        log.seek(start)
        added = log.read().decode(errors="replace")
    assert "Traceback" not in added and "Exception in ASGI" not in added, added


def _watched(service, roots):
    """What a refused call must leave untouched: the store and every folder a job writes or reads."""
    home = service.home
    folders = [home / "runs", home / "exports", home / "indexes", home / "features", roots["data"], roots["outside"]]
    return store_counts(home), file_tree(*folders)


def _assert_refused(response, status: int, *in_message: str) -> dict:
    assert response.status_code == status, (status, response.status_code, response.text)
    body = response.json()
    assert isinstance(body.get("error"), str) and body["error"], body
    assert isinstance(body.get("hint"), str) and body["hint"], body
    for text in in_message:
        assert text in body["error"], (text, body)
    return body


# ---------------------------------------------------------------------------------------------
# the Host header


LOOPBACK_HOSTS = ["127.0.0.1:8765", "localhost:8765", "[::1]:8765", "LOCALHOST:8765", "127.0.0.1"]
MALFORMED_HOSTS = ["127.0.0.1:8765@attacker.example", "127.0.0.1:attacker", "127.0.0.1:", "127.0.0.1:+80",
                   "127.0.0.1:0080", "127.0.0.1:99999", "127.0.0.1:0", "127.0.0.1:80:90",
                   "127.0.0.1/x", "127.0.0.1:8765#x", "127.0.0.1%2f", "[::1", "::1:8765", "[attacker]:80", ":8765", ""]
FOREIGN_HOSTS = ["attacker.example", "attacker.example:8765", "127.0.0.1.nip.io:8765", "127.1:8765",
                 "2130706433:8765", "10.0.0.1:8765"]


def test_host_parser_accepts_loopback_and_refuses_the_rest():
    assert parse_host("127.0.0.1:8765") == ("127.0.0.1", 8765)
    assert parse_host("[::1]:8765") == ("::1", 8765)
    assert parse_host("localhost") == ("localhost", None)
    for host in LOOPBACK_HOSTS:
        assert host_refusal([host], loopback_only=True) is None, host
    for host in MALFORMED_HOSTS + [" 127.0.0.1:8765"]:  # 400: RFC 9112 section 3.2, an invalid Host field value
        status, message, hint = host_refusal([host], loopback_only=True)
        assert status == 400 and "malformed" in message and hint, host
        assert host_refusal([host], loopback_only=False)[0] == 400, host  # malformed beyond loopback too
    for host in FOREIGN_HOSTS:  # 421 Misdirected Request: RFC 9110 section 15.5.20
        status, message, hint = host_refusal([host], loopback_only=True)
        assert status == 421 and "loopback" in message and hint, host
        assert host_refusal([host], loopback_only=False) is None, host  # beyond loopback any name may reach it
    assert host_refusal([], loopback_only=True)[0] == 400  # no Host at all
    assert host_refusal(["127.0.0.1:8765", "127.0.0.1:8765"], loopback_only=True)[0] == 400  # two of them


def _raw_request(port: int, head: bytes) -> tuple[int, bytes]:
    """Send a hand-written request (httpx always sends one Host header); (status, body)."""
    with socket.create_connection(("127.0.0.1", port), timeout=30) as sock:
        sock.sendall(head)
        reply = b""
        while chunk := sock.recv(65536):
            reply += chunk
    header, _, body = reply.partition(b"\r\n\r\n")
    return int(header.split(b" ")[1]), body


def test_host_header_is_parsed_strictly(service, roots):
    before = _watched(service, roots)
    good = {"recipe_toml": RECIPE, "data": str(roots["digits"])}
    with service.client() as http:
        for host in LOOPBACK_HOSTS:
            assert http.get("/jobs", headers={"Host": host.replace("8765", str(service.port))}).status_code == 200
        for host in MALFORMED_HOSTS:
            host = host.replace("8765", str(service.port))
            _assert_refused(http.get("/jobs", headers={"Host": host}), 400, "Host header is malformed")
            _assert_refused(http.post("/jobs", json=good, headers={"Host": host}), 400, "Host header is malformed")
        for host in FOREIGN_HOSTS:
            host = host.replace("8765", str(service.port))
            _assert_refused(http.get("/jobs", headers={"Host": host}), 421, "not this machine's loopback")
            _assert_refused(http.post("/jobs", json=good, headers={"Host": host}), 421)
    status, body = _raw_request(service.port, b"GET /jobs HTTP/1.0\r\n\r\n")  # no Host at all
    body = json.loads(body)
    assert status == 400 and "0 Host headers" in body["error"] and body["hint"], body
    # two Host headers: uvicorn's HTTP parser (h11) refuses them itself, in plain text, before any
    # route or the Guard runs (the Guard refuses them too when a server passes them on)
    two = b"GET /jobs HTTP/1.1\r\nHost: 127.0.0.1\r\nHost: attacker.example\r\nConnection: close\r\n\r\n"
    status, body = _raw_request(service.port, two)
    assert status == 400 and b"jobs" not in body, body
    assert _watched(service, roots) == before


# ---------------------------------------------------------------------------------------------
# recipe overrides


# (override, what the message names): the values the adversarial pass sent, each refused by
# align.recipe's validation (the service builds every job spec through it)
FAILING_OVERRIDES = [
    ("train.lr=nan", "train.lr"), ("train.lr=inf", "train.lr"), ("train.log_every=0", "train.log_every"),
    ("train.threads=-1", "train.threads"), ('eval.recall_ks=["a"]', "eval.recall_ks"),
    ("eval.prompts=[1]", "eval.prompts"), ("eval.field_prompts={glaze = 3}", "eval.field_prompts.glaze"),
    ("train.batch_size=1", "train.batch_size"), ("train.grad_clip=nan", "train.grad_clip"),
    ("vision.image_size=100000", "vision.image_size"), ("train=3", "train"), ("train.stepz=3", "train.stepz"),
    ("text.new_tokens=5", "text.new_tokens"), ("train.steps.every=2", "steps"), ("no_equals_sign", "no_equals_sign"),
]
# values align.recipe accepts that the job store or the stored TOML cannot hold
UNSTORABLE_OVERRIDES = [
    (f"train.steps={1 << 64}", "train.steps"),  # past SQLite's 64-bit integers
    ('vision.model="tf_efficientnet_lite0\\nb"', "cannot be stored as TOML"),  # a line break in a string
    ('eval.field_prompts={"two words" = ["a {} tile"]}', "cannot be stored as TOML"),  # a key TOML must quote
]


def test_override_values_that_fail_validation_get_422_before_queueing(service, roots):
    (service.home / "recipes" / "bad-inputs.toml").write_text(RECIPE)
    before = _watched(service, roots)
    with service.client() as http:
        for override, key in FAILING_OVERRIDES:
            with pytest.raises(RecipeError) as refused_here:
                recipe_from_toml(RECIPE, [override])
            response = http.post("/jobs", json={"recipe_toml": RECIPE, "data": str(roots["digits"]),
                                                "overrides": [override]})
            body = _assert_refused(response, 422, key)
            assert body["error"] == refused_here.value.message, override  # the recipe module's own words
        for override, words in UNSTORABLE_OVERRIDES:
            response = http.post("/jobs", json={"recipe_toml": RECIPE, "data": str(roots["digits"]),
                                                "overrides": [override]})
            _assert_refused(response, 422, words)
        # the same through a named recipe file
        response = http.post("/jobs", json={"recipe_name": "bad-inputs.toml", "data": str(roots["digits"]),
                                            "overrides": ["train.lr=nan"]})
        _assert_refused(response, 422, "train.lr")
    assert _watched(service, roots) == before


# ---------------------------------------------------------------------------------------------
# job ids


def test_job_id_beyond_64_bits_is_404(service, roots):
    before = _watched(service, roots)
    with service.client() as http:
        for job_id in (99999999999999999999999, 1 << 63, 1 << 64, (1 << 63) - 1, 0, -1):
            for method, path in (("GET", f"/jobs/{job_id}"), ("GET", f"/jobs/{job_id}/metrics"),
                                 ("GET", f"/jobs/{job_id}/artifacts"), ("GET", f"/jobs/{job_id}/artifacts/x.json"),
                                 ("POST", f"/jobs/{job_id}/cancel")):
                _assert_refused(http.request(method, path), 404, f"no job {job_id}")
    assert _watched(service, roots) == before


# ---------------------------------------------------------------------------------------------
# links out of the data root


def _copy_pack(roots, name: str):
    """A copy of the digits pack inside the data root, and the names of its shards."""
    folder = roots["data"] / name
    shutil.copytree(roots["digits"], folder)
    manifest = json.loads((folder / "manifest.json").read_text())
    return folder, manifest


def _link_out(roots, path):
    """Move ``path`` outside the roots and leave a link to it where it was."""
    target = roots["outside"] / f"{path.parent.name}-{path.name}"
    shutil.move(path, target)
    path.symlink_to(target)
    return target


def test_files_linked_outside_the_data_root_are_refused_at_submit(service, roots):
    linked_shard, manifest = _copy_pack(roots, "linked-shard")
    shard = linked_shard / manifest["splits"]["train"]["shards"][0]
    shard_target = _link_out(roots, shard)
    linked_manifest, _ = _copy_pack(roots, "linked-manifest")
    _link_out(roots, linked_manifest / "manifest.json")
    climbing, manifest = _copy_pack(roots, "climbing-manifest")
    shutil.copy(shard_target, roots["data"] / "stray.tar")
    manifest["splits"]["train"]["shards"] = ["../stray.tar"]
    (climbing / "manifest.json").write_text(json.dumps(manifest))
    missing, manifest = _copy_pack(roots, "missing-shard")
    (missing / manifest["splits"]["val"]["shards"][0]).unlink()
    gallery = roots["data"] / "gallery"
    gallery.mkdir()
    (gallery / "kept.png").write_bytes(b"not read: the job is refused first")
    (roots["outside"] / "secret.png").write_bytes(b"outside")
    (gallery / "linked.png").symlink_to(roots["outside"] / "secret.png")
    linked_folder = roots["data"] / "gallery-folder-link"
    linked_folder.mkdir()
    (linked_folder / "sub").symlink_to(roots["outside"], target_is_directory=True)

    good = {"recipe_toml": RECIPE, "data": str(roots["digits"])}
    before = _watched(service, roots)
    with service.client() as http:
        body = _assert_refused(http.post("/jobs", json={**good, "data": str(linked_shard)}), 403,
                               str(shard), "outside the allowed roots", str(shard_target))
        assert "link" in body["hint"]
        _assert_refused(http.post("/jobs", json={**good, "overrides": [f"data.shards={json.dumps(str(linked_shard))}"],
                                                 "data": None}), 403, str(shard))
        _assert_refused(http.post("/jobs", json={**good, "data": str(linked_manifest)}), 403,
                        str(linked_manifest / "manifest.json"), "outside the allowed roots")
        _assert_refused(http.post("/jobs", json={**good, "data": str(climbing)}), 403, "'../stray.tar'")
        _assert_refused(http.post("/jobs", json={**good, "data": str(missing)}), 422,
                        str(missing / manifest["splits"]["val"]["shards"][0]), "missing")
        for folder, named in ((gallery, gallery / "linked.png"), (linked_folder, linked_folder / "sub"),
                              (linked_shard, shard)):  # a gallery: a folder of images, or a packed folder
            _assert_refused(http.post("/jobs", json={**good, "export": "x", "index": str(folder)}), 403,
                            str(named), "outside the allowed roots")
    assert _watched(service, roots) == before


def test_worker_refuses_a_shard_linked_outside_after_submission(roots, tmp_path):
    """A link swapped in after the job was accepted: the worker's own check fails the job before
    training (the worker function on a real store, in this process, so the swap lands before the
    claim)."""
    from align.service.home import Home, Settings
    from align.service.spec import JobRequest, build_spec
    from align.service.store import JobStore
    from align.service.worker import run_job

    folder, manifest = _copy_pack(roots, "swapped-later")
    home = Home(tmp_path / "home").prepare()
    settings = Settings(home=home.root, data_roots=[roots["data"]])
    store = JobStore(home.db)
    name, spec, steps = build_spec(JobRequest(recipe_toml=RECIPE, data=str(folder)), settings)
    job_id = store.submit(name, spec, steps, home.run_dir)["id"]
    shard = folder / manifest["splits"]["train"]["shards"][0]
    _link_out(roots, shard)

    job = store.claim("test-worker")
    assert job["id"] == job_id
    assert run_job(job, store, settings, threading.Event()) == "failed"
    failed = store.get(job_id)
    assert failed["state"] == "failed"
    assert str(shard) in failed["error"]["message"] and "outside the allowed roots" in failed["error"]["message"]
    assert "link" in failed["error"]["hint"]
    run_dir = home.run_dir(job_id)
    assert not (run_dir / "checkpoints").exists() and not (run_dir / "metrics.jsonl").exists()  # nothing trained
    assert "Traceback" not in (run_dir / "job.log").read_text()
