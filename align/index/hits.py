"""What the search view shows of a hit beyond its key and score: its labels and its picture.

An index records the folder it was built from (``index.json``'s ``source``). In a packed folder a
key's image is one member of a shard: the members' places (shard, byte offset, length) are read from
the tar headers once, then a picture costs one seek and one read. In a plain folder it is the file at
the key (a path relative to the folder; an adopted gallery's key may leave the extension out).

Every file is opened through ``check``, which returns the path to open or raises: ``align query``
reads what it is given; the service confines each path to its data roots first (links followed), on
every request, so a link planted after indexing cannot lead outside them.
"""
from __future__ import annotations

import os
import tarfile
import threading
from dataclasses import dataclass
from pathlib import Path
from typing import Callable

from .. import artifacts as A
from ..data.shards import IMAGE_EXTENSIONS, read_manifest
from .gallery import GalleryIndex
from .sources import FOLDER_SUFFIXES, is_packed

MAX_IMAGE_BYTES = 64 << 20  # one gallery image read for a thumbnail; a member claiming more is not read


class NotInGallery(LookupError):
    """The key is not one of the index's rows."""


class NoPicture(LookupError):
    """The key is in the index but its image is no longer where the index's source had it."""


@dataclass(frozen=True)
class ImagePlace:
    file: Path  # as the source names it (the service confines it before each read)
    offset: int = 0
    length: int | None = None  # None: the whole file


def _as_given(path: Path) -> Path:
    return path


def _stamp(path: Path) -> tuple:
    st = os.stat(path)
    return (st.st_ino, st.st_mtime_ns, st.st_size)


class GalleryHits:
    """An index's labels and pictures by key. Safe to share between threads."""

    def __init__(self, index: GalleryIndex, check: Callable[[Path], Path] = _as_given):
        self.index = index
        self.source = Path(index.info["source"])
        self.check = check
        self.rows = {key: row for row, key in enumerate(index.keys)}
        self._lock = threading.Lock()
        # packed sources: key -> (shard number, byte offset, length), tuples rather than objects (a
        # million-image gallery holds a million of them)
        self._members: dict[str, tuple[int, int, int]] | None = None
        self._shards: list[Path] = []
        self._shard_stamps: dict[Path, tuple] = {}

    def __contains__(self, key: str) -> bool:
        return key in self.rows

    def labels(self, key: str) -> dict[str, str]:
        return self.index.labels.row_labels(self.rows[key]) if key in self.rows else {}

    def labelled(self, answer: dict) -> dict:
        """The query answer (``query_answer``'s record) with each hit's labels added."""
        return {**answer, "queries": [{**item, "results": [{**hit, "labels": self.labels(hit["key"])}
                                                           for hit in item["results"]]}
                                      for item in answer["queries"]]}

    # -----------------------------------------------------------------------------------------
    # pictures

    def picture(self, key: str) -> bytes:
        """The raw image bytes of ``key`` (as packed, or the file). NotInGallery, NoPicture, or
        whatever ``check`` raises for a path it refuses."""
        if key not in self.rows:
            raise NotInGallery(f"{key!r} is not a key of the index at {self.index.folder}")
        place = self._place(key)
        real = self.check(place.file)
        if place.length is not None and self._shard_stamps.get(place.file) != _stamp(real):
            with self._lock:  # the shard was rewritten since its members were listed: list them again
                self._members = None
            place = self._place(key)
            real = self.check(place.file)
        return _read(real, place, key)

    def _place(self, key: str) -> ImagePlace:
        if is_packed(self.source):
            with self._lock:
                if self._members is None:
                    self._members = self._list_members()
                member = self._members.get(key)
                shards = self._shards
            if member is None:
                raise NoPicture(f"no image member for {key!r} in the shards of {self.source}")
            return ImagePlace(shards[member[0]], member[1], member[2])
        if not self.source.is_dir():
            raise NoPicture(f"the gallery folder {self.source} the index was built from is not there")
        return self._folder_place(key)

    def _list_members(self) -> dict[str, tuple[int, int, int]]:
        """key -> its image member, over every shard the manifest lists (pack names members ``KEY.EXT``,
        keys without dots, which is how webdataset groups them too)."""
        self.check(self.source / A.MANIFEST)
        members: dict[str, tuple[int, int, int]] = {}
        self._shards, self._shard_stamps = [], {}
        for info in read_manifest(self.source)["splits"].values():
            for name in info.get("shards", []):
                shard = self.source / name
                real = self.check(shard)
                self._shard_stamps[shard] = _stamp(real)
                self._shards.append(shard)
                number = len(self._shards) - 1
                try:
                    with tarfile.open(real, "r:") as tar:
                        for member in tar:
                            key, _, ext = member.name.partition(".")
                            if member.isfile() and ext in IMAGE_EXTENSIONS and key not in members:
                                members[key] = (number, member.offset_data, member.size)
                except (tarfile.TarError, OSError):
                    continue  # a damaged shard: the members listed before the damage still count
        return members

    def _folder_place(self, key: str) -> ImagePlace:
        relative = Path(key)
        if relative.is_absolute() or ".." in relative.parts:
            raise NoPicture(f"{key!r} is not a path inside {self.source}")
        path = self.source / relative
        if path.is_file():
            return ImagePlace(path)
        for suffix in FOLDER_SUFFIXES:  # keys written without the file extension (adopted galleries)
            for candidate in (path.with_name(path.name + suffix), path.with_name(path.name + suffix.upper())):
                if candidate.is_file():
                    return ImagePlace(candidate)
        raise NoPicture(f"no image for {key!r} in {self.source}")


def _read(real: Path, place: ImagePlace, key: str) -> bytes:
    # O_NOFOLLOW: the checked path has no link left in it; one swapped in since is not followed
    fd = os.open(real, os.O_RDONLY | getattr(os, "O_NOFOLLOW", 0))
    with os.fdopen(fd, "rb") as fh:
        length = place.length if place.length is not None else os.fstat(fh.fileno()).st_size
        if length > MAX_IMAGE_BYTES:
            raise NoPicture(f"the image of {key!r} is {length:,} bytes; thumbnails are made from at most "
                            f"{MAX_IMAGE_BYTES:,}")
        fh.seek(place.offset)
        data = fh.read(length)
    if len(data) != length:
        raise NoPicture(f"the image of {key!r} is cut short in {real}")
    return data
