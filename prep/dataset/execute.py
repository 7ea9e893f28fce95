"""Running record tasks: in this process, in a pool of worker processes, or on a Dask cluster."""
from __future__ import annotations

import logging
import os
from typing import Callable

from prep.errors import ConfigError

log = logging.getLogger("prep")


def n_workers(workers: int | None) -> int:
    """Worker processes: ``workers``, else ``$BEATMILL_WORKERS``, else every core."""
    env = os.environ.get("BEATMILL_WORKERS", "").strip()
    if not workers and env:
        try:
            workers = int(env)
        except ValueError:
            raise ConfigError(f"BEATMILL_WORKERS={env!r} is not a whole number of worker "
                              "processes; set it to e.g. 2 or unset it") from None
        if workers < 1:
            raise ConfigError(f"BEATMILL_WORKERS={env!r}: at least 1 worker is needed")
    return max(1, workers or os.cpu_count() or 1)


def _warm() -> None:
    """Import the signal stack (scipy.signal alone takes about 1 s) before the first record: in the
    parent before forking, or as the initializer of spawned workers."""
    import prep.pipeline.chunks  # noqa: F401


def start_pool(n: int):
    """A process pool of ``n`` workers, warming up at once (fork where the platform has it:
    children need not re-import the caller's main module, such as a notebook or an unguarded
    script; elsewhere spawn)."""
    import multiprocessing as mp
    from concurrent.futures import ProcessPoolExecutor
    method = "fork" if "fork" in mp.get_all_start_methods() else "spawn"
    if method == "fork":  # imported once here, the workers inherit it instead of each paying it
        _warm()
    pool = ProcessPoolExecutor(max_workers=n, mp_context=mp.get_context(method),
                               initializer=None if method == "fork" else _warm)
    for _ in range(n):  # start every worker now (the pool would start them one task at a time)
        pool.submit(int)
    return pool


def execute(fn: Callable, tasks: list, workers: int | None, dask: str | None, pool=None):
    """Run ``fn`` (a module-level function: workers find it by name) on every task; yields each
    task's error text ('' when fine) in task order. ``pool``: a pool from :func:`start_pool`
    to use (and shut down)."""
    if not tasks:
        if pool is not None:
            pool.shutdown(cancel_futures=True)
        return
    if dask:
        yield from execute_dask(fn, tasks, dask)
        return
    n = min(n_workers(workers), len(tasks))
    if n == 1 and pool is None:
        for t in tasks:
            yield fn(t)
        return
    from concurrent.futures.process import BrokenProcessPool

    pool = pool or start_pool(n)
    with pool:
        futures = [pool.submit(fn, t) for t in tasks]
        for f in futures:  # in task order; the pool works ahead meanwhile
            try:
                yield f.result()
            except BrokenProcessPool:
                yield "a worker process died (out of memory?) while processing this record"
            except Exception as exc:  # noqa: BLE001 - a task's failure is that record's failure
                yield f"unexpected {type(exc).__name__}: {exc}"


def execute_dask(fn: Callable, tasks: list, address: str):
    """Send shard tasks to a dask.distributed cluster (``local``: a LocalCluster)."""
    try:
        from dask.distributed import Client, LocalCluster
    except ImportError:
        raise ConfigError("--dask needs dask.distributed: pip install 'beatmill[dask]'") from None
    cluster = None
    if address == "local":
        cluster = LocalCluster(n_workers=os.cpu_count() or 1, threads_per_worker=1,
                               processes=True, dashboard_address=None)
        client = Client(cluster)
    else:
        client = Client(address)
    try:
        futures = client.map(fn, tasks, pure=False)
        for f in futures:
            try:
                yield f.result()
            except Exception as exc:  # noqa: BLE001
                yield f"unexpected {type(exc).__name__} on a Dask worker: {exc}"
    finally:
        client.close()
        if cluster is not None:
            cluster.close()
