"""Running a sweep's points: the per-point task, the order, local worker processes and Dask.

Every point is measured by :func:`measure_point`, which is ``analyze`` on the point's spec
followed by ``result_dict``: a point's numbers are those of ``isoscope analyze`` on the same
spec, bit for bit (the same seed, the same draws; XLA's and LAPACK's thread counts do not
change a bit of them, checked in the tests).  Only the coordinating process writes the store:
workers return plain data.

Order.  Points are grouped by shape (:attr:`~isoscope.sweep.grid.Point.shape`): within a group
the compiled Jacobian and trace functions are reused (they are cached per family and
activation, with every scale a traced argument) and so are the unit draws
(:func:`isoscope.initializers.reused_draws`: a sigma_w x sigma_b grid at one seed samples its
matrices once per worker).  Groups start in decreasing order of cost (floating-point operations
of one point, :func:`isoscope.budget.estimate`), so the expensive points do not run last and
alone.  A worker keeps to one group; a worker with nothing left in its group takes the next
untouched group, or, when every group has started, the far end of the group with most points
left.

Executors:

* :class:`LocalWorkers` -- ``N`` fresh interpreters (:mod:`isoscope.sweep.worker`; JAX is not
  safe to fork, and a user's script must not be re-imported), each with ``cores // N`` XLA
  threads (``PJRT_NPROC``) and one BLAS thread, so that N workers on N cores do not
  oversubscribe them.  A worker that dies (killed, out of memory)
  fails its point and is replaced; on Linux the workers die with the coordinator
  (``PR_SET_PDEATHSIG``), so a killed sweep leaves no process behind.
* :class:`DaskWorkers` -- the same task on a Dask ``distributed`` cluster: an existing scheduler
  (``tcp://host:port``) or ``local``, a ``distributed.LocalCluster`` on loopback started for the
  sweep.  Tasks are submitted with their cost as priority.
"""

from __future__ import annotations

import collections
import contextlib
import dataclasses
import os
import socket
import subprocess
import sys
import time
import traceback
from collections.abc import Iterator
from multiprocessing.connection import Connection
from multiprocessing.connection import wait as wait_for
from typing import Any

from isoscope.errors import InputError

__all__ = [
    "measure_point",
    "available_cores",
    "worker_threads",
    "Schedule",
    "LocalWorkers",
    "DaskWorkers",
    "Finished",
]


def available_cores() -> int:
    """Cores this process may run on (its CPU affinity), at least 1."""
    try:
        return max(1, len(os.sched_getaffinity(0)))
    except (AttributeError, OSError):
        return max(1, os.cpu_count() or 1)


def worker_threads(workers: int, cores: int | None = None) -> int:
    """XLA threads per worker: ``cores // workers``, at least 1."""
    cores = available_cores() if cores is None else cores
    return max(1, cores // max(1, workers))


def measure_point(spec_data: dict[str, Any], source: str | None = None) -> dict[str, Any]:
    """Analyse one point exactly as ``isoscope analyze`` would.

    Args:
      spec_data: the point's resolved spec (:meth:`~isoscope.spec.Spec.to_dict`).
      source: the grid file, for messages.

    Returns:
      ``{"status": "done", "result": result.json without its glossary, "seconds": s}`` or
      ``{"status": "failed", "error": message, "seconds": s}``: a point that fails (bad input
      the grid could not catch, a theory failure, a bug) never stops the sweep.
    """
    t0 = time.perf_counter()
    try:
        from isoscope.analysis import analyze
        from isoscope.report import result_dict
        from isoscope.spec import parse_spec

        spec = parse_spec(spec_data, source=source)
        with _worker_draws():
            result = result_dict(analyze(spec))
        result.pop("glossary", None)
        return {"status": "done", "result": result, "seconds": time.perf_counter() - t0}
    except (InputError, ValueError, ArithmeticError) as e:
        return {
            "status": "failed",
            "error": f"{type(e).__name__}: {e}",
            "seconds": time.perf_counter() - t0,
        }
    except Exception as e:  # a bug: keep the traceback with the point
        tb = "".join(traceback.format_exception(type(e), e, e.__traceback__)[-6:])
        return {
            "status": "failed",
            "error": f"internal error {type(e).__name__}: {e}\n{tb}",
            "seconds": time.perf_counter() - t0,
        }


_DRAWS: list = []


@contextlib.contextmanager
def _worker_draws() -> Iterator[None]:
    """The process's one :func:`~isoscope.initializers.reused_draws` cache, entered on the
    first point and kept for the process's lifetime (a worker's points of one shape share
    their unit draws; at most the cache's 1 GiB stays held)."""
    if not _DRAWS:
        from isoscope.initializers import reused_draws

        manager = reused_draws()
        manager.__enter__()
        _DRAWS.append(manager)
    yield


# ----------------------------------------------------------------------------- ordering
class Schedule:
    """Which point a worker takes next (see the module docstring).

    Args:
      points: the points to run.
    """

    def __init__(self, points):
        groups: dict[tuple, list] = {}
        for p in points:
            groups.setdefault(p.shape, []).append(p)
        ordered = sorted(groups.values(), key=lambda g: (-g[0].cost, g[0].index))
        self.groups = [collections.deque(sorted(g, key=lambda p: p.index)) for g in ordered]
        self.started = [False] * len(self.groups)
        self.current: dict[Any, int] = {}

    def __len__(self) -> int:
        return sum(len(g) for g in self.groups)

    def take(self, worker) -> Any | None:
        """The next point for ``worker``, or ``None`` when none is left."""
        g = self.current.get(worker)
        if g is not None and self.groups[g]:
            return self.groups[g].popleft()
        for i, started in enumerate(self.started):
            if not started and self.groups[i]:
                self.started[i] = True
                self.current[worker] = i
                return self.groups[i].popleft()
        busiest = max(range(len(self.groups)), key=lambda i: len(self.groups[i]), default=None)
        if busiest is None or not self.groups[busiest]:
            return None
        self.current[worker] = busiest
        return self.groups[busiest].pop()


@dataclasses.dataclass(frozen=True)
class Finished:
    """A point's outcome as an executor reports it."""

    point: Any
    outcome: dict[str, Any]
    worker: str


# ----------------------------------------------------------------------------- local processes
@contextlib.contextmanager
def _environment(values: dict[str, str]) -> Iterator[None]:
    """Set environment variables for the processes started inside the block, then restore."""
    old = {k: os.environ.get(k) for k in values}
    os.environ.update(values)
    try:
        yield
    finally:
        for k, v in old.items():
            if v is None:
                os.environ.pop(k, None)
            else:
                os.environ[k] = v


def thread_environment(threads: int) -> dict[str, str]:
    """The environment of a worker with ``threads`` XLA threads and one BLAS thread
    (:mod:`isoscope.threads`; ``PJRT_NPROC`` is what XLA reads when it starts)."""
    return {
        "PJRT_NPROC": str(threads),
        "ISOSCOPE_XLA_THREADS": str(threads),
        "ISOSCOPE_BLAS_THREADS": "1",
        "OMP_NUM_THREADS": "1",
        "OPENBLAS_NUM_THREADS": "1",
        "MKL_NUM_THREADS": "1",
    }


class WorkerStartError(RuntimeError):
    """A worker process exited before it was ready (its own error is on stderr above)."""


class LocalWorkers:
    """``workers`` local processes (``python -m isoscope.sweep.worker``), each with ``threads``
    XLA threads and one BLAS thread.

    Use as a context manager; :meth:`run` yields each :class:`Finished` point as it completes.
    A worker that dies while measuring fails that point and is replaced; one that dies before
    it is ready stops the sweep (:class:`WorkerStartError`), since every replacement would too.
    """

    def __init__(self, workers: int, threads: int | None = None):
        self.workers = workers
        self.threads = worker_threads(workers) if threads is None else threads
        self.procs: dict[int, tuple[Any, subprocess.Popen]] = {}

    def describe(self) -> str:
        return (
            f"local: {self.workers} worker process{'es' if self.workers > 1 else ''} x "
            f"{self.threads} XLA thread{'s' if self.threads > 1 else ''}, 1 BLAS thread"
        )

    def __enter__(self) -> LocalWorkers:
        try:
            for i in range(self.workers):
                self._start(i)
            for i in range(self.workers):
                self._ready(i)
        except BaseException:
            self.__exit__()
            raise
        return self

    def __exit__(self, *exc) -> None:
        for conn, _ in self.procs.values():
            with contextlib.suppress(OSError):
                conn.send(None)
            conn.close()
        deadline = time.monotonic() + 5.0
        for _, proc in self.procs.values():
            try:
                proc.wait(max(0.0, deadline - time.monotonic()))
            except subprocess.TimeoutExpired:
                proc.kill()
                proc.wait()
        self.procs.clear()

    def _start(self, slot: int) -> None:
        mine, theirs = socket.socketpair()
        fd = theirs.fileno()
        env = {**os.environ, **thread_environment(self.threads)}
        proc = subprocess.Popen(
            [sys.executable, "-m", "isoscope.sweep.worker", str(fd), str(os.getpid())],
            pass_fds=[fd],
            env=env,
            stdin=subprocess.DEVNULL,
        )
        theirs.close()
        self.procs[slot] = (Connection(mine.detach()), proc)

    def _ready(self, slot: int) -> None:
        conn, proc = self.procs[slot]
        try:
            hello = conn.recv()
        except (EOFError, OSError):
            hello = None
        if hello != "ready":
            code = proc.wait()
            raise WorkerStartError(
                f"a sweep worker exited before it was ready (exit code {code}); "
                "its error is printed above"
            )

    def run(self, points, source: str | None) -> Iterator[Finished]:
        """Run every point; yields as each finishes (in completion order)."""
        schedule = Schedule(points)
        busy: dict[int, Any] = {}

        def feed(slot: int) -> None:
            point = schedule.take(slot)
            if point is not None:
                self.procs[slot][0].send((point.spec.to_dict(), source))
                busy[slot] = point

        for slot in list(self.procs):
            feed(slot)
        while busy:
            waiting = {self.procs[s][0]: s for s in busy}
            for ready in wait_for(list(waiting)):
                slot = waiting[ready]
                conn, proc = self.procs[slot]
                try:
                    outcome = conn.recv()
                except (EOFError, OSError):
                    code = proc.wait()
                    outcome = {
                        "status": "failed",
                        "seconds": None,
                        "error": f"the worker process died (exit code {code}) while "
                        "measuring this point (out of memory, or killed)",
                    }
                    conn.close()
                    self._start(slot)
                    self._ready(slot)
                point = busy.pop(slot)
                yield Finished(point, outcome, f"worker {slot}")
                feed(slot)


# ----------------------------------------------------------------------------- Dask
def _dask():
    try:
        import distributed
    except ImportError:
        raise InputError(
            "--scheduler needs Dask's distributed package, which is not installed",
            expected="pip install 'isoscope[cluster]'",
            hint="or run without --scheduler to use local worker processes",
        ) from None
    return distributed


class DaskWorkers:
    """The sweep's points as tasks on a Dask ``distributed`` cluster.

    Args:
      address: a scheduler address (``tcp://host:8786``) or ``"local"`` to start a
        ``LocalCluster`` of ``workers`` processes on 127.0.0.1, each with ``cores // workers``
        XLA threads (its dashboard address is printed).
      workers: processes of the local cluster.
      timeout: seconds to wait for the scheduler to answer.

    Raises (on entering):
      InputError: distributed is not installed, or the scheduler does not answer.
    """

    def __init__(self, address: str, workers: int, timeout: float = 10.0):
        self.address, self.workers, self.timeout = address, workers, timeout
        self.cluster: Any = None
        self.client: Any = None
        self.dashboard: str | None = None

    def describe(self) -> str:
        if self.address == "local":
            return (
                f"dask LocalCluster on 127.0.0.1: {self.workers} worker process"
                f"{'es' if self.workers > 1 else ''} x {worker_threads(self.workers)} XLA "
                "threads"
            )
        return f"dask scheduler {self.address}"

    def __enter__(self) -> DaskWorkers:
        distributed = _dask()
        import logging

        logging.getLogger("distributed").setLevel(logging.ERROR)
        try:
            if self.address == "local":
                with _environment(thread_environment(worker_threads(self.workers))):
                    self.cluster = distributed.LocalCluster(
                        n_workers=self.workers,
                        threads_per_worker=1,
                        processes=True,
                        host="127.0.0.1",
                        dashboard_address="127.0.0.1:0",
                        silence_logs=50,
                    )
                self.client = distributed.Client(self.cluster, timeout=self.timeout)
            else:
                self.client = distributed.Client(self.address, timeout=self.timeout)
        except (OSError, TimeoutError, ValueError) as e:
            self.__exit__()
            raise InputError(
                f"the Dask scheduler {self.address!r} does not answer ({e})",
                expected="the address of a running scheduler, e.g. tcp://10.0.0.5:8786, or 'local'",
                hint="check the address and that the scheduler runs and is "
                "reachable from here; nothing was written",
            ) from None
        with contextlib.suppress(Exception):
            self.dashboard = self.client.dashboard_link
        return self

    def __exit__(self, *exc) -> None:
        for thing in (self.client, self.cluster):
            if thing is not None:
                with contextlib.suppress(Exception):
                    thing.close()
        self.client = self.cluster = None

    def run(self, points, source: str | None) -> Iterator[Finished]:
        distributed = _dask()
        schedule = Schedule(points)
        order = []
        while (p := schedule.take("dask")) is not None:
            order.append(p)
        futures = {}
        for rank, p in enumerate(order):
            f = self.client.submit(
                measure_point,
                p.spec.to_dict(),
                source,
                pure=False,
                priority=len(order) - rank,
                key=f"isoscope-point-{p.key[:20]}-{os.getpid()}-{time.monotonic_ns()}",
            )
            futures[f] = p
        for f in distributed.as_completed(futures):
            p = futures.pop(f)
            try:
                outcome = f.result()
            except Exception as e:  # the task could not run (a worker died repeatedly, ...)
                outcome = {
                    "status": "failed",
                    "seconds": None,
                    "error": f"the cluster could not run this point: {type(e).__name__}: {e}",
                }
            yield Finished(p, outcome, "dask")


def executor(workers: int, scheduler: str | None) -> Any:
    """The executor for ``--workers`` and ``--scheduler``."""
    if scheduler is None:
        return LocalWorkers(workers)
    return DaskWorkers(scheduler, workers)
