"""The status page in headless Chromium (Debian's chromium package) shows a submitted job and its charts.

A real ``align serve`` runs one small job (a scratch text tower, 10 steps, a log line per step) on
scikit-learn's digits. Chromium loads ``/``, runs its JavaScript against the live API, and the
test reads the DOM it dumps (the job row, the SVG loss chart with one point per logged step, the
recall chart) and writes a screenshot to tests/artifacts/status-page.png.
"""
from __future__ import annotations

import re

import numpy as np
import pytest
from PIL import Image

from service_harness import REPO, Service, chromium, run_chromium

SCREENSHOT = REPO / "tests" / "artifacts" / "status-page.png"
PAGE_RECIPE = """
name = "page-demo"
[vision]
image_size = 32
[text]
kind = "scratch"
max_length = 12
[text.scratch]
width = 64
layers = 1
attention_heads = 2
vocabulary_size = 300
[train]
steps = 10
batch_size = 16
lr = 2e-3
warmup_steps = 2
checkpoint_every = 0
log_every = 1
threads = 1
"""
LOSS_BLUE = (0x2F, 0x6F, 0xDF)  # the loss line's colour in align/service/page.py

pytestmark = pytest.mark.skipif(chromium() is None, reason="needs Debian's chromium package (.ci/run installs it)")


@pytest.fixture(scope="module")
def finished_job(small_digits_shards, tmp_path_factory):
    root = tmp_path_factory.mktemp("page")
    service = Service(root / "home", [small_digits_shards.parent])
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


def test_status_page_shows_the_job_and_its_charts(finished_job):
    service, job, records, root = finished_job
    assert len(records) == 10

    dom = run_chromium(service.url + "/", root / "chromium-dom", "--dump-dom")
    assert dom.returncode == 0, dom.stderr[-2000:]
    html = dom.stdout
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

    SCREENSHOT.parent.mkdir(parents=True, exist_ok=True)
    SCREENSHOT.unlink(missing_ok=True)
    shot = run_chromium(service.url + "/", root / "chromium-shot", f"--screenshot={SCREENSHOT}")
    assert shot.returncode == 0 and SCREENSHOT.is_file(), shot.stderr[-2000:]
    image = np.asarray(Image.open(SCREENSHOT).convert("RGB")).astype(int)  # (900, 1200, 3)
    assert image.shape == (900, 1200, 3)
    blue = (np.abs(image - np.array(LOSS_BLUE)).sum(-1) < 40).sum()
    assert blue > 100, f"the loss line is not on the screenshot ({blue} pixels of its colour)"
    print(f"\nstatus page screenshot: {SCREENSHOT}")
