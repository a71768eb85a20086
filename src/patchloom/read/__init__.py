"""Reading: shard specs, the epoch order and rank/worker split, tar records, cursor and shuffle buffer.

specs.py   shard specs -> URLs (shell commands refused), shard identities for resume
order.py   the epoch's shard order and its split over ranks and workers (ShardTask, reader_tasks)
tar.py     the streaming tar reader: Record, ShardError, open_shard, read_shard
cursor.py  ReaderCursor (one reader's resumable walk), read_tasks, fetch_records
shuffle.py ShuffleBuffer (seeded, over raw records)
"""

from .cursor import ReaderCursor, fetch_records, read_tasks
from .order import ShardTask, reader_tasks, shard_order, split_shards
from .shuffle import ShuffleBuffer
from .specs import SHELL_PREFIXES, SourceError, describe_identity_change, expand_shards, shard_identity
from .tar import Record, ShardError, open_shard, read_shard, shard_error, split_member_name

__all__ = [
    "SHELL_PREFIXES",
    "ReaderCursor",
    "Record",
    "ShardError",
    "ShardTask",
    "ShuffleBuffer",
    "SourceError",
    "describe_identity_change",
    "expand_shards",
    "fetch_records",
    "open_shard",
    "read_shard",
    "read_tasks",
    "reader_tasks",
    "shard_error",
    "shard_identity",
    "shard_order",
    "split_member_name",
    "split_shards",
]
