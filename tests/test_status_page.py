"""The status page in headless Chromium (Debian's chromium package): the token, the job and its charts.

A real ``align serve``, bound beyond loopback so that reads need the token, runs one small job (a
scratch text tower, 10 steps, a log line per step, validation recall every 5 steps) on
scikit-learn's digits. Chromium, driven over
the DevTools protocol, opens ``/``: the page asks for the token, the test types it into the form,
and the page shows the job. The test reads the DOM (the job row, the SVG loss chart with one point
per logged step, the validation chart with one point per validated step, the recall chart), the address and history (no token in either), the requests the
page sent (the token in the Authorization header of every API call, never in a URL), and writes a
screenshot to tests/artifacts/status-page.png.
"""
from __future__ import annotations

import re

import numpy as np
import pytest
from PIL import Image

from recipes import tiny_toml
from service_harness import REPO, Browser, Service, chromium

SCREENSHOT = REPO / "tests" / "artifacts" / "status-page.png"
PAGE_RECIPE = tiny_toml("scratch", name="page-demo", text__scratch__width=64, text__scratch__vocabulary_size=300,
                        train__steps=10, train__warmup_steps=2, train__eval_every=5)
LOSS_BLUE = (0x2F, 0x6F, 0xDF)  # the loss line's colour in align/service/page.py

pytestmark = pytest.mark.skipif(chromium() is None, reason="needs Debian's chromium package (.ci/run installs it)")

HAS_JOB_ROW = 'document.querySelector("#jobs tr[data-job]") !== null'
FORM_SHOWN = "!document.getElementById('login').hidden"


@pytest.fixture(scope="module")
def finished_job(small_digits_shards, tmp_path_factory):
    root = tmp_path_factory.mktemp("page")
    # beyond loopback every read needs the token, so the page has to ask for it
    service = Service(root / "home", [small_digits_shards.parent], ["--host", "0.0.0.0"])
    service.start()
    try:
        with service.client() as http:
            response = http.post("/jobs", json={"recipe_toml": PAGE_RECIPE, "data": str(small_digits_shards)})
            assert response.status_code == 201, response.text
        job = service.wait_job(response.json()["id"])
        assert job["state"] == "finished", job
        with service.client() as http:
            records = http.get(f"/jobs/{job['id']}/metrics").json()["records"]
        yield service, job, records, root
    finally:
        service.close()


def _type_token(browser: Browser, token: str) -> None:
    browser.evaluate(f"document.getElementById('token').value = {token!r}; "
                     "document.querySelector('#login button').click()")


def _history_urls(browser: Browser) -> list[str]:
    return [entry["url"] for entry in browser.call("Page.getNavigationHistory")["entries"]]


def test_status_page_asks_for_the_token_once_and_shows_the_job_and_its_charts(finished_job):
    service, job, records, root = finished_job
    assert len(records) == 10
    browser = Browser(root / "chromium")
    try:
        browser.goto(service.url + "/")
        # no token yet: the page loads (it holds no data) and asks for it
        browser.wait_for(FORM_SHOWN, 30, "the token form")
        assert browser.evaluate(HAS_JOB_ROW) is False
        asked = browser.requests()
        assert any(r["url"].endswith("/jobs") and "Authorization" not in r["headers"] for r in asked)

        _type_token(browser, service.token)
        browser.wait_for(f"{HAS_JOB_ROW} && document.querySelectorAll('svg[data-chart]').length >= 2", 60,
                         "the job row and its charts")
        # the token is in no address and no history entry; this tab keeps it, in sessionStorage
        assert browser.evaluate("location.href") == service.url + "/"
        assert all(service.token not in url for url in _history_urls(browser))
        assert browser.evaluate("sessionStorage.getItem('align-service-token')") == service.token
        assert browser.evaluate("document.getElementById('token').value") == ""
        # every API call carried it as a header, none in its URL
        sent = [r for r in browser.requests() if r["url"].startswith(service.url + "/jobs")]
        assert sent and all(r["headers"].get("Authorization") == f"Bearer {service.token}" for r in sent)
        assert all(service.token not in r["url"] for r in sent)

        html = browser.evaluate("document.documentElement.outerHTML")
        _check_job_and_charts(html, job, records)
        assert service.token not in html

        # a reload in the same tab keeps the token: the page does not ask again
        browser.evaluate("window.beforeReload = true")
        browser.call("Page.reload")
        browser.wait_for(f"window.beforeReload === undefined && document.readyState === 'complete' && {HAS_JOB_ROW}",
                         60, "the reloaded page")
        assert browser.evaluate(FORM_SHOWN) is False

        SCREENSHOT.parent.mkdir(parents=True, exist_ok=True)
        SCREENSHOT.unlink(missing_ok=True)
        browser.wait_for("document.querySelectorAll('svg[data-chart] polyline').length >= 1", 30, "the loss line")
        browser.screenshot(SCREENSHOT)
    finally:
        browser.close()
    image = np.asarray(Image.open(SCREENSHOT).convert("RGB")).astype(int)  # (900, 1200, 3)
    assert image.shape == (900, 1200, 3)
    blue = (np.abs(image - np.array(LOSS_BLUE)).sum(-1) < 40).sum()
    assert blue > 100, f"the loss line is not on the screenshot ({blue} pixels of its colour)"
    print(f"\nstatus page screenshot: {SCREENSHOT}")


def test_status_page_forgets_a_refused_token_and_ignores_one_in_the_address(finished_job):
    service, job, records, root = finished_job
    browser = Browser(root / "chromium-refused")
    try:
        # an old-style link: the token in the address is neither used nor left in the address bar
        browser.goto(service.url + "/?token=" + service.token)
        browser.wait_for(FORM_SHOWN, 30, "the token form")
        assert browser.evaluate("location.href") == service.url + "/"
        assert all(service.token not in url for url in _history_urls(browser))
        assert browser.evaluate(HAS_JOB_ROW) is False

        _type_token(browser, "not-the-token-0000000000")
        browser.wait_for("document.getElementById('login-message').textContent.includes('refused')", 30,
                         "the refusal")
        assert browser.evaluate(FORM_SHOWN) is True
        assert browser.evaluate("sessionStorage.getItem('align-service-token')") is None
        assert browser.evaluate(HAS_JOB_ROW) is False
    finally:
        browser.close()


def _check_job_and_charts(html: str, job: dict, records: list[dict]) -> None:
    row = re.search(rf'<tr data-job="{job["id"]}" data-state="finished">(.*?)</tr>', html, re.S)
    assert row, html[:3000]
    assert "page-demo" in row.group(1) and "10 / 10" in row.group(1)
    # the loss chart: one polyline vertex per logged step
    loss_svg = re.search(rf'<svg[^>]*data-chart="loss" data-job="{job["id"]}" data-points="(\d+)"(.*?)</svg>', html, re.S)
    assert loss_svg and int(loss_svg.group(1)) == len(records)
    points = re.search(r'<polyline points="([^"]+)"[^>]*data-series="loss"', loss_svg.group(2)).group(1).split()
    assert len(points) == len(records)
    # y grows downward in SVG: the highest logged loss is drawn highest (smallest y)
    ys = [float(p.split(",")[1]) for p in points]
    assert int(np.argmin(ys)) == int(np.argmax([r["loss"] for r in records]))
    # the recall chart: recall@{1,5,10} for both directions, once evaluated
    recall_svg = re.search(rf'<svg[^>]*data-chart="recall" data-job="{job["id"]}" data-points="(\d+)"', html)
    assert recall_svg and int(recall_svg.group(1)) == 6
    assert 'data-series="text→image"' in html and 'data-series="image→text"' in html
    # the validation chart: recall at the smallest K both ways and the mean, one point per validated step
    validated = [r for r in records if "val/mean_recall" in r]
    assert [r["step"] for r in validated] == [5, 10]
    val_svg = re.search(rf'<svg[^>]*data-chart="validation" data-job="{job["id"]}" data-points="(\d+)"(.*?)</svg>',
                        html, re.S)
    assert val_svg and int(val_svg.group(1)) == 3 * len(validated)
    lines = {name: points for points, name in re.findall(r'<polyline points="([^"]+)"[^>]*data-series="([^"]+)"',
                                                         val_svg.group(2))}
    assert set(lines) == {"text→image R@1", "image→text R@1", "mean"}, lines
    # each line's vertices: as many as validated steps, the higher logged value drawn higher (SVG y grows down)
    for name, key in (("text→image R@1", "val/text_to_image_recall@1"), ("image→text R@1", "val/image_to_text_recall@1"),
                      ("mean", "val/mean_recall")):
        ys = [float(p.split(",")[1]) for p in lines[name].split()]
        values = [r[key] for r in validated]
        assert len(ys) == len(validated)
        if values[0] == values[1]:
            assert ys[0] == ys[1], (name, ys, values)
        else:
            assert (ys[0] > ys[1]) == (values[0] < values[1]), (name, ys, values)
