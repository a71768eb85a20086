"""Sources: shard lists, the rank/worker split, seeded shuffles, and raw records read from tar shards.

Tar parsing is webdataset's; this module decides who reads what, in which order, and keeps each
record's key and shard URL with it.
"""

from __future__ import annotations

import glob
import os
import warnings
from collections.abc import Callable, Iterator, Sequence
from dataclasses import dataclass

import braceexpand

from .seeding import stream_rng

SHELL_PREFIXES = ("pipe:",)


class SourceError(ValueError):
    """A shard spec or shard that cannot be read; the message names it and what to change."""


@dataclass(slots=True)
class Record:
    """One raw sample: its key, its shard URL, its index in the shard and its members' bytes."""

    key: str
    url: str
    index: int
    members: dict[str, bytes]
    error: str | None = None  # set when the shard broke off inside this sample: it is skipped, not lost


@dataclass(slots=True, frozen=True)
class ShardTask:
    """Read `url`, keeping the samples whose index i satisfies i % parts == part."""

    url: str
    part: int = 0
    parts: int = 1


def expand_shards(spec: str | Sequence[str] | None, *, allow_shell: bool = False) -> list[str]:
    """Shard spec (path, glob, brace range `part-{000..015}.tar`, URL, or a list of them) -> URLs.

    Shell-command URLs (`pipe:`) run a program: they are refused unless allow_shell is True.
    """
    if spec is None:
        raise SourceError("no shards given: set source.shards in the recipe or pass shards=")
    items = [spec] if isinstance(spec, str) else list(spec)
    if not items:
        raise SourceError("the shard list is empty")
    out: list[str] = []
    for item in items:
        if not isinstance(item, str) or not item.strip():
            raise SourceError(f"a shard spec must be a non-empty string (got {item!r})")
        item = item.strip()
        if item.startswith(SHELL_PREFIXES):
            if not allow_shell:
                raise SourceError(
                    f"shard spec {item!r} runs a shell command; this is refused by default because a "
                    "recipe is data. Pass allow_shell=True to Pipeline (or --allow-shell on the "
                    "command line) only for shard lists you wrote yourself"
                )
            out.extend(braceexpand.braceexpand(item))
            continue
        for expanded in braceexpand.braceexpand(item):
            if "://" in expanded:
                out.append(expanded)
            elif any(ch in expanded for ch in "*?["):
                matches = sorted(glob.glob(os.path.expanduser(expanded)))
                if not matches:
                    raise SourceError(f"shard glob {expanded!r} matches no file")
                out.extend(matches)
            else:
                path = os.path.expanduser(expanded.removeprefix("file:"))
                if not os.path.isfile(path):
                    raise SourceError(f"shard {path!r} does not exist (from spec {item!r})")
                out.append(path)
    return out


def shard_order(shards: Sequence[str], *, seed: int, epoch: int, shuffle: bool) -> list[str]:
    """The epoch's shard order, identical on every rank and worker (seeded by seed and epoch only)."""
    shards = list(shards)
    if not shuffle:
        return shards
    perm = stream_rng(seed, epoch, "shard-order").permutation(len(shards))
    return [shards[i] for i in perm]


def split_shards(shards: Sequence[str], *, slot: int, slots: int) -> list[ShardTask]:
    """This reader's share of the shards, so that every sample is read once across all slots.

    With at least as many shards as slots, slot s takes shards s, s+slots, ... With fewer shards,
    several slots share a shard and each keeps every k-th sample of it, so no reader idles and no
    sample is duplicated (each sharing reader streams past the others' samples without copying them).
    """
    if not 0 <= slot < slots:
        raise ValueError(f"reader slot {slot} out of range for {slots} slots")
    n = len(shards)
    if n == 0:
        return []
    if n >= slots:
        return [ShardTask(url) for url in shards[slot::slots]]
    shard = slot % n
    parts = len(range(shard, slots, n))
    return [ShardTask(shards[shard], part=slot // n, parts=parts)]


def open_shard(url: str, *, allow_shell: bool = False):
    """A binary stream for a shard: local files directly, other URLs through webdataset's gopen."""
    if url.startswith(SHELL_PREFIXES) and not allow_shell:
        raise SourceError(f"refusing shell-command shard {url!r}; pass allow_shell=True (--allow-shell) to allow it")
    if url.startswith(SHELL_PREFIXES):
        import subprocess

        # The caller allowed shell commands explicitly (allow_shell=True).
        proc = subprocess.Popen(url.removeprefix("pipe:"), shell=True, stdout=subprocess.PIPE)  # noqa: S602
        return proc.stdout
    if "://" not in url:
        return open(url.removeprefix("file:"), "rb")
    from webdataset import gopen

    return gopen.gopen(url, "rb")


def read_shard(
    task: ShardTask,
    *,
    allow_shell: bool = False,
    start: int = 0,
    wanted: set[int] | None = None,
) -> Iterator[Record]:
    """Records of one shard task, in tar order, with their index within the shard.

    Samples before `start`, of other readers' parts, or (when given) not in `wanted` are skipped by
    file name, so their bytes are never copied out of the tar stream (cheap resume and splits).
    """
    # Imported here: importing webdataset also imports torch when it is installed (seconds).
    from collections import deque

    from webdataset.tariterators import base_plus_ext, group_by_keys, tar_file_iterator

    chosen: deque[tuple[str, int]] = deque()  # (key, index) of selected samples, in tar order
    last = {"key": None, "index": -1, "keep": False}

    def select(fname: str) -> bool:
        key, _ = base_plus_ext(fname)
        if key is None:
            return False
        if key != last["key"]:
            last["key"], last["index"] = key, last["index"] + 1
            i = last["index"]
            last["keep"] = i >= start and i % task.parts == task.part and (wanted is None or i in wanted)
            if last["keep"]:
                chosen.append((key, i))
        return last["keep"]

    failure: dict[str, object] = {}

    def guarded(files: Iterator[dict]) -> Iterator[dict]:
        # A read error ends the member stream cleanly, so the grouping step still hands over the
        # sample it holds; the error is re-raised below, after that sample is dealt with.
        try:
            yield from files
        except Exception as exc:  # tar or I/O failure
            failure.update(exc=exc, key=last["key"], index=last["index"], keep=last["keep"])

    stream = open_shard(task.url, allow_shell=allow_shell)
    try:
        files = guarded(tar_file_iterator(stream, select_files=select))
        files = ({**f, "__url__": task.url} for f in files)
        held: Record | None = None
        for sample in group_by_keys(files):
            key = sample["__key__"]
            while chosen and chosen[0][0] != key:  # a selected sample whose files all failed
                chosen.popleft()
            _, index = chosen.popleft()
            members = {k: v for k, v in sample.items() if not k.startswith("__")}
            if held is not None:
                yield held
            held = Record(key=key, url=task.url, index=index, members=members)
            if wanted is not None and index >= max(wanted):
                break
        broken = f"shard broke off inside this sample ({failure.get('exc')})"
        if held is not None:
            if failure and failure["key"] == held.key:
                # The break came while this sample was being read: it may be missing members.
                held = Record(held.key, held.url, held.index, {}, error=broken)
            yield held
        if failure and failure["keep"] and failure["key"] != (held.key if held else None):
            # The sample being read when the shard broke off: skipped with a reason, never lost.
            yield Record(str(failure["key"]), task.url, int(failure["index"]), {}, error=broken)  # type: ignore[arg-type]
        if failure:
            raise failure["exc"]  # type: ignore[misc]
    finally:
        stream.close()


def fetch_records(refs: Sequence[tuple[str, int]], *, allow_shell: bool = False) -> list[Record]:
    """The records at (shard url, index) positions, in the order given (to rebuild buffers on resume)."""
    by_url: dict[str, set[int]] = {}
    for url, index in refs:
        by_url.setdefault(url, set()).add(int(index))
    found: dict[tuple[str, int], Record] = {}
    for url, indices in by_url.items():
        for rec in read_shard(ShardTask(url), allow_shell=allow_shell, wanted=indices):
            found[(url, rec.index)] = rec
    missing = [ref for ref in refs if (ref[0], int(ref[1])) not in found]
    if missing:
        raise SourceError(
            f"cannot resume: {len(missing)} buffered samples are no longer in their shards "
            f"(first: shard {missing[0][0]}, sample #{missing[0][1]}); did the shards change?"
        )
    return [found[(url, int(index))] for url, index in refs]


def read_tasks(
    tasks: Sequence[ShardTask],
    *,
    allow_shell: bool = False,
    on_shard_error: Callable[[str, Exception], None] | None = None,
) -> Iterator[Record]:
    """Records of several shard tasks in order. A shard that fails mid-read raises, or is reported
    to on_shard_error (the rest of that shard is lost and the callback records it)."""
    for task in tasks:
        try:
            yield from read_shard(task, allow_shell=allow_shell)
        except SourceError:
            raise
        except Exception as exc:  # tar or I/O failure of this shard
            if on_shard_error is None:
                raise SourceError(f"shard {task.url}: cannot read: {exc}") from exc
            on_shard_error(task.url, exc)


class ShuffleBuffer:
    """Seeded shuffle of raw records (bytes, before decode) through a buffer of `size` records.

    `held` is what the buffer holds right now, so the ledger can account for it.
    """

    def __init__(self, size: int, rng) -> None:
        self.size = size
        self.rng = rng
        self.held: list[Record] = []

    def __call__(self, records: Iterator[Record]) -> Iterator[Record]:
        if self.size <= 1:
            yield from records
            return
        buf = self.held
        for rec in records:
            if len(buf) < self.size:
                buf.append(rec)
                continue
            i = int(self.rng.integers(len(buf)))
            out, buf[i] = buf[i], rec
            yield out
        while buf:
            i = int(self.rng.integers(len(buf)))
            buf[i], buf[-1] = buf[-1], buf[i]
            yield buf.pop()


def reader_tasks(
    shards: Sequence[str],
    *,
    seed: int,
    epoch: int,
    rank: int = 0,
    world_size: int = 1,
    worker: int = 0,
    num_workers: int = 1,
    shuffle_shards: bool = True,
) -> list[ShardTask]:
    """The shard tasks one reader (rank, worker) gets in one epoch."""
    if not 0 <= rank < world_size:
        raise ValueError(f"rank must be in 0..{world_size - 1} (got {rank})")
    if not 0 <= worker < num_workers:
        raise ValueError(f"worker must be in 0..{num_workers - 1} (got {worker})")
    slots = world_size * num_workers
    if len(shards) < slots and worker == 0 and rank == 0:
        warnings.warn(
            f"{len(shards)} shards for {slots} readers (ranks x workers): readers share shards, each "
            "keeping every k-th sample and streaming past the rest; more, smaller shards read faster",
            stacklevel=2,
        )
    order = shard_order(shards, seed=seed, epoch=epoch, shuffle=shuffle_shards)
    return split_shards(order, slot=rank * num_workers + worker, slots=slots)


class ReaderCursor:
    """One reader's walk over its shard tasks, with a JSON-able position for exact resume.

    The position is (pass, task, index): the next sample index to read in task `task` of pass
    `pass`. With `cycle`, the share is read again (pass 1, 2, ...) when it runs out, for
    equalised epochs. `limit` caps the records it yields in total (an epoch defined in samples).
    """

    def __init__(
        self,
        tasks: Sequence[ShardTask],
        *,
        allow_shell: bool = False,
        on_shard_error: Callable[[str, Exception], None] | None = None,
        cycle: bool = False,
        limit: int | None = None,
    ) -> None:
        self.tasks = list(tasks)
        self.allow_shell = allow_shell
        self.on_shard_error = on_shard_error
        self.cycle = cycle
        self.limit = limit
        self.pass_ = 0
        self.task = 0
        self.index = 0
        self.count = 0  # records yielded so far (across passes)
        self.done = False

    def state_dict(self) -> dict:
        return {"pass": self.pass_, "task": self.task, "index": self.index, "count": self.count, "done": self.done}

    def load_state_dict(self, state: dict) -> None:
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
                    for rec in read_shard(task, allow_shell=self.allow_shell, start=self.index):
                        self.index = rec.index + 1
                        self.count += 1
                        produced += 1
                        if self.limit is not None and self.count >= self.limit:
                            self.done = True
                        yield rec
                        if self.done:
                            return
                except SourceError:
                    raise
                except Exception as exc:  # tar or I/O failure of this shard
                    if self.on_shard_error is None:
                        raise SourceError(f"shard {task.url}: cannot read: {exc}") from exc
                    self.on_shard_error(task.url, exc)
                self.task, self.index = self.task + 1, 0
            if self.limit is not None and self.count >= self.limit:
                self.done = True
            elif not self.cycle or (fresh_pass and produced == 0):
                self.done = True  # one pass, or a share with nothing in it: cannot top up
            else:
                self.pass_, self.task, self.index = self.pass_ + 1, 0, 0
