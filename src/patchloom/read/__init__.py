"""Reading: shard specs, the epoch order and rank/worker split, the three source kinds (tar shards,
Parquet files, image folders) as one kind of Record, cursor and shuffle buffer.

specs.py   shard specs -> URLs (shell commands refused), ShardTask, Fields, file identities for resume
order.py   the epoch's unit order and its split over ranks and workers (reader_tasks)
sources.py URL -> source kind: reader units, read_task, shard_identity (one branch per kind)
tar.py     the streaming tar reader: Record, ShardError, open_shard, read_shard
parquet.py Parquet files row group by row group (pyarrow, the `parquet` extra)
folder.py  image folders: listed once per process, a sample per file stem, sidecars as members
cursor.py  ReaderCursor (one reader's resumable walk), read_tasks, fetch_records
shuffle.py ShuffleBuffer (seeded, over raw records)
"""

from .cursor import ReaderCursor, fetch_records, read_tasks
from .folder import FOLDER_CHUNK, FOLDER_LABEL_MEMBER, folder_classes, folder_digest, folder_listing
from .order import reader_tasks, shard_order, split_shards
from .shuffle import ShuffleBuffer
from .sources import SOURCE_KINDS, read_task, shard_identity, source_kind, source_units
from .specs import (
    DEFAULT_IMAGE_KEYS,
    SHELL_PREFIXES,
    Fields,
    ShardTask,
    SourceError,
    describe_identity_change,
    expand_shards,
)
from .tar import Record, ShardError, open_shard, read_shard, shard_error, split_member_name

__all__ = [
    "DEFAULT_IMAGE_KEYS",
    "FOLDER_CHUNK",
    "FOLDER_LABEL_MEMBER",
    "SHELL_PREFIXES",
    "SOURCE_KINDS",
    "Fields",
    "ReaderCursor",
    "Record",
    "ShardError",
    "ShardTask",
    "ShuffleBuffer",
    "SourceError",
    "describe_identity_change",
    "expand_shards",
    "fetch_records",
    "folder_classes",
    "folder_digest",
    "folder_listing",
    "open_shard",
    "read_shard",
    "read_task",
    "read_tasks",
    "reader_tasks",
    "shard_error",
    "shard_identity",
    "shard_order",
    "source_kind",
    "source_units",
    "split_member_name",
    "split_shards",
]
