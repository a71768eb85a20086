"""One reader's walk over its shard tasks with a JSON-able position (exact resume), and the
re-reading of single records by (shard, index) that restores buffers on resume."""

from __future__ import annotations

from collections.abc import Callable, Iterator, Sequence
from typing import Any

from .sources import read_task
from .specs import Fields, ShardTask, SourceError
from .tar import Record, ShardError, shard_error


def fetch_records(refs: Sequence[tuple[str, int]], *, allow_shell: bool = False,
                  max_sample_bytes: int | None = None, fields: Fields | None = None) -> list[Record]:
    """The records at (shard url, index) positions, in the order given (to rebuild buffers on resume);
    `fields` as the reader that read them had (for Parquet files and image folders)."""
    by_url: dict[str, set[int]] = {}
    for url, index in refs:
        by_url.setdefault(url, set()).add(int(index))
    found: dict[tuple[str, int], Record] = {}
    failures: dict[str, ShardError] = {}
    for url, indices in by_url.items():
        try:
            for rec in read_task(ShardTask(url), allow_shell=allow_shell, wanted=indices,
                                 max_sample_bytes=max_sample_bytes, fields=fields):
                found[(url, rec.index)] = rec
        except ShardError as exc:  # records read before the failure still count; missing ones raise below
            failures[url] = exc
    missing = [ref for ref in refs if (ref[0], int(ref[1])) not in found]
    if missing:
        cause = f" ({failures[missing[0][0]]})" if missing[0][0] in failures else ""
        raise SourceError(
            f"cannot resume: {len(missing)} buffered samples are no longer in their shards "
            f"(first: shard {missing[0][0]}, sample #{missing[0][1]}){cause}; did the shards change?"
        )
    return [found[(url, int(index))] for url, index in refs]


def read_tasks(
    tasks: Sequence[ShardTask],
    *,
    allow_shell: bool = False,
    on_shard_error: Callable[[str, Exception], None] | None = None,
    max_sample_bytes: int | None = None,
    fields: Fields | None = None,
) -> Iterator[Record]:
    """Records of several shard tasks in order. A shard that fails mid-read raises ShardError, or is
    reported to on_shard_error (the rest of that shard is lost and the callback records it)."""
    yield from ReaderCursor(tasks, allow_shell=allow_shell, on_shard_error=on_shard_error,
                            max_sample_bytes=max_sample_bytes, fields=fields)


class ReaderCursor:
    """One reader's walk over its shard tasks, with a JSON-able position for exact resume.

    The position is (pass, task, index): the next sample index to read in task `task` of pass
    `pass` (for a Parquet row group task: the file is the task's url, the row group its unit, the
    index the row in the file). With `cycle`, the share is read again (pass 1, 2, ...) when it
    runs out, for equalised epochs. `limit` caps the records it yields in total (an epoch defined
    in samples). `fields` names the members Parquet files and image folders are read for.
    """

    def __init__(
        self,
        tasks: Sequence[ShardTask],
        *,
        allow_shell: bool = False,
        on_shard_error: Callable[[str, Exception], None] | None = None,
        cycle: bool = False,
        limit: int | None = None,
        max_sample_bytes: int | None = None,
        fields: Fields | None = None,
    ) -> None:
        self.tasks = list(tasks)
        self.fields = fields
        self.allow_shell = allow_shell
        self.on_shard_error = on_shard_error
        self.max_sample_bytes = max_sample_bytes
        self.cycle = cycle
        self.limit = limit
        self.pass_ = 0
        self.task = 0
        self.index = 0
        self.count = 0  # records yielded so far (across passes)
        self.done = False

    def state_dict(self) -> dict[str, Any]:
        """The position: pass, task, next sample index, records yielded, and whether it is done."""
        return {"pass": self.pass_, "task": self.task, "index": self.index, "count": self.count, "done": self.done}

    def load_state_dict(self, state: dict[str, Any]) -> None:
        """Continue from a `state_dict()` position (over the same tasks)."""
        self.pass_, self.task, self.index = int(state["pass"]), int(state["task"]), int(state["index"])
        self.count, self.done = int(state["count"]), bool(state["done"])

    def __iter__(self) -> Iterator[Record]:
        if self.limit is not None and self.count >= self.limit:
            self.done = True
        while not self.done:
            produced = 0
            fresh_pass = self.task == 0 and self.index == 0
            while self.task < len(self.tasks):
                task = self.tasks[self.task]
                try:
                    for rec in read_task(task, allow_shell=self.allow_shell, start=self.index,
                                         max_sample_bytes=self.max_sample_bytes, fields=self.fields):
                        self.index = rec.index + 1
                        self.count += 1
                        produced += 1
                        if self.limit is not None and self.count >= self.limit:
                            self.done = True
                        yield rec
                        if self.done:
                            return
                except ShardError as exc:  # this shard failed: raise, or report it and go on
                    if self.on_shard_error is None:
                        raise
                    self.on_shard_error(task.url, exc)
                except SourceError:
                    raise
                except Exception as exc:  # noqa: BLE001 (an unforeseen failure of this shard)
                    if self.on_shard_error is None:
                        raise shard_error(task.url, f"cannot read: {exc}") from exc
                    self.on_shard_error(task.url, exc)
                self.task, self.index = self.task + 1, 0
            if self.limit is not None and self.count >= self.limit:
                self.done = True
            elif not self.cycle or (fresh_pass and produced == 0):
                self.done = True  # one pass, or a share with nothing in it: cannot top up
            else:
                self.pass_, self.task, self.index = self.pass_ + 1, 0, 0
