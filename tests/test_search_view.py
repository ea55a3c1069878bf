"""The search view: the status page's search box in headless Chromium, thumbnail refusals, and
``align query --html`` opened offline.

The export is the session's tiny LoRA run (tests/conftest.py), copied into a service home. Two
galleries sit in the service's one data root and are indexed for it: 40 of scikit-learn's digits at
96 px, packed (HOME/indexes/digits), and six of them as a plain folder (HOME/indexes/folder, its
export a link to the same one). A real ``align serve``, bound beyond loopback so every read needs
the token, answers the page; Chromium is driven over the DevTools pipe (tests/service_harness.py).
"""
from __future__ import annotations

import io
import json
import shutil
from pathlib import Path

import numpy as np
import pytest
from PIL import Image

from align import artifacts as A
from align.cli import main as cli_main
from align.data.pack import pack_source
from align.data.shards import load_table
from align.index import build_index, load_index
from conftest import write_digits_folder
from service_harness import REPO, Browser, Service, chromium

SCREENSHOT = REPO / "tests" / "artifacts" / "search-view.png"
CAPTION = "a handwritten seven"
K = 6

pytestmark = pytest.mark.skipif(chromium() is None, reason="needs Debian's chromium package (.ci/run installs it)")


@pytest.fixture(scope="module")
def galleries(tiny_lora_run, tmp_path_factory):
    root = tmp_path_factory.mktemp("search-view")
    data, home = root / "data", root / "home"
    write_digits_folder(root / "src", size=96, limit=40)
    pack_source(root / "src", data / "gallery", val_fraction=0.2)
    (data / "folder").mkdir(parents=True)
    for i in range(6):
        for suffix in (".png", ".txt", ".json"):
            shutil.copy(root / "src" / f"digit-{i:04d}{suffix}", data / "folder")
    (root / "outside").mkdir()
    shutil.copy(root / "src" / "digit-0039.png", root / "outside" / "secret.png")
    shutil.copytree(tiny_lora_run.export, home / "exports" / "digits")
    (home / "exports" / "folder").symlink_to("digits", target_is_directory=True)  # inside HOME/exports: allowed
    build_index(home / "exports" / "digits", data / "gallery", home / "indexes" / "digits")
    build_index(home / "exports" / "digits", data / "folder", home / "indexes" / "folder")
    return root


@pytest.fixture(scope="module")
def service(galleries):
    service = Service(galleries / "home", [galleries / "data"], ["--host", "0.0.0.0"])
    service.start()
    try:
        yield service
    finally:
        service.close()


def _reference_top_k(galleries: Path, text: str, k: int) -> tuple[list[str], np.ndarray]:
    """The exact top-k by a direct numpy computation: the export's text embedding against the index's
    stored unit rows, cosine = dot product, ranked by a stable descending sort (common practice)."""
    from align.api import load

    index = load_index(galleries / "home" / "indexes" / "digits")
    query = load(galleries / "home" / "exports" / "digits", image_tower=False).embed_text([text])  # (1, D)
    scores = np.asarray(index.embeddings, np.float64) @ np.asarray(query, np.float64)[0]  # (N,)
    order = np.argsort(-scores, kind="stable")[:k]
    return [index.keys[i] for i in order], scores[order]


def _gallery_labels(shards: Path) -> dict[str, dict]:
    out = {}
    for split in ("train", "val"):
        table = load_table(shards, split)
        out.update(zip(table.keys, table.labels))
    return out


def _labels_text(labels: dict) -> str:
    return ", ".join(f"{k}: {v}" for k, v in sorted(labels.items())) or "no labels"


SHOWN_HITS = """(() => [...document.querySelectorAll(FIGURES)].map(f => ({
    rank: Number(f.dataset.rank), key: f.dataset.key,
    loaded: !!f.querySelector('img') && f.querySelector('img').complete && f.querySelector('img').naturalWidth > 0,
    width: f.querySelector('img') ? f.querySelector('img').naturalWidth : 0,
    src: f.querySelector('img') ? f.querySelector('img').src.slice(0, 5) : '',
    score: f.querySelector('.search-score').textContent,
    labels: f.querySelector('.search-labels').textContent})))()"""


def _shown_hits(browser: Browser, scope: str) -> list[dict]:
    return browser.evaluate(SHOWN_HITS.replace("FIGURES", json.dumps(scope + " figure.search-hit")))


def test_page_search_shows_the_exact_top_k_in_order_with_the_token_header(service, galleries):
    browser = Browser(galleries / "chromium", width=1280, height=900)
    try:
        browser.call("Runtime.enable")
        browser.goto(service.url + "/")
        browser.wait_for("!document.getElementById('login').hidden", 30, "the token form")
        browser.evaluate(f"document.getElementById('token').value = {service.token!r}; "
                         "document.querySelector('#login button').click()")
        box = "form.search-box[data-export='digits']"
        browser.wait_for(f"document.querySelector({box!r}) !== null", 60, "the search box of the digits export")
        # only exports that have an index get a box: both here
        assert browser.evaluate("[...document.querySelectorAll('form.search-box')].map(f => f.dataset.export)") \
            == ["digits", "folder"]
        browser.drain()
        browser.evaluate(f"(() => {{ const box = document.querySelector({box!r}); "
                         f"box.querySelector('input[type=search]').value = {CAPTION!r}; "
                         f"box.querySelector('input[type=number]').value = '{K}'; "
                         "box.querySelector('button').click(); })()")
        browser.wait_for(f"document.querySelectorAll({box + ' figure.search-hit img'!r}).length === {K} && "
                         f"[...document.querySelectorAll({box + ' figure.search-hit img'!r})]"
                         ".every(i => i.complete && i.naturalWidth > 0)", 60, f"{K} thumbnails")
        shown = _shown_hits(browser, box)
        sent, errors = browser.drain()
        SCREENSHOT.parent.mkdir(parents=True, exist_ok=True)
        browser.call("Emulation.setDeviceMetricsOverride", {"width": 1280, "height": 900, "deviceScaleFactor": 1,
                                                             "mobile": False})
        browser.evaluate(f"document.querySelector({box!r}).scrollIntoView()")
        browser.screenshot(SCREENSHOT)
    finally:
        browser.close()
    assert not errors, errors

    with service.client() as http:
        answer = http.post("/exports/digits/search", json={"texts": [CAPTION], "k": K}).json()
    hits = answer["queries"][0]["results"]
    expected_keys, expected_scores = _reference_top_k(galleries, CAPTION, K)
    # the page shows the search endpoint's answer in its order, and that answer is the exact top-k of
    # a direct numpy computation; neighbours differ by more than float noise, so the order is a real check
    assert np.all(np.diff(expected_scores) < -1e-5), expected_scores
    assert [h["key"] for h in hits] == expected_keys
    assert np.allclose([h["score"] for h in hits], expected_scores, atol=1e-5)
    assert [s["key"] for s in shown] == expected_keys
    assert [s["rank"] for s in shown] == list(range(1, K + 1))
    assert [s["score"] for s in shown] == [f"{h['score']:.3f}" for h in hits]
    # labels as the packed table holds them (align pack's table, read directly)
    labels = _gallery_labels(galleries / "data" / "gallery")
    assert [s["labels"] for s in shown] == [_labels_text(labels[key]) for key in expected_keys]
    assert [h["labels"] for h in hits] == [labels[key] for key in expected_keys]
    # thumbnails: object URLs of images fetched with the token header; the token is in no address
    assert all(s["loaded"] and s["src"] == "blob:" for s in shown), shown
    thumbs = [r for r in sent if "/thumbnail?" in r["url"]]
    assert len(thumbs) == K
    assert all(r["headers"].get("Authorization") == f"Bearer {service.token}" for r in thumbs)
    assert all(service.token not in r["url"] for r in sent)
    # the 96 px gallery images are never enlarged (Pillow's thumbnail keeps the size of a smaller image)
    assert {s["width"] for s in shown} == {96}
    print(f"\nsearch view screenshot: {SCREENSHOT}")


def test_thumbnail_is_the_shrunk_gallery_image(service, galleries):
    key = load_index(galleries / "home" / "indexes" / "digits").keys[0]
    with service.client() as http:
        response = http.get("/exports/digits/thumbnail", params={"key": key, "px": 48})
    assert response.status_code == 200 and response.headers["content-type"] == "image/jpeg"
    got = Image.open(io.BytesIO(response.content))
    assert got.format == "JPEG" and got.size == (48, 48)
    # the same picture as Pillow's own thumbnail of the source file, up to JPEG loss (common practice)
    want = Image.open(galleries / "src" / f"{key}.png").convert("RGB")
    want.thumbnail((48, 48))
    difference = np.abs(np.asarray(got.convert("RGB"), float) - np.asarray(want, float)).mean()
    assert difference < 6, difference


def test_thumbnail_refusals(service, galleries):
    data, outside = galleries / "data", galleries / "outside"
    folder_keys = load_index(galleries / "home" / "indexes" / "folder").keys
    assert folder_keys[:2] == ["digit-0000.png", "digit-0001.png"]
    with service.client() as http, service.client(token=False) as anonymous:
        assert anonymous.get("/exports/digits/thumbnail", params={"key": "digit-0000"}).status_code == 401
        # a key the index does not hold: in no index, in another export's index, or a path
        for name, key in (("digits", "digit-9999"), ("digits", "digit-0000.png"), ("folder", "digit-0000"),
                          ("folder", "../outside/secret.png"), ("folder", str(outside / "secret.png"))):
            response = http.get(f"/exports/{name}/thumbnail", params={"key": key})
            assert response.status_code == 404, (name, key, response.text)
            assert response.json()["error"] == f"{key!r} is not a key of the gallery index of export {name!r}"
        assert http.get("/exports/digits/thumbnail", params={"key": "digit-0000", "px": 4096}).status_code == 422
        assert http.get("/exports/nowhere/thumbnail", params={"key": "digit-0000"}).status_code == 404

        # a link planted after indexing, in place of a gallery image, pointing outside the data roots
        planted = data / "folder" / folder_keys[1]
        assert http.get("/exports/folder/thumbnail", params={"key": folder_keys[1]}).status_code == 200
        moved = planted.with_name("kept.bin")
        planted.rename(moved)
        planted.symlink_to(outside / "secret.png")
        try:
            response = http.get("/exports/folder/thumbnail", params={"key": folder_keys[1]})
        finally:
            planted.unlink()
            moved.rename(planted)
        assert response.status_code == 403, response.text
        assert "is outside the allowed roots" in response.json()["error"]
        assert str(outside / "secret.png") in response.json()["error"]  # where it resolved to

        # the same for a packed gallery: a shard swapped for a link to a copy outside the roots
        manifest = json.loads((data / "gallery" / A.MANIFEST).read_text())
        shard = data / "gallery" / manifest["splits"]["train"]["shards"][0]
        key = load_table(data / "gallery", "train").keys[0]
        assert http.get("/exports/digits/thumbnail", params={"key": key}).status_code == 200
        shutil.move(shard, outside / shard.name)
        shard.symlink_to(outside / shard.name)
        try:
            response = http.get("/exports/digits/thumbnail", params={"key": key})
        finally:
            shard.unlink()
            shutil.move(outside / shard.name, shard)
        assert response.status_code == 403, response.text
        assert "is outside the allowed roots" in response.json()["error"]
        assert http.get("/exports/digits/thumbnail", params={"key": key}).status_code == 200  # restored


def test_query_html_opens_offline_with_k_thumbnails(galleries, tmp_path, capsys):
    index = galleries / "home" / "indexes" / "digits"
    out = tmp_path / "answer.html"
    assert cli_main(["query", str(index), CAPTION, "-k", str(K), "--json", "--html", str(out)]) == 0
    answer = json.loads(capsys.readouterr().out)
    expected_keys, _ = _reference_top_k(galleries, CAPTION, K)
    assert [h["key"] for h in answer["queries"][0]["results"]] == expected_keys
    text = out.read_text()
    assert "http://" not in text and "https://" not in text

    browser = Browser(tmp_path / "chromium", width=1280, height=700)
    try:
        browser.call("Runtime.enable")
        browser.call("Log.enable")
        browser.goto(out.resolve().as_uri())
        browser.wait_for(f"document.body.dataset.drawn === 'yes' && document.querySelectorAll('figure img').length "
                         f"=== {K} && [...document.images].every(i => i.complete && i.naturalWidth > 0)", 30,
                         f"{K} thumbnails drawn")
        shown = _shown_hits(browser, "#results")
        sent, errors = browser.drain()
    finally:
        browser.close()
    assert not errors, errors
    assert sent and all(r["url"].startswith(("file://", "data:")) for r in sent), [r["url"][:80] for r in sent]
    assert [s["key"] for s in shown] == expected_keys
    assert all(s["loaded"] and s["src"] == "data:" for s in shown)
    labels = _gallery_labels(galleries / "data" / "gallery")
    assert [s["labels"] for s in shown] == [_labels_text(labels[key]) for key in expected_keys]
    assert [s["score"] for s in shown] == [f"{h['score']:.3f}" for h in answer["queries"][0]["results"]]


def test_query_html_to_a_missing_folder_is_refused(galleries, tmp_path, capsys):
    index = galleries / "home" / "indexes" / "digits"
    assert cli_main(["query", str(index), CAPTION, "--html", str(tmp_path / "no" / "such" / "out.html")]) == 2
    err = " ".join(capsys.readouterr().err.split())  # rich wraps long lines
    assert "no/such does not exist" in err and "hint: create it first" in err and "Traceback" not in err
