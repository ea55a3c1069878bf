"""The status page at ``/``: plain HTML and a little JavaScript, no build step, nothing from the network.

It polls ``GET /jobs`` and each shown job's ``GET /jobs/<id>/metrics`` and draws, per job, the
training loss against the step, the validation recall logged during training (``val/...`` records,
every ``train.eval_every`` steps) and recall@K both ways (once the job is evaluated) as inline SVG.
Job text is put in with ``textContent``, never as HTML.

Search: for each export with a gallery index (``GET /exports``) a box takes a caption and shows the
top-k images of ``POST /exports/<name>/search`` in rank order, drawn by the search view shared with
``align query --html`` (``align/report/search_view.py``). Each thumbnail is fetched from
``GET /exports/<name>/thumbnail`` with the token header and shown through an object URL (revoked
when the next answer replaces it), so the token never goes into an image address.

The token. When the service needs it for reads (bound beyond loopback), the page asks for it once
in a form: the field has no ``name`` and the form is never submitted (the script handles it, and
the page's CSP says ``form-action 'none'``), so the token never becomes part of an address, the
browser history or a log. It is kept in the tab's ``sessionStorage`` (gone when the tab closes)
and sent as ``Authorization: Bearer`` on every call. A refused token is forgotten and asked for
again.
"""
from __future__ import annotations

from ..report.search_view import SEARCH_SCRIPT, SEARCH_STYLE, SEARCH_THUMBNAIL_PX

_PAGE = r"""<!doctype html>
<html lang="en">
<head>
<meta charset="utf-8">
<meta name="viewport" content="width=device-width, initial-scale=1">
<title>align service</title>
<style>
  :root { --ink: #1d2330; --muted: #6b7383; --line: #d9dde5; --loss: #2f6fdf; --t2i: #d9534f; --i2t: #3a9d5d; }
  body { font: 14px/1.45 system-ui, -apple-system, "Segoe UI", sans-serif; color: var(--ink); margin: 24px; background: #fafbfc; }
  h1 { font-size: 20px; margin: 0 0 4px; }
  #summary { color: var(--muted); margin-bottom: 16px; }
  table { border-collapse: collapse; width: 100%; background: #fff; border: 1px solid var(--line); }
  th, td { text-align: left; padding: 6px 10px; border-bottom: 1px solid var(--line); white-space: nowrap; }
  th { background: #f1f3f7; font-weight: 600; }
  td.num { text-align: right; font-variant-numeric: tabular-nums; }
  .state { padding: 1px 8px; border-radius: 10px; font-size: 12px; font-weight: 600; }
  .state-queued { background: #eef0f4; } .state-running { background: #dce8fd; color: #1b4fb0; }
  .state-finished { background: #dcf3e4; color: #1d6b3a; } .state-failed { background: #fbe0df; color: #a12622; }
  .state-cancelled { background: #f4eddc; color: #7a5a12; }
  #charts { display: flex; flex-wrap: wrap; gap: 16px; margin-top: 18px; }
  .job { background: #fff; border: 1px solid var(--line); border-radius: 6px; padding: 10px 12px; }
  .job h2 { font-size: 15px; margin: 0 0 6px; }
  .job .error { color: #a12622; max-width: 700px; white-space: pre-wrap; }
  .job .charts { display: flex; gap: 10px; }
  svg text { font-size: 11px; fill: var(--muted); }
  svg .title { font-size: 12px; fill: var(--ink); font-weight: 600; }
  #login { background: #fff; border: 1px solid var(--line); border-radius: 6px; padding: 12px 14px; margin-bottom: 16px; max-width: 640px; }
  #login input { font: inherit; width: 26em; padding: 3px 6px; }
  #login .note { color: var(--muted); margin: 6px 0 0; }
  #login-message { color: #a12622; margin-bottom: 6px; }
  #search h2 { font-size: 16px; margin: 24px 0 6px; }
  .search-box { background: #fff; border: 1px solid var(--line); border-radius: 6px; padding: 10px 12px; margin-bottom: 12px; }
  .search-box input { font: inherit; padding: 3px 6px; } .search-box input[type=search] { width: 28em; }
  .search-box input[type=number] { width: 4em; } .search-box .search-name { font-weight: 600; margin-right: 8px; }
  .search-box .search-status { color: var(--muted); margin-top: 4px; } .search-box .search-status.error { color: #a12622; }
/*SEARCH_STYLE*/
</style>
</head>
<body>
<h1>align service</h1>
<div id="summary">loading…</div>
<form id="login" hidden autocomplete="off">
  <div id="login-message"></div>
  <label for="token">Service token</label>
  <input id="token" type="password" autocomplete="off" spellcheck="false">
  <button type="submit">Show jobs</button>
  <p class="note">It is in HOME/token on the service's machine. This tab keeps it until it closes and sends it
  with each call as a header, never in the address.</p>
</form>
<table id="jobs">
  <thead><tr><th>id</th><th>name</th><th>state</th><th>phase</th><th>step</th><th>loss</th><th>pairs/s</th>
  <th>time left</th><th>R@1 text→image</th></tr></thead>
  <tbody></tbody>
</table>
<div id="charts"></div>
<section id="search"><h2>Search an export's gallery</h2><div id="search-boxes" class="muted">loading…</div></section>
<script>
"use strict";
const SHOWN = 8;            // jobs drawn as charts (newest first)
const NS = "http://www.w3.org/2000/svg";
const TOKEN_KEY = "align-service-token";  // sessionStorage: this tab only, gone when it closes

// An old link may still carry ?token=: take it out of the address bar and this history entry, unused.
if (new URLSearchParams(location.search).has("token")) { history.replaceState(null, "", location.pathname); }
let token = sessionStorage.getItem(TOKEN_KEY);

class NeedsToken extends Error {}

async function getJSON(url) {
  const headers = token ? { "Authorization": "Bearer " + token } : {};
  const response = await fetch(url, { headers, cache: "no-store" });
  if (response.status === 401) {
    throw new NeedsToken(token ? "The service refused that token." : "This service needs its token.");
  }
  if (!response.ok) { throw new Error(url + ": " + response.status); }
  return response.json();
}

const login = document.getElementById("login");

function askForToken(message) {
  token = null;
  sessionStorage.removeItem(TOKEN_KEY);
  document.getElementById("login-message").textContent = message;
  login.hidden = false;
  document.getElementById("token").focus();
}

login.addEventListener("submit", event => {
  event.preventDefault();  // never submitted: the token stays out of every address
  const field = document.getElementById("token");
  const given = field.value.trim();
  field.value = "";
  if (!given) { return; }
  token = given;
  sessionStorage.setItem(TOKEN_KEY, token);
  login.hidden = true;
  refresh();
  if (pendingSearch) { const box = pendingSearch; pendingSearch = null; runSearch(box); }
});

function el(tag, attrs, text) {
  const node = document.createElement(tag);
  for (const [k, v] of Object.entries(attrs || {})) { node.setAttribute(k, v); }
  if (text !== undefined) { node.textContent = text; }
  return node;
}

function svg(tag, attrs, text) {
  const node = document.createElementNS(NS, tag);
  for (const [k, v] of Object.entries(attrs || {})) { node.setAttribute(k, v); }
  if (text !== undefined) { node.textContent = text; }
  return node;
}

function fmt(value, digits) {
  return (value === null || value === undefined) ? "–" : Number(value).toFixed(digits);
}

function duration(seconds) {
  if (seconds === null || seconds === undefined) { return "–"; }
  const s = Math.round(seconds);
  return s >= 3600 ? Math.floor(s / 3600) + "h " + Math.floor((s % 3600) / 60) + "m"
       : s >= 60 ? Math.floor(s / 60) + "m " + (s % 60) + "s" : s + "s";
}

// A line chart: series = [{name, color, points: [[x, y], ...]}]; xs drawn as given (numbers).
function lineChart(kind, jobId, title, series, xLabel, yRange, emptyText) {
  const W = 340, H = 200, L = 44, R = 10, T = 22, B = 30;
  const all = series.flatMap(s => s.points);
  const root = svg("svg", { width: W, height: H, viewBox: `0 0 ${W} ${H}`, "data-chart": kind, "data-job": jobId,
                            "data-points": all.length });
  root.appendChild(svg("text", { x: L, y: 14, class: "title" }, title));
  root.appendChild(svg("rect", { x: L, y: T, width: W - L - R, height: H - T - B, fill: "#fbfcfe", stroke: "#d9dde5" }));
  if (!all.length) {
    root.appendChild(svg("text", { x: L + 10, y: T + 40 }, emptyText || "no logged step yet"));
    return root;
  }
  const xs = all.map(p => p[0]), ys = all.map(p => p[1]);
  let [x0, x1] = [Math.min(...xs), Math.max(...xs)];
  let [y0, y1] = yRange || [Math.min(...ys), Math.max(...ys)];
  if (x1 === x0) { x1 = x0 + 1; }
  if (y1 === y0) { y1 = y0 + 1; }
  const px = x => L + (x - x0) / (x1 - x0) * (W - L - R);
  const py = y => H - B - (y - y0) / (y1 - y0) * (H - T - B);
  for (const y of [y0, (y0 + y1) / 2, y1]) {
    root.appendChild(svg("line", { x1: L, x2: W - R, y1: py(y), y2: py(y), stroke: "#eceff4" }));
    root.appendChild(svg("text", { x: L - 4, y: py(y) + 4, "text-anchor": "end" }, y.toFixed(y1 - y0 < 0.1 ? 3 : 2)));
  }
  root.appendChild(svg("text", { x: L, y: H - 8 }, String(x0)));
  root.appendChild(svg("text", { x: W - R, y: H - 8, "text-anchor": "end" }, String(x1)));
  root.appendChild(svg("text", { x: (L + W - R) / 2, y: H - 8, "text-anchor": "middle" }, xLabel));
  series.forEach((s, i) => {
    const pts = s.points.map(p => px(p[0]).toFixed(1) + "," + py(p[1]).toFixed(1)).join(" ");
    root.appendChild(svg("polyline", { points: pts, fill: "none", stroke: s.color, "stroke-width": 2,
                                       "data-series": s.name }));
    for (const p of s.points) { root.appendChild(svg("circle", { cx: px(p[0]), cy: py(p[1]), r: 2.5, fill: s.color })); }
    if (series.length > 1) {
      root.appendChild(svg("text", { x: W - R - 4, y: T + 14 + 14 * i, "text-anchor": "end",
                                   // a halo in the plot's colour keeps the name readable over a line
                                   style: "fill:" + s.color + "; paint-order: stroke; stroke: #fbfcfe; stroke-width: 3px" },
                               s.name));
    }
  });
  return root;
}

function recallSeries(evaluation) {
  const out = [];
  for (const [direction, name, color] of [["text_to_image", "text→image", "#d9534f"],
                                           ["image_to_text", "image→text", "#3a9d5d"]]) {
    const points = [];
    for (const [key, value] of Object.entries(evaluation || {})) {
      const m = key.match(new RegExp("^" + direction + "_recall@(\\d+)$"));
      if (m) { points.push([Number(m[1]), value]); }
    }
    points.sort((a, b) => a[0] - b[0]);
    if (points.length) { out.push({ name, color, points }); }
  }
  return out;
}

// Validation recall logged during training (val/... keys, every train.eval_every steps): recall at the
// smallest K both ways and their mean over every logged K, against the step.
function validationSeries(records) {
  const keys = new Set(records.flatMap(r => Object.keys(r).filter(k => k.startsWith("val/"))));
  const smallest = direction => [...keys].map(k => k.match(new RegExp("^val/" + direction + "_recall@(\\d+)$")))
    .filter(Boolean).sort((a, b) => Number(a[1]) - Number(b[1])).map(m => m[0])[0];
  const out = [];
  for (const [key, name, color] of [[smallest("text_to_image"), "text→image", "#d9534f"],
                                    [smallest("image_to_text"), "image→text", "#3a9d5d"],
                                    ["val/mean_recall", "mean", "#7a4fc9"]]) {
    if (!key || !keys.has(key)) { continue; }
    const points = records.filter(r => typeof r[key] === "number").map(r => [r.step, r[key]]);
    out.push({ name: key === "val/mean_recall" ? name : name + " R@" + key.split("@")[1], color, points });
  }
  return out;
}

function recallRange(series) {
  const ys = series.flatMap(s => s.points.map(p => p[1]));
  if (!ys.length) { return [0, 1]; }
  return [Math.max(0, Math.min(...ys) - 0.05), Math.min(1, Math.max(...ys) + 0.05)];
}

function jobRow(job) {
  const row = el("tr", { "data-job": job.id, "data-state": job.state });
  const state = el("span", { class: "state state-" + job.state },
                   job.state + (job.cancel_requested && job.state === "running" ? " (cancelling)" : ""));
  const cells = [String(job.id), job.name, state, job.state === "running" ? (job.phase || "–") : "–", job.step + " / " + job.steps,
                 fmt(job.loss, 3), fmt(job.pairs_per_s, 0), duration(job.eta_s),
                 fmt(job.metrics ? job.metrics["text_to_image_recall@1"] : null, 3)];
  cells.forEach((cell, i) => {
    const td = el("td", i >= 4 ? { class: "num" } : {});
    if (typeof cell === "string") { td.textContent = cell; } else { td.appendChild(cell); }
    row.appendChild(td);
  });
  return row;
}

async function jobCard(job) {
  const card = el("div", { class: "job", id: "job-" + job.id });
  card.appendChild(el("h2", {}, "#" + job.id + " " + job.name + " — " + job.state));
  if (job.error) {
    card.appendChild(el("div", { class: "error" }, job.error.message + (job.error.hint ? "\nhint: " + job.error.hint : "")));
  }
  const stream = await getJSON("/jobs/" + job.id + "/metrics");
  const loss = stream.records.filter(r => typeof r.loss === "number").map(r => [r.step, r.loss]);
  const validation = validationSeries(stream.records);
  const charts = el("div", { class: "charts" });
  charts.appendChild(lineChart("loss", job.id, "training loss", [{ name: "loss", color: "#2f6fdf", points: loss }], "step"));
  charts.appendChild(lineChart("validation", job.id, "validation recall during training", validation, "step",
                               recallRange(validation), "none logged (the recipe's train.eval_every is 0)"));
  charts.appendChild(lineChart("recall", job.id, "recall@K (held-out split)", recallSeries(stream.evaluation), "K", [0, 1],
                               "appears once the job is evaluated"));
  card.appendChild(charts);
  return card;
}

/*SEARCH_SCRIPT*/

// ---- search: one box per export with a gallery index ----
const THUMBNAIL_PX = /*THUMBNAIL_PX*/;
let searchNames = null;     // the exports whose boxes are drawn (rebuilt only when the list changes)
let pendingSearch = null;   // a search that waited for the token; run once it is given

async function postJSON(url, body) {
  const headers = { "Content-Type": "application/json" };
  if (token) { headers["Authorization"] = "Bearer " + token; }
  const response = await fetch(url, { method: "POST", headers, body: JSON.stringify(body), cache: "no-store" });
  if (response.status === 401) {
    throw new NeedsToken(token ? "The service refused that token." : "Searching needs the service token.");
  }
  const answer = await response.json().catch(() => ({}));
  if (!response.ok) {
    throw new Error(answer.error ? answer.error + (answer.hint ? " (" + answer.hint + ")" : "") : url + ": " + response.status);
  }
  return answer;
}

// A thumbnail through the API, with the token header, shown as an object URL (never the token in an address).
async function thumbnailURL(name, key, shown) {
  const headers = token ? { "Authorization": "Bearer " + token } : {};
  const url = "/exports/" + encodeURIComponent(name) + "/thumbnail?key=" + encodeURIComponent(key) + "&px=" + THUMBNAIL_PX;
  const response = await fetch(url, { headers, cache: "no-store" });
  if (!response.ok) {
    const refusal = await response.json().catch(() => ({}));
    throw new Error(refusal.error || String(response.status));
  }
  const objectURL = URL.createObjectURL(await response.blob());
  shown.push(objectURL);
  return objectURL;
}

async function runSearch(box) {
  const name = box.dataset.export;
  const text = box.querySelector("input[type=search]").value.trim();
  const k = Math.max(1, Math.min(100, Number(box.querySelector("input[type=number]").value) || 8));
  const status = box.querySelector(".search-status");
  const output = box.querySelector(".search-output");
  if (!text) { status.textContent = "type a caption first"; return; }
  status.className = "search-status";
  status.textContent = "searching…";
  try {
    const answer = await postJSON("/exports/" + encodeURIComponent(name) + "/search", { texts: [text], k });
    for (const old of box.shownURLs || []) { URL.revokeObjectURL(old); }
    box.shownURLs = [];
    const shown = box.shownURLs;
    output.replaceChildren(drawQuery(answer.queries[0], key => thumbnailURL(name, key, shown)));
    box.dataset.searched = String(Number(box.dataset.searched || 0) + 1);
    status.textContent = answerFacts(answer);
  } catch (err) {
    if (err instanceof NeedsToken) {
      pendingSearch = box;
      status.textContent = "waiting for the service token";
      askForToken(err.message);
      return;
    }
    status.className = "search-status error";
    status.textContent = err.message;
  }
}

function searchBox(name) {
  const box = el("form", { class: "search-box", "data-export": name, autocomplete: "off" });
  box.appendChild(el("span", { class: "search-name" }, name));
  const caption = el("input", { type: "search", placeholder: "a caption, e.g. a handwritten seven", maxlength: "2000",
                                "aria-label": "caption to search " + name + " for" });
  box.appendChild(caption);
  box.appendChild(document.createTextNode(" top "));
  box.appendChild(el("input", { type: "number", min: "1", max: "100", value: "8", "aria-label": "how many images" }));
  box.appendChild(document.createTextNode(" "));
  box.appendChild(el("button", { type: "submit" }, "Search"));
  box.appendChild(el("div", { class: "search-status" }));
  box.appendChild(el("div", { class: "search-output" }));
  box.addEventListener("submit", event => { event.preventDefault(); runSearch(box); });  // never submitted
  return box;
}

async function drawSearchBoxes() {
  const { exports } = await getJSON("/exports");
  const names = exports.filter(e => e.has_index).map(e => e.name);
  if (searchNames !== null && names.join("\n") === searchNames.join("\n")) { return; }  // keep what is typed
  searchNames = names;
  const holder = document.getElementById("search-boxes");
  holder.className = names.length ? "" : "muted";
  holder.replaceChildren(...(names.length ? names.map(searchBox)
    : [document.createTextNode("no export has a gallery index yet (a job with export and index makes one)")]));
}

async function refresh() {
  if (!login.hidden) { return; }  // waiting for the token
  try {
    const { jobs } = await getJSON("/jobs");
    const body = document.querySelector("#jobs tbody");
    body.replaceChildren(...jobs.map(jobRow));
    const counts = {};
    for (const job of jobs) { counts[job.state] = (counts[job.state] || 0) + 1; }
    document.getElementById("summary").textContent = jobs.length + " job(s): " +
      (Object.entries(counts).map(([k, v]) => v + " " + k).join(", ") || "none yet") +
      " · updated " + new Date().toLocaleTimeString();
    const cards = await Promise.all(jobs.slice(0, SHOWN).map(jobCard));
    document.getElementById("charts").replaceChildren(...cards);
    await drawSearchBoxes();
  } catch (err) {
    if (err instanceof NeedsToken) {
      document.getElementById("summary").textContent = "waiting for the service token";
      askForToken(err.message);
      return;
    }
    document.getElementById("summary").textContent = "cannot reach the service: " + err.message;
  }
}

refresh();
setInterval(refresh, 3000);
</script>
</body>
</html>
"""

STATUS_PAGE = (_PAGE.replace("/*SEARCH_STYLE*/", SEARCH_STYLE).replace("/*SEARCH_SCRIPT*/", SEARCH_SCRIPT)
               .replace("/*THUMBNAIL_PX*/", str(SEARCH_THUMBNAIL_PX)))
