"""One sweep end to end: plan against the store, run the missing points, store each one.

``run_sweep(grid, store_path, ...) -> SweepSummary``.  The order of events makes a bad
request change nothing: the grid is validated (:mod:`isoscope.sweep.grid`) and the store
checked (:func:`~isoscope.sweep.store.check_store`) before anything runs; the store's lock is
taken; the executor is started (a Dask scheduler that does not answer stops the sweep here,
before a new store is created or a run recorded); then each finished point is committed on its
own, so a killed sweep keeps every point it finished and the same command resumes it.
"""

from __future__ import annotations

import contextlib
import dataclasses
import time
from collections.abc import Callable
from pathlib import Path

from isoscope.errors import InputError
from isoscope.sweep.execute import DaskWorkers, Finished, LocalWorkers, available_cores
from isoscope.sweep.grid import Grid
from isoscope.sweep.store import Store, lock, stored_statuses

__all__ = ["SweepSummary", "plan", "run_sweep"]


@dataclasses.dataclass(frozen=True)
class SweepSummary:
    """What a sweep did.

    Attributes:
      points: points in the grid.
      computed, skipped, failed: points measured now, found already stored (done, or failed
        without ``retry_failed``), and measured now but failed.
      stored: points in the store afterwards (all grids that wrote to it).
      executor: how the points ran.
      seconds: wall time.
      failures: ``(point name, error)`` of this run's failed points.
      warnings: sentences to show before the numbers.
    """

    points: int
    computed: int
    skipped: int
    failed: int
    stored: int
    executor: str
    seconds: float
    failures: tuple[tuple[str, str], ...]
    warnings: tuple[str, ...]


def plan(grid: Grid, statuses: dict[str, str], retry_failed: bool = False) -> list:
    """The grid's points that still need measuring: not in the store, or failed there when
    ``retry_failed``."""
    return [
        p
        for p in grid.points
        if p.key not in statuses or (retry_failed and statuses[p.key] == "failed")
    ]


def _check_memory(points, concurrent: int) -> None:
    """Refuse before starting when ``concurrent`` copies of the largest point do not fit."""
    from isoscope import budget

    if not points:
        return
    worst = max(points, key=lambda p: budget.estimate(p.spec, rate=1.0).peak_bytes)
    need = budget.estimate(worst.spec, rate=1.0).peak_bytes * concurrent
    avail = budget.available_memory()
    if avail is not None and need > avail:
        raise InputError(
            f"{concurrent} worker{'s' if concurrent > 1 else ''} each running the largest point "
            f"({worst.spec.name}) need about {budget._size(need)} of memory, but "
            f"{budget._size(avail)} is available",
            expected="an estimated peak below the available memory",
            hint="use fewer --workers, or smaller widths and depths in the grid",
        )


def run_sweep(
    grid: Grid,
    store_path: str | Path,
    workers: int | None = None,
    scheduler: str | None = None,
    retry_failed: bool = False,
    on_point: Callable[[Finished, int, int], None] | None = None,
    on_start: Callable[[str, int, int], None] | None = None,
) -> SweepSummary:
    """Measure every point of ``grid`` not yet in the store at ``store_path``.

    Args:
      grid: the parsed grid.
      store_path: the SQLite store (created if absent).
      workers: local worker processes (default: the cores), or the size of ``scheduler="local"``.
      scheduler: ``None`` (local processes), ``"local"`` (a Dask LocalCluster) or a Dask
        scheduler address.
      retry_failed: measure again the points stored as failed.
      on_point: called as ``on_point(finished, done, total)`` after each point is stored.
      on_start: called as ``on_start(executor description, to run, skipped)`` once the
        executor is up.

    Raises:
      InputError: the store is refused or in use, the points do not fit in memory, the
        scheduler does not answer (nothing is written in any of these cases).
    """
    t0 = time.perf_counter()
    cores = available_cores()
    workers = cores if workers is None else workers
    if isinstance(workers, bool) or not isinstance(workers, int) or workers < 1:
        raise InputError(
            f"--workers {workers!r} is not a positive whole number",
            expected="an integer >= 1 (default: the cores)",
            key="--workers",
        )
    warnings = []
    if scheduler in (None, "local") and workers > cores:
        warnings.append(
            f"{workers} workers on {cores} cores: they share the cores, so each runs "
            f"slower than alone (use --workers {cores} or fewer)"
        )
    store_path = Path(store_path)
    with lock(store_path):
        statuses = stored_statuses(store_path)
        todo = plan(grid, statuses, retry_failed)
        skipped = len(grid.points) - len(todo)
        if scheduler in (None, "local"):
            _check_memory(todo, min(workers, max(len(todo), 1)))
        computed = failed = 0
        failures = []
        pool = (
            None
            if not todo
            else LocalWorkers(min(workers, len(todo)))
            if scheduler is None
            else DaskWorkers(scheduler, workers)
        )
        description = "nothing to run" if pool is None else pool.describe()
        with pool if pool is not None else contextlib.nullcontext():
            dashboard = getattr(pool, "dashboard", None)
            if dashboard:
                description += f" (dashboard {dashboard})"
            if on_start is not None:
                on_start(description, len(todo), skipped)
            with Store.writer(store_path) as store:
                run = store.begin_run(grid.source, grid.text, description)
                status = "interrupted"
                try:
                    if pool is not None:
                        for done, finished in enumerate(pool.run(todo, grid.source), 1):
                            store.record(finished.point, finished.outcome, run)
                            if finished.outcome["status"] == "done":
                                computed += 1
                            else:
                                failed += 1
                                failures.append(
                                    (finished.point.spec.name, finished.outcome.get("error") or "")
                                )
                            if on_point is not None:
                                on_point(finished, done, len(todo))
                    status = "finished"
                finally:
                    store.end_run(run, computed, skipped, failed, status)
                stored = len(store.statuses())
    return SweepSummary(
        len(grid.points),
        computed,
        skipped,
        failed,
        stored,
        description,
        time.perf_counter() - t0,
        tuple(failures),
        tuple(warnings),
    )
