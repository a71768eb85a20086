"""The local engine: the worker groups' jobs as processes on this machine, each ending when the
process that started it ends."""

from __future__ import annotations

import contextlib
import os
import queue as queue_mod
import signal
import sys
import threading
import traceback
from collections.abc import Callable
from typing import Any

from ..errors import PatchloomError
from .format import StoreError
from .jobs import JOBS

__all__ = ["ORPHANED_EXIT", "die_with_parent", "pool_size", "progress_bar", "run_jobs"]

_PR_SET_PDEATHSIG = 1  # linux/prctl.h
ORPHANED_EXIT = 70  # exit status of a worker process whose parent died


def die_with_parent(parent: int, lifeline) -> None:
    """End this worker process as soon as the process that started it ends (SIGKILL included), instead of
    packing on for nobody. Linux: the kernel sends SIGKILL (prctl PR_SET_PDEATHSIG). Everywhere: a thread
    waits on `lifeline`, a pipe whose only writing end the parent holds, and exits at its end of file."""
    if sys.platform.startswith("linux"):
        with contextlib.suppress(OSError, AttributeError):
            import ctypes

            ctypes.CDLL(None, use_errno=True).prctl(_PR_SET_PDEATHSIG, int(signal.SIGKILL), 0, 0, 0)
    if os.getppid() != parent:  # it died before the line above took effect
        os._exit(ORPHANED_EXIT)

    def wait() -> None:
        with contextlib.suppress(EOFError, OSError):
            while True:
                lifeline.recv_bytes()
        os._exit(ORPHANED_EXIT)

    threading.Thread(target=wait, name="patchloom-lifeline", daemon=True).start()


def _child_main(kind: str, job: dict[str, Any], q, parent: int, lifeline) -> None:
    """Entry point of a spawned worker process: run one job, send events and the result on q."""
    die_with_parent(parent, lifeline)
    try:
        result = JOBS[kind](job, q.put)
        q.put(("done", job["worker"], result))
        code = 0
    except BaseException as exc:  # noqa: BLE001 - report everything; the parent raises it with context
        expected = isinstance(exc, PatchloomError)  # its message says it all: no traceback
        q.put(("error", job["worker"], f"{type(exc).__name__}: {exc}", "" if expected else traceback.format_exc()))
        code = 1
    # Every file this worker wrote is closed and renamed; once the queue has flushed the result, skip
    # the interpreter's teardown, which takes a second or more once torch has been imported.
    q.close()
    q.join_thread()
    sys.stdout.flush()
    sys.stderr.flush()
    os._exit(code)


def pool_size(jobs: int) -> int:
    """Worker processes run at once: never more than this machine's CPUs, whatever --workers or a manifest asks."""
    return max(1, min(jobs, os.cpu_count() or 1))


def run_jobs(kind: str, jobs: list[dict[str, Any]], *, on_tick: Callable[[int], None],
             meanwhile: Callable[[], None] | None = None) -> list[dict[str, Any]]:
    """Run one job per worker; results in worker order.

    A single job runs in this process. Several run in processes started with the `spawn` method: a
    fresh interpreter holds no copied locks or thread pools (numpy/torch may have started threads in
    the parent, and forking a threaded process can deadlock), behaves the same on Linux, macOS and
    Windows, and its output can depend only on the job it is given. The cost is an interpreter start
    per worker (a few seconds). At most `pool_size` run at once; the next starts when one finishes.
    Each ends when this process ends, even by SIGKILL (`die_with_parent`). Scripts calling this with
    workers > 1 need the usual `if __name__ == "__main__":` guard.
    """
    if len(jobs) == 1:
        if meanwhile is not None:
            meanwhile()
        return [JOBS[kind](jobs[0], lambda ev: on_tick(ev[2]) if ev[0] == "tick" else None)]
    import multiprocessing as mp

    ctx = mp.get_context("spawn")
    q = ctx.Queue()
    lifeline, ours = ctx.Pipe(duplex=False)  # workers hold the reading end; ours closes when we die
    waiting = list(jobs)
    running: dict[int, Any] = {}
    results: dict[int, dict[str, Any]] = {}
    limit = pool_size(len(jobs))
    try:
        while len(results) < len(jobs):
            while waiting and len(running) < limit:
                job = waiting.pop(0)
                p = ctx.Process(target=_child_main, args=(kind, job, q, os.getpid(), lifeline),
                                name=f"patchloom-{kind}-{job['worker']}", daemon=True)
                p.start()
                running[job["worker"]] = p
            if meanwhile is not None:
                meanwhile, work = None, meanwhile
                work()
            try:
                ev = q.get(timeout=0.5)
            except queue_mod.Empty:
                for w, p in running.items():
                    if not p.is_alive() and p.exitcode not in (0, None):
                        raise StoreError(f"worker {w} died (exit code {p.exitcode}) without a result")
                continue
            if ev[0] == "tick":
                on_tick(ev[2])
            elif ev[0] == "done":
                results[ev[1]] = ev[2]
                running.pop(ev[1]).join()
            else:
                raise StoreError(f"worker {ev[1]} failed: {ev[2]}\n{ev[3]}".rstrip())
    finally:
        for p in running.values():
            if p.is_alive():
                p.terminate()
            p.join()
        q.close()
        ours.close()
        lifeline.close()
    return [results[i] for i in range(len(jobs))]


def progress_bar(progress: bool, **kw):
    """A tqdm bar on stderr (disabled without `progress`) that leaves no line behind."""
    from tqdm import tqdm

    return tqdm(disable=not progress, file=sys.stderr, dynamic_ncols=True, leave=False, **kw)
