"""Fan-out of independent work items on Dask distributed (or serially, in order).

Each item is a pure function call whose result does not depend on where or
when it runs, so a serial run and a Dask run give identical results.  On Dask
the results are handed back in completion order to ``on_result`` as they
arrive (the caller writes them out at once, so a crash of the client loses at
most the item being written); a worker that dies mid-task has its tasks
rescheduled on the remaining or restarted workers (Dask's own recovery, with
``retries`` more attempts for a task that raised).
"""
from __future__ import annotations

import logging
import os
import sys
from dataclasses import dataclass
from typing import Any, Callable, Sequence

from .errors import RobustboxError


@dataclass(frozen=True)
class FanOut:
    """Where independent items run.

    serial:    run in this process, in order (no Dask).
    scheduler: address of an existing Dask scheduler (``tcp://host:8786``); else a LocalCluster.
    workers:   LocalCluster worker processes (default: min(2, CPUs)); one thread each.
    retries:   extra attempts for a task that raised (a dead worker is recovered by Dask anyway).
    """

    serial: bool = False
    scheduler: str | None = None
    workers: int | None = None
    retries: int = 2

    def describe(self) -> str:
        if self.serial:
            return "serial (this process)"
        if self.scheduler:
            return f"Dask scheduler {self.scheduler}"
        return f"Dask LocalCluster, {self.local_workers()} worker process(es)"

    def local_workers(self) -> int:
        return self.workers if self.workers else max(1, min(2, os.cpu_count() or 1))


def progress_bar(label: str, enabled: bool | None = None) -> Callable[[int, int], None] | None:
    """A one-line progress display on stderr (tqdm; ``enabled`` None: only on a terminal)."""
    if enabled is None:
        enabled = sys.stderr.isatty()
    if not enabled:
        return None
    from tqdm import tqdm

    bar: dict[str, tqdm] = {}

    def show(done: int, total: int) -> None:
        if "bar" not in bar:
            bar["bar"] = tqdm(total=total, desc=f"  {label}", file=sys.stderr, leave=True, dynamic_ncols=True)
        bar["bar"].update(done - bar["bar"].n)
        if done >= total:
            bar.pop("bar").close()
    return show


def run_all(fn: Callable[[Any], Any], items: Sequence[Any], how: FanOut = FanOut(),
            on_result: Callable[[int, Any], None] | None = None,
            progress: Callable[[int, int], None] | None = None, name: str = "robustbox") -> list[Any]:
    """``[fn(item) for item in items]``, on Dask unless ``how.serial``; ``on_result(i, result)`` as each finishes.

    ``fn`` must be importable by the workers (a module-level function of an
    installed package) and should return failures as data; an exception that
    survives the retries is raised here as a RobustboxError naming the item.
    """
    results: list[Any] = [None] * len(items)
    total = len(items)
    if progress:
        progress(0, total)
    if how.serial or not items:
        for i, item in enumerate(items):
            results[i] = fn(item)
            if on_result:
                on_result(i, results[i])
            if progress:
                progress(i + 1, total)
        return results
    from distributed import Client, LocalCluster, as_completed  # imported only when used: it is slow to import

    cluster = None
    try:
        if how.scheduler:
            client = Client(how.scheduler, timeout="20s")
        else:
            cluster = LocalCluster(n_workers=how.local_workers(), threads_per_worker=1, processes=True,
                                   dashboard_address=None, silence_logs=logging.ERROR)
            client = Client(cluster)
    except (OSError, RuntimeError) as exc:
        raise RobustboxError(f"cannot start or reach the Dask scheduler {how.scheduler or '(local cluster)'}: {exc}") from None
    try:
        futures = [client.submit(fn, item, key=f"{name}-{i}", pure=False, retries=how.retries)
                   for i, item in enumerate(items)]
        index = {f.key: i for i, f in enumerate(futures)}
        done = 0
        for fut in as_completed(futures):
            i = index[fut.key]
            try:
                results[i] = fut.result()
            except Exception as exc:  # noqa: BLE001 - the task's own error, named with its item
                raise RobustboxError(f"{name} item {i} failed on Dask after {how.retries} retries: "
                                     f"{type(exc).__name__}: {exc}") from exc
            if on_result:
                on_result(i, results[i])
            done += 1
            if progress:
                progress(done, total)
    finally:
        client.close()
        if cluster is not None:
            cluster.close()
    return results
