"""The search view: a caption's top-k gallery images as thumbnails with their keys, labels and scores.

One way of drawing a hit, used twice: the service's status page (``align/service/page.py``) splices
``SEARCH_STYLE`` and ``SEARCH_SCRIPT`` into itself and draws the answers of ``POST /exports/<name>/search``,
fetching each thumbnail with the token header; ``search_document`` writes the same view as one
self-contained file for ``align query --html``: the answer as a JSON data block, the thumbnails as
data: URIs, the same script drawing them. That file loads nothing: its policy allows images only
from ``data:`` and runs only the one script whose hash it names.

A hit record is ``{rank, key, score, labels}`` (``score`` may be None, ``labels`` a flat dict); all
text goes into the page with ``textContent``, never as HTML.
"""
from __future__ import annotations

import base64
import hashlib
import html
import json

from .thumbnails import jpeg_uri

SEARCH_THUMBNAIL_PX = 160

SEARCH_STYLE = """
.search-query { margin: 10px 0 4px; font-weight: 600; }
.search-query .search-facts { font-weight: 400; color: #6b7383; margin-left: 8px; font-size: 12px; }
.search-hits { display: flex; flex-wrap: wrap; gap: 10px; margin: 6px 0 12px; }
.search-hits figure { margin: 0; width: 168px; font-size: 12px; background: #fff; border: 1px solid #d9dde5;
                      border-radius: 6px; padding: 4px; }
.search-hits img, .search-hits .search-missing { width: 160px; height: 160px; object-fit: contain; display: block;
                                                 background: #eef0f3; border-radius: 4px; }
.search-hits .search-missing { display: flex; align-items: center; justify-content: center; color: #6b7383; }
.search-hits figcaption { padding: 4px 2px 0; overflow-wrap: anywhere; }
.search-hits .search-rank { font-weight: 700; } .search-hits .search-score { float: right;
  font-variant-numeric: tabular-nums; }
.search-hits .search-key { font-family: ui-monospace, monospace; font-size: 11px; }
.search-hits .search-labels { color: #6b7383; }
"""

# drawQuery(item, pictureFor) -> element: one query's hits, in rank order. pictureFor(key) resolves to
# an image address (an object URL on the status page, a data: URI in the file) or null.
SEARCH_SCRIPT = r"""
function searchLabelsText(labels) {
  const entries = Object.entries(labels || {}).sort((a, b) => a[0] < b[0] ? -1 : a[0] > b[0] ? 1 : 0);
  return entries.length ? entries.map(([k, v]) => k + ": " + v).join(", ") : "no labels";
}

function searchNode(tag, className, text) {
  const node = document.createElement(tag);
  if (className) { node.className = className; }
  if (text !== undefined) { node.textContent = text; }
  return node;
}

function hitFigure(hit, pictureFor) {
  const figure = searchNode("figure", "search-hit");
  figure.dataset.rank = String(hit.rank);
  figure.dataset.key = hit.key;
  const slot = searchNode("div", "search-missing", "loading…");
  figure.appendChild(slot);
  Promise.resolve(pictureFor(hit.key)).then(src => {
    if (!src) { slot.textContent = "no picture"; return; }
    const img = document.createElement("img");
    img.alt = hit.key;
    img.src = src;
    slot.replaceWith(img);
  }, err => { slot.textContent = "no picture: " + err.message; });
  const caption = searchNode("figcaption");
  caption.appendChild(searchNode("span", "search-rank", "#" + hit.rank));
  caption.appendChild(searchNode("span", "search-score",
                                 hit.score === null || hit.score === undefined ? "n/a" : hit.score.toFixed(3)));
  caption.appendChild(searchNode("div", "search-key", hit.key));
  caption.appendChild(searchNode("div", "search-labels", searchLabelsText(hit.labels)));
  figure.appendChild(caption);
  return figure;
}

function drawQuery(item, pictureFor, facts) {
  const block = searchNode("div", "search-result");
  const heading = searchNode("div", "search-query", item.text);
  if (facts) { heading.appendChild(searchNode("span", "search-facts", facts)); }
  block.appendChild(heading);
  const hits = searchNode("div", "search-hits");
  for (const hit of item.results) { hits.appendChild(hitFigure(hit, pictureFor)); }
  if (!item.results.length) { hits.appendChild(searchNode("div", "search-facts", "no match")); }
  block.appendChild(hits);
  return block;
}

function answerFacts(answer) {
  const filtered = answer.filter ? ", " + answer.filter.matching + " matching the filter" : "";
  return answer.backend + " search of " + answer.gallery_size + " images" + filtered + ", " + answer.elapsed_ms + " ms";
}
"""

# the file's own start: read the two data blocks, draw every query
_FILE_SCRIPT = SEARCH_SCRIPT + r"""
(() => {
  const answer = JSON.parse(document.getElementById("answer").textContent);
  const pictures = JSON.parse(document.getElementById("pictures").textContent);
  const results = document.getElementById("results");
  for (const item of answer.queries) {
    results.appendChild(drawQuery(item, key => pictures[key] || null, answerFacts(answer)));
  }
  document.body.dataset.drawn = "yes";
})();
"""

_FILE_STYLE = """
body { font: 14px/1.45 system-ui, -apple-system, "Segoe UI", sans-serif; color: #1d2330; margin: 24px;
       background: #fafbfc; }
h1 { font-size: 20px; margin: 0 0 4px; } .muted { color: #6b7383; }
"""


def _script_hash(script: str) -> str:
    return "'sha256-" + base64.b64encode(hashlib.sha256(script.encode("utf-8")).digest()).decode("ascii") + "'"


def _json_block(element_id: str, value) -> str:
    # "<" escaped so no text inside can close the block; the JSON still parses to the same value
    text = json.dumps(value, ensure_ascii=False, allow_nan=False).replace("<", "\\u003c")
    return f'<script type="application/json" id="{element_id}">{text}</script>'


def search_document(answer: dict, pictures: dict[str, bytes], title: str) -> str:
    """One self-contained HTML file: the answer's queries, each hit drawn by ``SEARCH_SCRIPT``.

    ``answer`` is ``query_answer``'s record with each hit's ``labels``; ``pictures`` maps a key to its
    thumbnail's JPEG bytes (a key left out is drawn as a grey box saying so).
    """
    policy = (f"default-src 'none'; img-src data:; style-src 'unsafe-inline'; script-src {_script_hash(_FILE_SCRIPT)}; "
              "base-uri 'none'; form-action 'none'")
    uris = {key: jpeg_uri(jpeg) for key, jpeg in pictures.items()}
    return ("<!DOCTYPE html>\n<html lang='en'><head><meta charset='utf-8'>"
            "<meta name='viewport' content='width=device-width, initial-scale=1'>"
            f"<meta http-equiv='Content-Security-Policy' content=\"{policy}\">"
            f"<title>{html.escape(title)}</title><style>{_FILE_STYLE}{SEARCH_STYLE}</style></head><body>"
            f"<h1>{html.escape(title)}</h1><div id='results'></div>"
            "<noscript>This file draws its results with a script; allow scripts for local files to see them."
            "</noscript>" + _json_block("answer", answer) + _json_block("pictures", uris)
            + f"<script>{_FILE_SCRIPT}</script></body></html>\n")
