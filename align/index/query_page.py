"""``align query --html OUT``: a query's answer as one self-contained page (thumbnails inline, no network)."""
from __future__ import annotations

from pathlib import Path

from rich.console import Console

from ..errors import AlignError
from ..fileio import write_text_atomic
from ..report.search_view import SEARCH_THUMBNAIL_PX, search_document
from ..report.thumbnails import shrink_to_jpeg
from .gallery import load_index
from .hits import GalleryHits, NoPicture


def write_query_html(index_dir: str | Path, answer: dict, out: str | Path, console: Console | None = None,
                     side: int = SEARCH_THUMBNAIL_PX) -> Path:
    """Write ``answer`` (from ``query_index`` on ``index_dir``) to ``out`` with each hit's labels and
    thumbnail. An image no longer in the index's source folder, or one that fails to decode, is
    drawn as a grey box and counted."""
    console = console or Console(stderr=True)
    out = Path(out)
    if out.is_dir():
        raise AlignError(f"--html {out} is a folder", "give the path of the .html file to write")
    if not out.parent.is_dir():
        raise AlignError(f"--html {out}: the folder {out.parent} does not exist", "create it first, or write elsewhere")
    hits = GalleryHits(load_index(index_dir))
    answer = hits.labelled(answer)
    keys = list(dict.fromkeys(hit["key"] for item in answer["queries"] for hit in item["results"]))
    pictures, missing = {}, []
    for key in keys:
        try:
            pictures[key] = shrink_to_jpeg(hits.picture(key), side)
        except (NoPicture, ValueError, OSError):
            missing.append(key)
    texts = [item["text"] for item in answer["queries"]]
    title = "align query: " + (texts[0] if len(texts) == 1 else f"{len(texts)} queries")
    write_text_atomic(out, search_document(answer, pictures, title))
    if missing:
        console.print(f"[yellow]{len(missing)} of {len(keys)} image(s) have no picture (gone from {hits.source} "
                      f"or not decodable): {', '.join(missing[:5])}{' ...' if len(missing) > 5 else ''}")
    console.print(f"wrote {out} ({len(pictures)} thumbnails)")
    return out
