"""How many threads a run's batches use, and running batches on them in order.

Patients are independent and every draw is keyed by (seed, patient id, purpose,
occurrence), so batches may run at the same time in any order and still give the same
numbers bit for bit. The compiled engines release the GIL, so threads of one process use
the machine's cores with no copying between processes.

The count is this process's setting: every core it may run on, unless the environment
variable MICROSIM_THREADS or `use` says otherwise. PSA worker processes set it to 1, so
that workers and threads do not compete for the same cores.
"""
from __future__ import annotations

import os
from collections import deque
from concurrent.futures import ThreadPoolExecutor
from typing import Callable, Iterable, Iterator, TypeVar

from microsim.scenario.errors import ScenarioError

VARIABLE = "MICROSIM_THREADS"
_chosen: int | None = None

Item, Result = TypeVar("Item"), TypeVar("Result")


def use(threads: int | None) -> None:
    """Use `threads` threads from now on in this process (None: the default again)."""
    global _chosen
    _chosen = None if threads is None else _checked(threads, "threads")


def count() -> int:
    """The number of threads a run uses (see the module's docstring)."""
    if _chosen is not None:
        return _chosen
    typed = os.environ.get(VARIABLE)
    if typed:
        try:
            return _checked(int(typed), VARIABLE)
        except ValueError:
            raise ScenarioError(VARIABLE, f"must be a whole number >= 1, got {typed!r}") from None
    return len(os.sched_getaffinity(0)) if hasattr(os, "sched_getaffinity") else os.cpu_count() or 1


def _checked(threads, name: str) -> int:
    if isinstance(threads, bool) or not isinstance(threads, int) or threads < 1:
        raise ScenarioError(name, f"must be a whole number >= 1, got {threads!r}")
    return threads


def in_order(work: Callable[[Item], Result], items: Iterable[Item], threads: int) -> Iterator[Result]:
    """work(item) for every item, run on `threads` threads, yielded in the items' order.
    At most 2 x threads items are in flight, so a consumer that writes results as they
    come (histories) keeps memory bounded; one thread runs in the caller's thread."""
    if threads == 1:
        yield from map(work, items)
        return
    with ThreadPoolExecutor(threads, thread_name_prefix="microsim") as pool:
        pending = deque()
        try:
            for item in items:
                pending.append(pool.submit(work, item))
                if len(pending) >= 2 * threads:
                    yield pending.popleft().result()
            while pending:
                yield pending.popleft().result()
        finally:
            for future in pending:  # an error or an early stop: start nothing more
                future.cancel()
