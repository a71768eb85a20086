"""Image folders as a source: every image file under a folder (recursively) is a sample, read as the
same `Record` a tar shard gives, so the rest of the pipeline does not know the difference.

A sample is one file stem (the path relative to the folder without its last extension, which is
also the sample key): `cats/photo1.jpg` with its sidecars `cats/photo1.txt`, `cats/photo1.cls`
gives key `cats/photo1` and members {"jpg", "txt", "cls"}. A sample in a first-level sub-folder
also gets a member `folder`: the index of that sub-folder's name among the sorted class names
(so `label_key: folder` labels it). Samples are in sorted order of their stems; the folder is cut
into chunks of FOLDER_CHUNK samples, which are ordered and split over readers like shards.

The folder is listed once per process (`folder_listing`, cached, relisted only when a directory's
modification time changed): a sorted list of relative paths, one string per file, is all that is
kept (about 100 bytes a file). Hidden entries (a name starting with a dot) are skipped, links to
folders are not followed, and a link that leads out of the folder is refused (SourceError) rather
than read. Files that are neither an image nor a sidecar of one are ignored and counted (a warning
gives the count).
"""

from __future__ import annotations

import bisect
import hashlib
import os
import threading
import warnings
from collections import OrderedDict
from collections.abc import Iterator, Sequence
from dataclasses import dataclass, field

import numpy as np

from .specs import DEFAULT_IMAGE_KEYS, Fields, ShardTask, SourceError, is_hidden, split_ext
from .tar import Record, shard_error

__all__ = ["FOLDER_CHUNK", "FOLDER_LABEL_MEMBER", "FolderListing", "FolderSamples", "folder_classes", "folder_digest",
           "folder_identity", "folder_listing", "folder_units", "read_folder"]

FOLDER_CHUNK = 64  # samples per reader unit: small, so the shuffled unit order mixes a sorted folder well
FOLDER_LABEL_MEMBER = "folder"  # the member holding the class index (label_key: folder)
_CACHE_SIZE = 8  # folders whose listing a process keeps
_SEP = "\0"  # in a listing entry, between the stem and the suffix (never in a file name; sorts first)


@dataclass(slots=True)
class FolderSamples:
    """The samples of a listing under one set of image extensions: sample i is the files
    entries[spans[i, 0]:spans[i, 1]] (one stem), in sorted order of stems."""

    spans: np.ndarray  # int64 [n, 2]
    classes: list[str]  # sorted names of the first-level sub-folders holding samples
    ignored: int  # files that are neither images nor sidecars of one (hidden entries included)

    def __len__(self) -> int:
        return len(self.spans)


@dataclass(slots=True)
class FolderListing:
    """Every regular file under a folder, as `stem\\0suffix` strings sorted so that the files of one
    stem are adjacent (suffix: "" or ".ext" in the file's own case)."""

    url: str
    root: str  # the folder's real path: every file read must lie under it
    entries: list[str]
    dirs: dict[str, int]  # relative folder -> st_mtime_ns when listed (to notice a changed tree)
    skipped: int  # hidden entries, links to folders, special files
    views: dict[tuple[str, ...], FolderSamples] = field(default_factory=dict)

    def path(self, i: int) -> str:
        """The relative path (with `/`) of entry i."""
        stem, _, suffix = self.entries[i].partition(_SEP)
        return stem + suffix

    def samples(self, image_keys: Sequence[str] | None = None) -> FolderSamples:
        """The samples under these image extensions (computed once per set of extensions)."""
        keys = tuple(k.lower() for k in (image_keys if image_keys is not None else DEFAULT_IMAGE_KEYS))
        view = self.views.get(keys)
        if view is None:
            view = self.views[keys] = _group(self, set(keys))
            if view.ignored:
                n = view.ignored
                warnings.warn(f"image folder {self.url}: {n} {'files are' if n != 1 else 'file is'} neither images "
                              f"({', '.join(keys)}) nor sidecars of one (same stem), or hidden, or links to folders: "
                              "ignored", stacklevel=2)
        return view

    def fresh(self) -> bool:
        """True while no listed directory changed (an entry added, removed or renamed) since listing."""
        for rel, mtime in self.dirs.items():
            try:
                if os.stat(os.path.join(self.root, rel)).st_mtime_ns != mtime:
                    return False
            except OSError:
                return False
        return True


_LISTINGS: OrderedDict[str, FolderListing] = OrderedDict()
_LOCK = threading.Lock()


def folder_listing(url: str, *, fresh: bool = False) -> FolderListing:
    """The listing of an image folder, made once per process and kept (`fresh=True` first checks that
    no directory of it changed, and lists it again if one did). Refuses links leading out of it."""
    path = os.path.expanduser(url.removeprefix("file:"))
    root = os.path.realpath(path)
    with _LOCK:
        hit = _LISTINGS.get(root)
        if hit is not None and (not fresh or hit.fresh()):
            _LISTINGS.move_to_end(root)
            return hit
    listing = _list(url, root)
    with _LOCK:
        _LISTINGS[root] = listing
        while len(_LISTINGS) > _CACHE_SIZE:
            _LISTINGS.popitem(last=False)
    return listing


def _inside(root: str, target: str) -> bool:
    return target == root or target.startswith(root.rstrip(os.sep) + os.sep)


def _list(url: str, root: str) -> FolderListing:
    """Walk the folder once: regular files (and links to files inside it), hidden entries skipped."""
    if not os.path.isdir(root):
        raise SourceError(f"image folder {url!r} does not exist or is not a folder")
    entries: list[str] = []
    dirs: dict[str, int] = {}
    skipped = 0
    stack = [""]
    while stack:
        rel_dir = stack.pop()
        full_dir = os.path.join(root, rel_dir) if rel_dir else root
        try:
            dirs[rel_dir] = os.stat(full_dir).st_mtime_ns
            with os.scandir(full_dir) as it:
                found = list(it)
        except OSError as exc:
            raise SourceError(f"image folder {url!r}: cannot list {rel_dir or '.'!r} ({exc.strerror or exc}); "
                              "make it readable or leave it out of the shard spec") from None
        for entry in found:
            rel = f"{rel_dir}/{entry.name}" if rel_dir else entry.name
            if is_hidden(entry.name):
                skipped += 1
                continue
            try:
                if entry.is_symlink():
                    target = os.path.realpath(entry.path)
                    if not _inside(root, target):
                        raise SourceError(
                            f"image folder {url!r}: {rel!r} is a link to {target!r}, outside the folder; patchloom "
                            "does not follow links out of a source folder: copy the file in, or name its folder "
                            "as a source of its own")
                    if not os.path.isfile(target):
                        skipped += 1  # a link to a folder (not followed: it would read files twice) or dangling
                        continue
                elif entry.is_dir(follow_symlinks=False):
                    stack.append(rel)
                    continue
                elif not entry.is_file(follow_symlinks=False):
                    skipped += 1  # sockets, FIFOs, devices
                    continue
            except OSError:
                skipped += 1
                continue
            stem, ext = split_ext(rel)
            entries.append(f"{stem}{_SEP}{rel[len(stem):]}" if ext else f"{rel}{_SEP}")
    entries.sort()
    return FolderListing(url=url, root=root, entries=entries, dirs=dirs, skipped=skipped)


def _group(listing: FolderListing, keys: set[str]) -> FolderSamples:
    """One pass over the sorted entries: runs of one stem that hold an image file are samples."""
    spans: list[tuple[int, int]] = []
    classes: set[str] = set()
    used = 0
    entries = listing.entries
    start, n = 0, len(entries)
    while start < n:
        stem = entries[start].partition(_SEP)[0]
        end = start + 1
        while end < n and entries[end].partition(_SEP)[0] == stem:
            end += 1
        if any(split_ext(listing.path(i))[1] in keys for i in range(start, end)):
            spans.append((start, end))
            used += end - start
            if "/" in stem:
                classes.add(stem.split("/", 1)[0])
        start = end
    arr = np.array(spans, dtype=np.int64).reshape(-1, 2)
    return FolderSamples(spans=arr, classes=sorted(classes), ignored=n - used + listing.skipped)


def _escaped(text: str) -> str:
    """A file name decoded with surrogateescape -> a valid str, non-UTF-8 bytes as `\\xNN`."""
    return text.encode("utf-8", "surrogateescape").decode("utf-8", "backslashreplace")


def _open(listing: FolderListing, rel: str):
    """Open a listed file for reading, refusing one that became a link out of the folder since."""
    full = os.path.join(listing.root, rel)
    if not _inside(listing.root, os.path.realpath(full)):
        raise OSError(f"{rel!r} now leads out of the folder (a link); not read")
    return open(full, "rb")


def _record(listing: FolderListing, view: FolderSamples, url: str, i: int,
            max_sample_bytes: int | None) -> Record:
    """Sample i of the folder: its files' bytes by extension, and the class index of its sub-folder."""
    start, end = (int(v) for v in view.spans[i])
    stem = listing.entries[start].partition(_SEP)[0]
    key = _escaped(stem)
    members: dict[str, bytes] = {}
    names: dict[str, str] = {}
    total = 0
    for j in range(start, end):
        rel = listing.path(j)
        ext = split_ext(rel)[1]
        if not ext:
            continue
        if ext in names:
            return Record(key, url, i, {}, error=f"two files for member {ext!r}: {_escaped(names[ext])!r} and "
                                                 f"{_escaped(rel)!r} (extensions differ only in case); rename one")
        names[ext] = rel
        try:
            with _open(listing, rel) as f:
                size = os.fstat(f.fileno()).st_size
                if max_sample_bytes is not None and total + size > max_sample_bytes:
                    return Record(key, url, i, {}, error=(
                        f"file {_escaped(rel)!r} ({size} bytes) brings the sample over source.max_sample_bytes="
                        f"{max_sample_bytes}; raise it in the recipe if such samples are expected"))
                data = f.read()
        except OSError as exc:
            return Record(key, url, i, {}, error=f"cannot read {_escaped(rel)!r} ({exc.strerror or exc})")
        members[ext] = data
        total += len(data)
    if "/" in stem:
        cls = stem.split("/", 1)[0]
        members[FOLDER_LABEL_MEMBER] = str(bisect.bisect_left(view.classes, cls)).encode("ascii")
    return Record(key, url, i, members)


def folder_units(url: str, fields: Fields | None) -> list[ShardTask]:
    """The reader units of a folder: chunks of FOLDER_CHUNK consecutive samples (the listing is
    checked for changes first: this runs when a reader sets up its epoch)."""
    view = folder_listing(url, fresh=True).samples(fields.sample_keys if fields is not None else None)
    chunks = (len(view) + FOLDER_CHUNK - 1) // FOLDER_CHUNK
    return [ShardTask(url, unit=c) for c in range(chunks)] or [ShardTask(url)]


def read_folder(task: ShardTask, *, start: int = 0, wanted: set[int] | None = None,
                max_sample_bytes: int | None = None, fields: Fields | None = None) -> Iterator[Record]:
    """Records of one folder task (a chunk, or the whole folder with unit -1) in sorted order, each
    with its sample index in the folder. Samples before `start`, of other readers' parts or not in
    `wanted` are passed over without reading a byte. An unreadable file is a Record with `error`."""
    url = task.url
    try:
        listing = folder_listing(url)
    except SourceError as exc:
        raise shard_error(url, str(exc)) from None
    view = listing.samples(fields.sample_keys if fields is not None else None)
    n = len(view)
    lo, hi = (0, n) if task.unit < 0 else (task.unit * FOLDER_CHUNK, min(n, (task.unit + 1) * FOLDER_CHUNK))
    indices = range(max(lo, start), hi) if wanted is None else sorted(i for i in wanted if lo <= i < hi and i >= start)
    for i in indices:
        if i % task.parts == task.part:
            yield _record(listing, view, url, i, max_sample_bytes)


def folder_identity(url: str) -> dict:
    """What a resume state remembers of a folder: its file count ("size") and a hash of its file
    names ("probe"); a folder gaining, losing or renaming a file no longer matches."""
    listing = folder_listing(url, fresh=True)
    digest = hashlib.blake2b(digest_size=12)
    for entry in listing.entries:
        digest.update(entry.encode("utf-8", "surrogateescape") + b"\n")
    return {"url": url, "size": len(listing.entries), "mtime": None, "probe": digest.hexdigest()}


def folder_digest(url: str) -> tuple[int, str]:
    """(bytes, sha256) of a folder's contents, hashed file by file: the sha256 of the lines
    `relative path, size, sha256 of the file` of every listed file (hidden ones aside), in listing order."""
    listing = folder_listing(url, fresh=True)
    total = 0
    outer = hashlib.sha256()
    for i in range(len(listing.entries)):
        rel = listing.path(i)
        h = hashlib.sha256()
        size = 0
        with _open(listing, rel) as f:
            while chunk := f.read(1 << 20):
                h.update(chunk)
                size += len(chunk)
        total += size
        outer.update(f"{_escaped(rel)}\t{size}\t{h.hexdigest()}\n".encode())
    return total, outer.hexdigest()


def folder_classes(url: str, image_keys: Sequence[str] | None = None) -> list[str]:
    """The class names of a folder in index order (`label_key: folder`): its first-level sub-folders
    holding samples, sorted."""
    return list(folder_listing(url).samples(image_keys).classes)
