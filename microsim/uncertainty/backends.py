"""Where draws are evaluated: in this process, in a process pool, or on a Dask cluster.

Each backend takes the model evaluation and the pending (draw, values) jobs and yields
(draw, results) pairs as draws finish, in any order; the caller writes them. Closing the
iterator (an interrupt, an error) cancels what has not started and shuts the workers
down. Workers only compute: results come back to the calling process, so a remote
cluster needs no shared file system.
"""
from __future__ import annotations

import multiprocessing
import signal
from typing import Callable, Iterator, Sequence

import numpy as np
import pandas as pd

from .. import threads
from ..scenario.errors import ScenarioError

Evaluate = Callable[[int, dict[str, float]], pd.DataFrame]
Job = tuple[int, dict[str, float]]
Finished = Iterator[tuple[int, pd.DataFrame]]
BACKENDS = ("processes", "dask")


def evaluate_draw(evaluate: Evaluate, draw: int, values: dict[str, float]) -> tuple[int, pd.DataFrame]:
    """One draw's results with an int64 `draw` column first."""
    results = evaluate(draw, values)
    if not isinstance(results, pd.DataFrame):
        raise TypeError(f"evaluate must return a pandas DataFrame, got {type(results).__name__}")
    if "draw" in results.columns:
        if not (results["draw"] == draw).all():
            raise ValueError(f"evaluate returned a draw column that is not {draw} throughout")
        results = results.drop(columns="draw")
    results = results.reset_index(drop=True)
    results.insert(0, "draw", np.full(len(results), draw, dtype=np.int64))
    return draw, results


def in_process(evaluate: Evaluate, jobs: Sequence[Job]) -> Finished:
    for draw, values in jobs:
        yield evaluate_draw(evaluate, draw, values)


_worker_evaluate: Evaluate | None = None


def _start_worker(evaluate: Evaluate) -> None:
    """Pool initializer: keep the evaluation (sent once per worker, not once per draw)
    and leave Ctrl-C to the parent, which shuts the pool down in order."""
    global _worker_evaluate
    _worker_evaluate = evaluate
    threads.use(1)  # the workers share the cores: threads on top would compete for them
    signal.signal(signal.SIGINT, signal.SIG_IGN)


def _evaluate_in_worker(job: Job) -> tuple[int, pd.DataFrame]:
    draw, values = job
    return evaluate_draw(_worker_evaluate, draw, values)


def process_pool(evaluate: Evaluate, jobs: Sequence[Job], workers: int) -> Finished:
    """A pool of `workers` processes; when the loop stops early (Ctrl-C, an error, or the
    consumer closing this iterator) the pool is terminated at once: draws in flight are
    simply evaluated again on resume, and nothing is left waiting on a worker."""
    with multiprocessing.Pool(workers, initializer=_start_worker, initargs=(evaluate,)) as pool:
        yield from pool.imap_unordered(_evaluate_in_worker, jobs)


def import_dask():
    """dask.distributed, or a ScenarioError saying how to install it."""
    try:
        import dask.distributed
    except ImportError:
        raise ScenarioError("backend", "dask backend needs: pip install 'microsim[dask]'") from None
    return dask.distributed


def _evaluate_on_one_thread(evaluate: Evaluate, draw: int, values: dict[str, float]):
    """A draw on a Dask worker: its threads already share the machine's cores."""
    threads.use(1)
    return evaluate_draw(evaluate, draw, values)


CONNECT_SECONDS = 20  # how long a scheduler has to answer before the PSA is refused


def dask_cluster(evaluate: Evaluate, jobs: Sequence[Job], workers: int, address: str | None) -> Finished:
    """On the scheduler at `address`, or on a local cluster of `workers` single-threaded
    processes that lives only as long as this iterator."""
    distributed = import_dask()
    cluster = None if address is not None else distributed.LocalCluster(
        n_workers=workers, threads_per_worker=1, processes=True, dashboard_address=None)
    try:
        client = distributed.Client(address if address is not None else cluster,
                                    timeout=CONNECT_SECONDS)
    except OSError as error:  # an address nothing answers at
        if cluster is not None:
            cluster.close()
        raise ScenarioError("address", f"no Dask scheduler answered at {address!r} ({error}); "
                            "start one there, or check the address") from None
    futures = []
    try:
        [shared] = client.scatter([evaluate], broadcast=True)
        futures = client.map(_evaluate_on_one_thread, [shared] * len(jobs), [d for d, _ in jobs],
                             [v for _, v in jobs], pure=False)
        for future in distributed.as_completed(futures):
            yield future.result()
    finally:
        if futures:
            client.cancel(futures)
        client.close()
        if cluster is not None:
            cluster.close()


def choose(backend: str, workers: int, address: str | None) -> Callable[[Evaluate, Sequence[Job]], Finished]:
    """The backend to run on, checked before anything is written."""
    if backend not in BACKENDS:
        raise ScenarioError("backend", f"unknown backend {backend!r}; choose one of {', '.join(BACKENDS)}")
    if isinstance(workers, bool) or not isinstance(workers, (int, np.integer)) or workers < 1:
        raise ScenarioError("workers", f"must be a whole number >= 1, got {workers!r}")
    if backend == "dask":
        import_dask()
        return lambda evaluate, jobs: dask_cluster(evaluate, jobs, workers, address)
    if address is not None:
        raise ScenarioError("address", "only the dask backend connects to an address; "
                                       "drop the address or choose backend 'dask'")
    if workers == 1:
        return in_process
    return lambda evaluate, jobs: process_pool(evaluate, jobs, workers)
