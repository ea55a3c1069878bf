"""The report as one self-contained HTML file: styles inline, plots and thumbnails as data: URIs,
no script and no address outside the file, so it opens anywhere, offline, and can be mailed."""
from __future__ import annotations

import base64
import html
import math

STYLE = """
:root { --ink: #1d2330; --muted: #6b7383; --line: #d9dde5; --hit: #2f9e6f; --miss: #d9534f; }
* { box-sizing: border-box; }
body { font: 14px/1.45 system-ui, -apple-system, "Segoe UI", sans-serif; color: var(--ink); margin: 0;
       background: #f6f7f9; }
main { max-width: 1180px; margin: 0 auto; padding: 24px 28px 60px; }
h1 { font-size: 22px; margin: 0 0 4px; } h2 { font-size: 17px; margin: 30px 0 8px; border-bottom: 1px solid var(--line);
     padding-bottom: 4px; } h3 { font-size: 14px; margin: 18px 0 6px; }
.muted, .note { color: var(--muted); } .note { font-size: 12px; }
section { background: #fff; border: 1px solid var(--line); border-radius: 8px; padding: 4px 18px 16px; margin-top: 18px; }
img.plot { max-width: 100%; height: auto; display: block; margin: 8px 0; }
table { border-collapse: collapse; margin: 8px 0; font-size: 13px; }
th, td { border-bottom: 1px solid var(--line); padding: 4px 10px; text-align: left; vertical-align: top; }
td.num, th.num { text-align: right; font-variant-numeric: tabular-nums; }
.facts td:first-child { color: var(--muted); padding-right: 18px; }
.row { display: flex; gap: 14px; align-items: flex-start; padding: 10px 0; border-bottom: 1px solid var(--line); }
.row .query { width: 250px; flex: none; } .row .query .caption { font-weight: 600; }
.thumbs { display: flex; gap: 8px; flex-wrap: wrap; }
figure { margin: 0; width: 118px; font-size: 11px; }
figure img, figure .missing { width: 112px; height: 112px; object-fit: cover; border: 3px solid var(--line);
                              border-radius: 4px; display: block; background: #eef0f3; }
figure.hit img, figure.hit .missing { border-color: var(--hit); }
figure.miss img, figure.miss .missing { border-color: var(--miss); }
figure.own img, figure.own .missing { border-style: dashed; border-color: var(--ink); }
figcaption { overflow-wrap: anywhere; } .mark-hit { color: var(--hit); font-weight: 700; }
.mark-miss { color: var(--miss); font-weight: 700; }
.fields { display: flex; flex-wrap: wrap; gap: 18px; } .field { flex: 1 1 420px; }
.side { display: flex; flex-wrap: wrap; gap: 28px; align-items: flex-start; } .side img.plot { max-width: 560px; }
details > summary { cursor: pointer; color: var(--muted); } pre { overflow-x: auto; font-size: 12px; }
"""


def esc(value) -> str:
    return html.escape(str(value), quote=True)


def number(value, digits: int = 3) -> str:
    if value is None or (isinstance(value, float) and math.isnan(value)):
        return "—"
    return f"{value:.{digits}f}"


def png_uri(png: bytes) -> str:
    return "data:image/png;base64," + base64.b64encode(png).decode("ascii")


def plot(png: bytes | None, alt: str, element_id: str) -> str:
    if png is None:
        return f'<p class="muted" id="{esc(element_id)}">nothing to draw yet.</p>'
    return f'<img class="plot" id="{esc(element_id)}" alt="{esc(alt)}" src="{png_uri(png)}">'


def facts_table(rows: list[tuple[str, str]]) -> str:
    body = "".join(f"<tr><td>{esc(k)}</td><td>{esc(v)}</td></tr>" for k, v in rows)
    return f'<table class="facts">{body}</table>'


def recall_table(recall: dict[str, dict]) -> str:
    ks = sorted({int(key.split("@")[1]) for key in recall})

    def cell(direction: str, k: int) -> str:
        v = recall.get(f"{direction}_recall@{k}")
        return ("<td class='num'>—</td>" if v is None else
                f"<td class='num'>{number(v['value'])} <span class='muted'>[{number(v['low'])}, "
                f"{number(v['high'])}]</span></td>")
    rows = "".join(f"<tr><td>R@{k}</td>{cell('text_to_image', k)}{cell('image_to_text', k)}</tr>" for k in ks)
    return ("<table class='recall'><thead><tr><th>recall</th><th class='num'>text → image [95%]</th>"
            f"<th class='num'>image → text [95%]</th></tr></thead><tbody>{rows}</tbody></table>")


def fields_table(fields: dict[str, dict]) -> str:
    rows = "".join(f"<tr><td>{esc(name)}</td><td class='num'>{number(f['zero_shot'])}</td>"
                   f"<td class='num'>{number(f['linear_probe'])}</td><td class='num'>{len(f['classes'])}</td></tr>"
                   for name, f in fields.items())
    return ("<table id='fields-table'><thead><tr><th>field</th><th class='num'>zero-shot</th>"
            "<th class='num'>linear probe (ceiling)</th><th class='num'>classes</th></tr></thead>"
            f"<tbody>{rows}</tbody></table>")


def per_class_table(detail: dict) -> str:
    """Per class: its rows, its zero-shot recall, and what it is most often mistaken for."""
    rows = []
    for i, name in enumerate(detail["classes"]):
        counts = list(detail["confusion"][i])
        counts[i] = 0
        worst = max(range(len(counts)), key=lambda j: (counts[j], -j))
        mistaken = f"{detail['classes'][worst]} ({counts[worst]})" if counts[worst] else "—"
        rows.append(f"<tr><td>{esc(name)}</td><td class='num'>{detail['support'][i]}</td>"
                    f"<td class='num'>{number(detail['recall'][i])}</td><td>{esc(mistaken)}</td></tr>")
    return ("<table class='per-class'><thead><tr><th>class</th><th class='num'>images</th>"
            "<th class='num'>zero-shot recall</th><th>most often predicted instead</th></tr></thead>"
            f"<tbody>{''.join(rows)}</tbody></table>")


def _labels_text(labels: dict) -> str:
    return ", ".join(f"{k}: {v}" for k, v in sorted(labels.items())) if labels else "no labels"


def _figure(key: str, thumbs: dict[str, str], kind: str, caption: str) -> str:
    picture = (f'<img alt="{esc(key)}" src="{thumbs[key]}">' if key in thumbs
               else '<div class="missing" title="picture unavailable"></div>')
    return f'<figure class="{kind}">{picture}<figcaption>{caption}</figcaption></figure>'


def example_row(example: dict, thumbs: dict[str, str], show_own: bool) -> str:
    """One caption: its top images, hits and misses marked (and, for a miss, the image it describes)."""
    figures = []
    for rank, item in enumerate(example["top"], start=1):
        mark = "<span class='mark-hit'>✓ hit</span>" if item["hit"] else "<span class='mark-miss'>✗ miss</span>"
        figures.append(_figure(item["key"], thumbs, "hit" if item["hit"] else "miss",
                               f"{rank}. {mark} {item['score']:.3f}<br>{esc(_labels_text(item['labels']))}"))
    if show_own:
        figures.append(_figure(example["key"], thumbs, "own",
                               "its own image"))
    return (f'<div class="row gallery-row"><div class="query"><div class="caption">{esc(example["caption"])}</div>'
            f'<div class="muted">{esc(_labels_text(example["labels"]))}</div>'
            f'<div class="muted">first hit at rank {example["first_hit_rank"] + 1}</div></div>'
            f'<div class="thumbs">{"".join(figures)}</div></div>')


def document(title: str, sections: list[str]) -> str:
    return ("<!DOCTYPE html>\n<html lang='en'><head><meta charset='utf-8'>"
            "<meta name='viewport' content='width=device-width, initial-scale=1'>"
            # nothing may leave the file: no script, no fetch, images only from the page itself
            "<meta http-equiv='Content-Security-Policy' content=\"default-src 'none'; img-src data:; "
            "style-src 'unsafe-inline'\">"
            f"<title>{esc(title)}</title><style>{STYLE}</style></head><body><main>"
            + "".join(sections) + "</main></body></html>\n")
