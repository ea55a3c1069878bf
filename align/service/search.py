"""Exports and gallery indexes, loaded once, answering ``/exports/<name>/embed``, ``/search`` and ``/thumbnail``.

An export is HOME/exports/<name> (written by a job with ``export``, or by ``align export``); its
gallery index, when there is one, is HOME/indexes/<name>. A loaded export is reused until its
export.json changes (a new export of the same name swaps the folder in whole). Calls on one
export are answered by one thread that owns its text encoder (its fast tokenizer is not safe to
share between threads, and on a CPU two encodes at once are no faster than one after the other);
calls that arrive together share one batched pass (``Batcher``).

Thumbnails come from the folder an index was built from, only for the index's own keys, and every
file read for one (the image, or the shard holding it, and the manifest) is confined to the data
roots at the time of the request: a link planted in the gallery after indexing is refused too.
"""
from __future__ import annotations

import queue
import threading
import time
from collections import OrderedDict
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np

from .. import artifacts as A
from ..errors import AlignError, DataError
from .home import Home
from .security import PathRefused, check_name, confine

MAX_LOADED = 4  # exports kept in memory at once (a MiniLM-sized text side is ~100 MB)


class NotFound(AlignError):
    """No such export or index."""


class Batcher:
    """One thread per loaded export runs its text encoder; concurrent calls share its passes.

    Callers queue their texts and wait; the thread takes everything waiting, embeds it in one go,
    hands each caller its rows, and repeats. Fifty callers at once cost a few batched passes
    instead of fifty small ones, and only this one thread ever calls into torch: every request
    thread that did would start its own OpenMP thread team, and on a small CPU those teams spin
    against each other (measured here: 50 concurrent calls 5-7x slower). Padding to a longer
    neighbour changes no result beyond float noise (mean pooling is over the attention mask).
    """

    def __init__(self, embed_many, name: str):
        self._embed_many = embed_many
        self._queue: queue.SimpleQueue = queue.SimpleQueue()
        self._thread = threading.Thread(target=self._run, name=f"align-embed-{name}", daemon=True)
        self._thread.start()

    def embed(self, texts: list[str]) -> np.ndarray:
        slot: dict = {"done": threading.Event()}
        self._queue.put((texts, slot))
        slot["done"].wait()
        if "error" in slot:
            raise slot["error"]
        return slot["rows"]

    def close(self) -> None:
        self._queue.put(None)

    def _run(self) -> None:
        while True:
            first = self._queue.get()
            if first is None:
                return
            batch = [first]
            while True:
                try:
                    item = self._queue.get_nowait()
                except queue.Empty:
                    break
                if item is None:
                    self._queue.put(None)  # finish this batch, then stop
                    break
                batch.append(item)
            try:
                rows = self._embed_many([t for texts, _ in batch for t in texts])  # (sum N, D)
            except Exception as exc:  # noqa: BLE001 - every caller of the batch hears of it
                for _, slot in batch:
                    slot["error"] = exc
                    slot["done"].set()
                continue
            start = 0
            for texts, slot in batch:
                slot["rows"] = rows[start:start + len(texts)]
                start += len(texts)
                slot["done"].set()


@dataclass
class LoadedExport:
    name: str
    stamp: tuple
    model: object  # align.api.AlignedModel, text side only
    lock: threading.Lock = field(default_factory=threading.Lock)
    checked_index: object | None = None  # the align.index.GalleryIndex whose image side matched this export's
    batcher: Batcher | None = None

    def __post_init__(self):
        self.batcher = Batcher(self.model.embed_text, self.name)


def _stamp(path: Path) -> tuple:
    st = path.stat()
    return (st.st_ino, st.st_mtime_ns, st.st_size)


class ExportCache:
    def __init__(self, home: Home, roots: list[Path] | None = None, max_loaded: int = MAX_LOADED):
        self.home = home
        self.roots = [Path(r).resolve() for r in roots] if roots else [home.data.resolve()]  # where images may be read
        self.max_loaded = max_loaded
        self._lock = threading.Lock()
        self._loaded: OrderedDict[str, LoadedExport] = OrderedDict()
        self._galleries: OrderedDict[str, tuple] = OrderedDict()  # name -> (index.json stamp, GalleryHits)

    def _folder(self, root: Path, name: str, what: str) -> Path:
        check_name(name, f"{what} name")
        folder = root / name
        if not folder.is_dir():
            raise NotFound(f"no {what} named {name!r}", f"list them with GET /exports; a job with export={name!r} makes one")
        real, real_root = folder.resolve(), root.resolve()
        if not real.is_relative_to(real_root):  # a symlink placed in the folder, pointing elsewhere
            raise PathRefused(f"{what} {name!r} points outside {root}")
        return real

    def names(self) -> list[dict]:
        out = []
        for folder in sorted(self.home.exports.iterdir()) if self.home.exports.is_dir() else []:
            if folder.is_dir() and not folder.name.startswith(".") and (folder / A.EXPORT_INFO).is_file():
                out.append({"name": folder.name, "has_index": (self.home.indexes / folder.name / A.INDEX_INFO).is_file()})
        return out

    def get(self, name: str) -> LoadedExport:
        folder = self._folder(self.home.exports, name, "export")
        info = folder / A.EXPORT_INFO
        if not info.is_file():
            raise NotFound(f"export {name!r} is not complete (no {A.EXPORT_INFO})", "wait for its job to finish")
        stamp = _stamp(info)
        with self._lock:
            entry = self._loaded.get(name)
            if entry is None or entry.stamp != stamp:
                from ..api import load

                if entry is not None:
                    entry.batcher.close()  # the export was replaced; calls already queued still get answers
                entry = LoadedExport(name, stamp, load(folder, image_tower=False))  # text side only
                self._loaded[name] = entry
                while len(self._loaded) > self.max_loaded:
                    self._loaded.popitem(last=False)[1].batcher.close()
            self._loaded.move_to_end(name)
            return entry

    def embed(self, name: str, texts: list[str]) -> tuple[np.ndarray, LoadedExport]:
        entry = self.get(name)
        return entry.batcher.embed(texts), entry  # (N, D)

    def gallery(self, name: str):
        """HOME/indexes/<name> loaded (``align.index.hits.GalleryHits``), again whenever its index.json changes."""
        from ..index import load_index
        from ..index.hits import GalleryHits

        folder = self._folder(self.home.indexes, name, "index")
        info = folder / A.INDEX_INFO
        if not info.is_file():
            raise NotFound(f"index {name!r} is not complete", "wait for the job that builds it to finish")
        stamp = _stamp(info)
        with self._lock:
            known = self._galleries.get(name)
        if known is None or known[0] != stamp:
            known = (stamp, GalleryHits(load_index(folder), check=self._confined))
            with self._lock:
                self._galleries[name] = known
                while len(self._galleries) > self.max_loaded:
                    self._galleries.popitem(last=False)
        return known[1]

    def _confined(self, path: Path) -> Path:
        return confine(str(path), self.roots, "gallery file")

    def search(self, name: str, texts: list[str], k: int, backend: str = "auto", where: dict | None = None) -> dict:
        from ..api import check_image_side_matches
        from ..index import query_answer

        entry = self.get(name)
        started = time.perf_counter()
        hits = self.gallery(name)
        with entry.lock:
            if entry.checked_index is not hits.index:
                # a gallery embedded by another tower than the export's would answer nonsense
                check_image_side_matches(entry.model.export_dir, hits.index.info["image_fingerprint"])
                entry.checked_index = hits.index
        queries = entry.batcher.embed(texts)  # (Q, D)
        return hits.labelled(query_answer(hits.index, texts, queries, k, backend, started, {"export": name},
                                          where=where))

    def thumbnail(self, name: str, key: str, side: int) -> bytes:
        """JPEG bytes of the image of ``key``, one of the index's keys, shrunk to fit ``side`` px."""
        from ..index.hits import NoPicture, NotInGallery
        from ..report.thumbnails import shrink_to_jpeg

        hits = self.gallery(name)
        try:
            raw = hits.picture(key)
        except NotInGallery:
            raise NotFound(f"{key!r} is not a key of the gallery index of export {name!r}",
                           "ask for the keys a search of this export answered with") from None
        except NoPicture as exc:
            raise NotFound(str(exc), "the gallery folder changed after it was indexed; index it again") from None
        try:
            return shrink_to_jpeg(raw, side)
        except ValueError as exc:
            raise DataError(f"the image of {key!r}: {exc}", "the gallery file is damaged; index the gallery again "
                                                            "once it is replaced") from None
