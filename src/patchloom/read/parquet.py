"""Parquet files as a source: each row is read as the same `Record` a tar shard gives (key, file,
row index in the file, members), so the rest of the pipeline does not know the difference.

Members are named by column: the image column (the first of `source.image_keys` the file has;
encoded bytes, binary or a struct with a `bytes` field) under its own name, or, with
`source.images_per_sample: all`, every image column the file has, in `image_keys` order, each a
single image or a list of them, as members `0.<column>`, `1.<column>`, ... numbered across the
columns (the order a tar sample's `0.jpg`, `1.jpg` gives); the label and text
columns (`source.label_key`, `source.text_key`, the part before any `:field`) as UTF-8 text (JSON
for nested values). The key is the `__key__` column when there is one, else `<file stem>/<row>`.

A file is read row group by row group, only the needed columns, in batches of _BATCH_ROWS rows, so
memory holds at most one row group's columns whatever the file's size. Reader units are whole files,
or row groups when there are fewer files than reader slots (`parquet_units`). Needs pyarrow (the
`parquet` extra). A file that cannot be read is a ShardError naming it and the row group.
"""

from __future__ import annotations

import json
import os
import threading
import warnings
from collections import OrderedDict
from collections.abc import Iterator
from dataclasses import dataclass
from typing import Any

from ..extras import require
from .specs import Fields, ShardTask
from .tar import Record, ShardError, shard_error

__all__ = ["KEY_COLUMN", "parquet_row_counts", "parquet_units", "read_parquet"]

KEY_COLUMN = "__key__"
_BATCH_ROWS = 64  # rows decoded at a time within a row group
_counts_cache: OrderedDict[tuple[str, int, int], list[int]] = OrderedDict()
_counts_lock = threading.Lock()


def _pq() -> Any:
    require("pyarrow", "reading Parquet files")  # a missing pyarrow: one line naming the `parquet` extra
    return require("pyarrow.parquet", "reading Parquet files")


def _path(url: str) -> str:
    return os.path.expanduser(url.removeprefix("file:"))


def parquet_row_counts(url: str) -> list[int] | None:
    """The row count of each row group of a Parquet file, from its footer (kept per file size and
    time), or None when the footer cannot be read (the read then fails as that file's ShardError)."""
    path = _path(url)
    try:
        st = os.stat(path)
    except OSError:
        return None
    ident = (os.path.realpath(path), st.st_size, st.st_mtime_ns)
    with _counts_lock:
        if ident in _counts_cache:
            return list(_counts_cache[ident])
    pq = _pq()
    try:
        with open(path, "rb") as f:
            md = pq.ParquetFile(f).metadata
            counts = [md.row_group(g).num_rows for g in range(md.num_row_groups)]
    except Exception:  # noqa: BLE001 (any failure: the reader reports it with the file's name)
        return None
    with _counts_lock:
        _counts_cache[ident] = counts
        while len(_counts_cache) > 256:
            _counts_cache.popitem(last=False)
    return list(counts)


def parquet_units(url: str) -> list[ShardTask]:
    """A file's row groups as reader units (one ShardTask per row group; the whole file when its
    footer cannot be read, so the read names the problem)."""
    counts = parquet_row_counts(url)
    if not counts:
        return [ShardTask(url)]
    return [ShardTask(url, unit=g) for g in range(len(counts))]


@dataclass(slots=True)
class _Plan:
    """Which columns one file is read with, and what each becomes."""

    columns: list[str] | None  # None: every column (a reader given no Fields)
    image: str | None
    label: str | None
    text: str | None
    key: str | None
    images: tuple[str, ...] = ()  # with Fields.all_images: every image column, in image_keys order


def _is_binary(pa: Any, typ: Any) -> bool:
    t = pa.types
    return bool(t.is_binary(typ) or t.is_large_binary(typ) or t.is_fixed_size_binary(typ)
                or getattr(t, "is_binary_view", lambda _: False)(typ))


def _is_image_struct(pa: Any, typ: Any) -> bool:
    return bool(pa.types.is_struct(typ) and typ.get_field_index("bytes") >= 0
                and _is_binary(pa, typ.field(typ.get_field_index("bytes")).type))


_LIST_TYPES = ("is_list", "is_large_list", "is_fixed_size_list", "is_list_view", "is_large_list_view")


def _is_image_list(pa: Any, typ: Any) -> bool:
    t = pa.types
    return bool(any(getattr(t, name, lambda _: False)(typ) for name in _LIST_TYPES)
                and (_is_binary(pa, typ.value_type) or _is_image_struct(pa, typ.value_type)))


def _plan(schema: Any, fields: Fields | None, url: str) -> _Plan:
    """The columns to read for `fields`; a file without a usable image column is a ShardError."""
    pa = require("pyarrow")
    names = list(schema.names)
    key = KEY_COLUMN if KEY_COLUMN in names else None
    if fields is None:
        return _Plan(columns=None, image=None, label=None, text=None, key=key)
    image = next((k for k in fields.image_keys if k in names), None)
    if image is None:
        shown = ", ".join(names[:20]) + (f" and {len(names) - 20} more" if len(names) > 20 else "")
        raise shard_error(url, f"has none of the image columns {', '.join(fields.image_keys)} (source.image_keys); "
                               f"its columns are {shown}: set source.image_keys to the image column's name")
    images = tuple(k for k in fields.image_keys if k in names) if fields.all_images else (image,)
    for column in images:
        typ = schema.field(column).type
        if _is_binary(pa, typ) or _is_image_struct(pa, typ):
            continue
        if _is_image_list(pa, typ):
            if fields.all_images:
                continue
            raise shard_error(url, f"column {column!r} holds a list of images ({typ}): set source.images_per_sample "
                                   "to all to read them all as one sample")
        raise shard_error(url, f"column {column!r} is {typ}, not encoded image bytes (binary, a struct with a binary "
                               "`bytes` field, or with images_per_sample all a list of these): set "
                               "source.image_keys to the column holding the image files")
    label = _named_column(fields.label_key, names, url, "label_key", "label")
    text = _named_column(fields.text_key, names, url, "text_key", "text")
    if fields.all_images:  # images become members `n.<column>`: a label or text column so named would be lost
        clash = next((c for c in (label, text) if c is not None and c.partition(".")[0].isdigit()
                      and c.partition(".")[2] in images), None)
        if clash is not None:
            raise shard_error(url, f"column {clash!r} has the name an image of the row gets with images_per_sample "
                                   "all (`<n>.<image column>`): rename the column")
    columns = list(dict.fromkeys(c for c in (*images, label, text, key) if c is not None))
    return _Plan(columns=columns, image=image, label=label, text=text, key=key,
                 images=images if fields.all_images else ())


def _named_column(member_key: str | None, names: list[str], url: str, setting: str, what: str) -> str | None:
    """The column a `source.*_key` names (`col` or `col:field`); a warning when the file lacks it."""
    if member_key is None:
        return None
    column = member_key.partition(":")[0]
    if column in names:
        return column
    warnings.warn(f"Parquet file {url} has no column {column!r} (source.{setting}): its samples get no {what}; "
                  f"set source.{setting} to one of its columns, or null", stacklevel=4)
    return None


def _text_bytes(value: Any) -> bytes | None:
    """A label or text cell as the bytes a tar member would hold: text as UTF-8, numbers as digits,
    nested values as JSON (so `json:field` works on a struct column too)."""
    if value is None:
        return None
    if isinstance(value, bytes):
        return value
    if isinstance(value, str):
        return value.encode("utf-8")
    if isinstance(value, bool):
        return b"1" if value else b"0"
    if isinstance(value, int | float):
        return str(value).encode("ascii")
    if isinstance(value, dict | list):
        return json.dumps(value, ensure_ascii=False, default=str).encode("utf-8")
    return str(value).encode("utf-8")


def _cell_size(scalar: Any) -> int:
    """Bytes of a binary or string cell without copying them out (0 for null and other types)."""
    if not scalar.is_valid:
        return 0
    try:
        buf = scalar.as_buffer()
    except (AttributeError, TypeError, NotImplementedError):
        return 0
    return buf.size if buf is not None else 0


def _image_cell(col: Any, j: int, column: str) -> tuple[Any, str | None]:
    """(the binary scalar holding row j's image, or None with the reason it has none)."""
    scalar = col[j]
    if not scalar.is_valid:
        return None, f"the image cell (column {column!r}) is null"
    if require("pyarrow").types.is_struct(scalar.type):  # {bytes, path, ...}
        data = scalar["bytes"]
        if not data.is_valid:
            path = scalar["path"].as_py() if "path" in scalar.keys() else None
            where = f" (it names only the path {path!r}: patchloom reads images stored in the file)" if path else ""
            return None, f"the image cell (column {column!r}) has no bytes{where}"
        return data, None
    return scalar, None


def _all_image_cells(batch: Any, j: int, columns: tuple[str, ...]) -> tuple[list[tuple[str, Any]], str | None]:
    """([(member name `n.<column>`, binary scalar)] of every image in row j's image columns, numbered
    across them in order), or the reason the row has none or holds a null image (then the sample is
    skipped: an image missing from a group is not dropped silently)."""
    pa = require("pyarrow")
    found: list[tuple[str, Any]] = []
    for column in columns:
        col = batch.column(column)
        if not col[j].is_valid:
            continue  # a null cell: this column holds no image for the row
        if _is_image_list(pa, col.type):
            cells = col[j].values  # the row's list as an array of binaries or image structs
            for e in range(len(cells)):
                data, reason = _image_cell(cells, e, f"{column}[{e}]")
                if data is None:
                    return [], reason
                found.append((f"{len(found)}.{column}", data))
        else:
            data, reason = _image_cell(col, j, column)
            if data is None:
                return [], reason
            found.append((f"{len(found)}.{column}", data))
    if not found:
        return [], f"the row holds no image (columns {', '.join(map(repr, columns))} are null or empty)"
    return found, None


def _row(batch: Any, j: int, i: int, g: int, url: str, stem: str, plan: _Plan,
         max_sample_bytes: int | None) -> Record:
    """Row j of a batch (row i of the file, in row group g) as a Record; a null image or a row over
    max_sample_bytes (judged from the cell sizes, before copying) is a Record with `error`."""
    key = f"{stem}/{i}"
    if plan.key is not None:
        value = batch.column(plan.key)[j].as_py()
        if value is not None:
            key = value.decode("utf-8", "backslashreplace") if isinstance(value, bytes) else str(value)
    where = f"row {i} (row group {g}) of {url}"
    if plan.columns is None:  # every column, as a reader given no Fields does
        pa = require("pyarrow")
        members = {}
        for name in batch.schema.names:
            col = batch.column(name)
            if name == KEY_COLUMN or not col[j].is_valid:
                continue
            if _is_image_struct(pa, col.type):
                scalar, _ = _image_cell(col, j, name)
                value = scalar.as_py() if scalar is not None else None
            else:
                value = _text_bytes(col[j].as_py())
            if value is not None:
                members[name] = value
        return Record(key, url, i, members)
    if plan.images:
        found, reason = _all_image_cells(batch, j, plan.images)
        if reason is not None:
            return Record(key, url, i, {}, error=f"{reason} at {where}")
    else:
        image, reason = _image_cell(batch.column(plan.image), j, plan.image)
        if image is None:
            return Record(key, url, i, {}, error=f"{reason} at {where}")
        found = [(plan.image, image)]
    others = [(c, batch.column(c)[j]) for c in dict.fromkeys((plan.label, plan.text)) if c is not None]
    size = sum(_cell_size(s) for _, s in found) + sum(_cell_size(s) for _, s in others)
    if max_sample_bytes is not None and size > max_sample_bytes:
        return Record(key, url, i, {}, error=(f"{where} is {size} bytes, over source.max_sample_bytes="
                                               f"{max_sample_bytes}; raise it in the recipe if such samples are expected"))
    members = {name: scalar.as_py() for name, scalar in found}
    for column, scalar in others:
        value = _text_bytes(scalar.as_py())
        if value is not None:
            members.setdefault(column, value)
    return Record(key, url, i, members)


def read_parquet(task: ShardTask, *, start: int = 0, wanted: set[int] | None = None,
                 max_sample_bytes: int | None = None, fields: Fields | None = None) -> Iterator[Record]:
    """Records of one Parquet task (a row group, or the whole file with unit -1), each with its row
    index in the file. Row groups with no row to keep (before `start`, of other readers' parts, not
    in `wanted`) are not read; within a row group, rows not kept are never copied out. A file or row
    group that cannot be read raises ShardError naming the file and the row group."""
    pq = _pq()
    url = task.url
    path = _path(url)
    stem = os.path.basename(path)[: -len(".parquet")] if path.lower().endswith(".parquet") else os.path.basename(path)
    try:
        f = open(path, "rb")  # noqa: SIM115 (closed below, also when the consumer stops early)
    except OSError as exc:
        raise shard_error(url, f"cannot open ({exc.strerror or exc})") from exc
    try:
        try:
            pf = pq.ParquetFile(f)
            md = pf.metadata
            counts = [md.row_group(g).num_rows for g in range(md.num_row_groups)]
            schema = pf.schema_arrow
        except Exception as exc:  # noqa: BLE001 (pyarrow's errors for a damaged footer vary)
            raise shard_error(url, f"is not a readable Parquet file: its footer cannot be read "
                                   f"({type(exc).__name__}: {exc})") from exc
        plan = _plan(schema, fields, url)
        firsts = [0]
        for c in counts:
            firsts.append(firsts[-1] + c)
        if task.unit >= len(counts):
            raise shard_error(url, f"has {len(counts)} row groups, no row group {task.unit}: the file changed "
                                   "since the reader's tasks were made")
        groups = range(len(counts)) if task.unit < 0 else [task.unit]
        for g in groups:
            lo, hi = max(firsts[g], start), firsts[g + 1]
            if wanted is not None:
                rows = sorted(i for i in wanted if lo <= i < hi and i % task.parts == task.part)
            else:
                rows = [i for i in range(lo, min(hi, lo + task.parts)) if i % task.parts == task.part]
            if not rows:
                continue
            yield from _read_group(pf, g, firsts[g], hi, url, stem, plan, task, start, wanted, max_sample_bytes)
    finally:
        f.close()


def _read_group(pf: Any, g: int, first: int, end: int, url: str, stem: str, plan: _Plan, task: ShardTask,
                start: int, wanted: set[int] | None, max_sample_bytes: int | None) -> Iterator[Record]:
    """The kept rows of row group g, decoded _BATCH_ROWS at a time with only the plan's columns."""
    row = first
    try:
        for batch in pf.iter_batches(batch_size=_BATCH_ROWS, row_groups=[g], columns=plan.columns,
                                     use_threads=False):
            n = batch.num_rows
            for j in range(n):
                i = row + j
                if i >= start and i % task.parts == task.part and (wanted is None or i in wanted):
                    yield _row(batch, j, i, g, url, stem, plan, max_sample_bytes)
            row += n
            if wanted is not None and row > max(wanted):
                return
    except ShardError:
        raise
    except Exception as exc:  # noqa: BLE001 (decoding errors of a damaged row group vary)
        raise shard_error(url, f"row group {g} (rows {first}..{end - 1}) cannot be read at row {row} "
                               f"({type(exc).__name__}: {exc}); the file is damaged: rewrite it, or leave it "
                               "out of source.shards") from exc
