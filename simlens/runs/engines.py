"""Where shards run: in this process, in local worker processes, or on a Dask cluster.

All engines run the same pure task (``simlens.shard.render_shard``) and hand back its results as they
finish; the caller records them.  Results never depend on the engine.

- ``serial``: in this process, in order (``workers = 1`` and no scheduler).
- ``processes``: ``concurrent.futures.ProcessPoolExecutor`` with ``workers`` processes, started from
  a clean ``forkserver`` process: forking a process that has already run GalSim (whose OpenMP
  thread pool does not survive ``fork``) deadlocks the children.
- ``dask``: ``distributed.Client`` on ``scheduler`` (an address such as ``tcp://host:8786``), or on a
  ``LocalCluster`` of ``workers`` single-threaded processes.  Needs ``pip install 'simlens[dask]'``.
  The LocalCluster's workers start without Dask's default ``MALLOC_TRIM_THRESHOLD_=65536``: setting
  it switches off glibc's adaptive mmap threshold, so every large temporary numpy array is a fresh
  mmap, and simlens's array work runs much slower.  Its statistical profiler (sampling every worker
  thread every 10 ms) is switched off too (both costs are in the README, from
  bench/bench_parallel.py).  Workers of a cluster you start yourself should be configured the same
  way (``distributed.nanny.pre-spawn-environ.MALLOC_TRIM_THRESHOLD_: null`` and
  ``distributed.worker.profile.enabled: false``).
  On a multi-machine cluster the run folder must be on a file system every worker can write to.
"""

from __future__ import annotations

import multiprocessing
from concurrent.futures import ProcessPoolExecutor, as_completed
from typing import Callable, Iterable, Iterator, Sequence

from ..errors import SimlensError

__all__ = ["ENGINES", "resolve_engine", "run_tasks"]

ENGINES = ("auto", "serial", "processes", "dask")


def resolve_engine(engine: str, workers: int, scheduler: str | None) -> str:
    if engine not in ENGINES:
        raise SimlensError(f"unknown engine {engine!r}; choose one of {', '.join(ENGINES)}")
    if workers < 1:
        raise SimlensError(f"--workers must be at least 1, got {workers}")
    if scheduler is not None:
        if engine not in ("auto", "dask"):
            raise SimlensError(f"--scheduler needs the dask engine, not {engine!r}")
        return "dask"
    if engine == "auto":
        return "serial" if workers == 1 else "processes"
    return engine


def run_tasks(function: Callable, tasks: Sequence, *, engine: str = "auto", workers: int = 1,
              scheduler: str | None = None) -> Iterator:
    """Yield ``function(task)`` for every task, in the order they finish."""
    engine = resolve_engine(engine, workers, scheduler)
    if not tasks:
        return
    if engine == "serial":
        for task in tasks:
            yield function(task)
    elif engine == "processes":
        context = multiprocessing.get_context("forkserver")
        context.set_forkserver_preload(["simlens.runs.shards"])
        pool = ProcessPoolExecutor(max_workers=min(workers, len(tasks)), mp_context=context)
        try:
            futures = [pool.submit(function, task) for task in tasks]
            for future in as_completed(futures):
                yield future.result()
        finally:
            pool.shutdown(wait=True, cancel_futures=True)
    else:
        yield from _run_on_dask(function, tasks, workers, scheduler)


def _run_on_dask(function: Callable, tasks: Iterable, workers: int, scheduler: str | None) -> Iterator:
    try:
        import dask
        from distributed import Client, LocalCluster
        from distributed import as_completed as dask_completed
    except ImportError:
        raise SimlensError("the dask engine needs Dask: pip install 'simlens[dask]'") from None
    cluster = None
    try:
        if scheduler is None:
            with dask.config.set({"distributed.nanny.pre-spawn-environ.MALLOC_TRIM_THRESHOLD_": None,
                                  "distributed.worker.profile.enabled": False}):
                cluster = LocalCluster(n_workers=workers, threads_per_worker=1, processes=True,
                                       dashboard_address=":0")
            client = Client(cluster)
        else:
            try:
                client = Client(scheduler, timeout=30)
            except (OSError, TimeoutError) as exc:
                raise SimlensError(f"cannot reach the Dask scheduler at {scheduler}: {exc}") from None
        try:
            futures = [client.submit(function, task, pure=False) for task in tasks]
            for future in dask_completed(futures):
                yield future.result()
        finally:
            client.close()
    finally:
        if cluster is not None:
            cluster.close()
