"""Where batch work runs: a dask.distributed LocalCluster sized to the machine, or a running scheduler.

Every task is a plain function of picklable arguments, submitted with
retries; a worker that dies mid-task (killed, out of memory) has its tasks
run again elsewhere by the scheduler, and since every task is a pure
function of its arguments (seeded noise, no shared state) the results are
the same.  Results come back to the client, which alone writes files, so a
remote cluster needs no shared folder.

dask is imported lazily inside :func:`open_cluster` and :func:`run_tasks`:
it takes about a second to import and only the batch commands need it.
"""

from __future__ import annotations

import asyncio
import logging
import os
import socket
import sys
import time
from contextlib import contextmanager
from typing import Any, Callable, Iterator, Sequence

from sheafsynth.engine.errors import InputError, SheafsynthError

__all__ = ["CONNECT_TIMEOUT_S", "TASK_RETRIES", "BatchError", "machine_workers", "probe_scheduler", "open_cluster",
           "run_tasks"]

#: How long (s) to wait for a scheduler given with --scheduler before giving up.
CONNECT_TIMEOUT_S = 4.0
#: How often a task that raised is tried again (a lost worker's tasks are rerun by the scheduler anyway).
TASK_RETRIES = 2


class BatchError(SheafsynthError):
    """A batch job failed: a task kept failing, or the cluster went away."""


def machine_workers() -> int:
    """Worker processes for a LocalCluster on this machine: one per CPU this process may run on."""
    try:
        return max(1, len(os.sched_getaffinity(0)))
    except (AttributeError, OSError):
        return max(1, os.cpu_count() or 1)


def _first_line(e: BaseException) -> str:
    return str(e).splitlines()[0] if str(e) else type(e).__name__


def probe_scheduler(scheduler: str, timeout_s: float = CONNECT_TIMEOUT_S) -> None:
    """Reach ``scheduler`` within about ``timeout_s`` s: a plain TCP connection first (a refused one fails at
    once), then one dask connection with its handshake; InputError naming why not.  (A Client whose
    constructor fails spends another 10 s closing itself and prints a traceback, so the address is tried
    this way first.)"""
    # lazy: dask.distributed is heavy to import (module doc)
    from distributed.comm import connect
    from distributed.comm.addressing import parse_address, parse_host_port

    def fail(why: str) -> InputError:
        return InputError(f"--scheduler {scheduler}: no dask scheduler answered within {timeout_s:g} s ({why})")

    start = time.monotonic()
    try:
        scheme, loc = parse_address(scheduler)
        if scheme in ("tcp", "tls"):
            host, port = parse_host_port(loc)
            socket.create_connection((host, int(port)), timeout=timeout_s).close()
    except (ValueError, TypeError) as e:
        raise InputError(f"--scheduler {scheduler}: not an address such as tcp://host:8786 "
                         f"({_first_line(e)})") from None
    except OSError as e:
        raise fail("timed out" if isinstance(e, TimeoutError) else (e.strerror or _first_line(e))) from None

    left = max(0.5, timeout_s - (time.monotonic() - start))     # one time budget for both steps

    async def once() -> None:
        comm = await connect(scheduler, timeout=left)
        await comm.close()

    try:
        asyncio.run(asyncio.wait_for(once(), left))
    except (TimeoutError, asyncio.TimeoutError):
        raise fail("timed out") from None
    except OSError as e:
        raise fail(_first_line(e)) from None
    except Exception:  # anything else from the far end: whatever listens there is not a dask scheduler
        raise fail("what answered there is not a dask scheduler") from None


@contextmanager
def open_cluster(workers: int | None = None, scheduler: str | None = None,
                 connect_timeout_s: float = CONNECT_TIMEOUT_S) -> Iterator[Any]:
    """A ``distributed.Client``: to ``scheduler`` (an address such as tcp://host:8786) when given, else to a
    LocalCluster of ``workers`` single-threaded worker processes (default: :func:`machine_workers`).

    An unreachable scheduler raises InputError within about ``connect_timeout_s`` s.
    """
    # lazy: dask.distributed is heavy to import (module doc)
    from distributed import Client, LocalCluster

    if scheduler is not None:
        probe_scheduler(scheduler, connect_timeout_s)
        try:
            client = Client(scheduler, timeout=connect_timeout_s, set_as_default=False)
        except (OSError, TimeoutError, ValueError, TypeError) as e:
            raise InputError(f"--scheduler {scheduler}: no dask scheduler answered within "
                             f"{connect_timeout_s:g} s ({_first_line(e)})") from None
        try:
            yield client
        finally:
            client.close()
        return
    n = machine_workers() if workers is None else int(workers)
    if not 1 <= n <= 512:
        raise InputError(f"--workers {n}: expected 1 to 512 worker processes")
    # CRITICAL: a worker that outlives its scheduler by a heartbeat at close logs
    # a harmless traceback at ERROR; task errors still reach the client as exceptions
    cluster = LocalCluster(n_workers=n, threads_per_worker=1, processes=True, dashboard_address=":0",
                           silence_logs=logging.CRITICAL)
    try:
        client = Client(cluster, set_as_default=False)
        try:
            yield client
        finally:
            client.close()
    finally:
        cluster.close()


def _bar(total: int, label: str):
    """A rich progress bar on stderr when it is a terminal, else None."""
    if total == 0 or not sys.stderr.isatty():
        return None
    # lazy: rich is needed only on a terminal (start-up time)
    from rich.progress import BarColumn, MofNCompleteColumn, Progress, TextColumn, TimeRemainingColumn

    return Progress(TextColumn(label), BarColumn(), MofNCompleteColumn(), TimeRemainingColumn(), transient=True)


def run_tasks(client: Any, fn: Callable[..., Any], args: Sequence[tuple], *, label: str,
              on_result: Callable[[int, Any], None] | None = None, retries: int = TASK_RETRIES) -> list[Any]:
    """Run ``fn(*a)`` for every ``a`` in ``args`` on the cluster; results in the order of ``args``.

    ``on_result(index, result)`` runs on the client as each result arrives
    (in completion order).  A progress bar shows on a terminal.  An engine
    error raised by a task (a bad preset, say) is raised here as itself;
    anything else becomes BatchError naming the task.
    """
    # lazy: dask.distributed is heavy to import (module doc)
    from distributed import as_completed

    futures = [client.submit(fn, *a, pure=False, retries=retries) for a in args]
    index = {f.key: i for i, f in enumerate(futures)}
    results: list[Any] = [None] * len(futures)
    bar = _bar(len(futures), label)
    task = bar.add_task(label, total=len(futures)) if bar else None
    if bar:
        bar.start()
    try:
        for fut in as_completed(futures, loop=client.loop):
            i = index[fut.key]
            if fut.status in ("error", "cancelled"):
                exc = fut.exception() if fut.status == "error" else None
                for f in futures:
                    f.cancel()
                if isinstance(exc, SheafsynthError):
                    raise exc
                why = f"{type(exc).__name__}: {exc}" if exc is not None else "cancelled (did the cluster go away?)"
                raise BatchError(f"{label}: task {i + 1} of {len(futures)} failed after {retries} retries: {why}")
            # a result held by a worker that died is "lost": the scheduler computes it again and result() waits
            results[i] = fut.result()
            if on_result is not None:
                on_result(i, results[i])
            if bar:
                bar.update(task, advance=1)
    finally:
        if bar:
            bar.stop()
    return results
