"""How many threads the linear-algebra libraries under isoscope use.

Two thread pools share the cores during a measurement: XLA's CPU runtime (matrix products
of the Jacobian pass) and the BLAS/LAPACK library that JAX's CPU kernels for QR, SVD and
Householder products call (jaxlib binds LAPACK through ``scipy.linalg.cython_lapack``, so
it is SciPy's OpenBLAS).  LAPACK is called from inside XLA's worker threads; if OpenBLAS
then starts its own pool, the process runs more busy threads than cores, and OpenBLAS's
workers spin while they wait.  On a loaded 2-core machine that turned a 512 x 512 QR from
31 ms into 4.6 s; with OpenBLAS held to one thread it stayed at 31 ms.

The policy (:func:`thread_policy`): BLAS/LAPACK one thread, XLA its own default (every core),
each overridable by an environment variable:

* ``ISOSCOPE_BLAS_THREADS`` -- threads for BLAS/LAPACK, set at run time through
  ``threadpoolctl`` (which calls OpenBLAS's or MKL's own setter) for the duration of
  :func:`limited_blas`;
* ``ISOSCOPE_XLA_THREADS`` -- threads for XLA's CPU runtime.  XLA reads its thread count
  once, when JAX's CPU backend starts, from ``PJRT_NPROC`` (honoured by jaxlib 0.10; the
  ``XLA_FLAGS`` options ``--xla_cpu_multi_thread_eigen=false`` and
  ``intra_op_parallelism_threads`` no longer change the thread count there).  Importing
  isoscope sets ``PJRT_NPROC`` from this variable (:func:`configure_xla`) unless it is
  already set; it takes effect when isoscope is imported before the process's first JAX
  computation.
"""

from __future__ import annotations

import contextlib
import os
from collections.abc import Iterator, Mapping
from typing import NamedTuple

from isoscope.errors import InputError

__all__ = ["ThreadPolicy", "thread_policy", "configure_xla", "limited_blas", "BLAS_ENV", "XLA_ENV"]

BLAS_ENV = "ISOSCOPE_BLAS_THREADS"
XLA_ENV = "ISOSCOPE_XLA_THREADS"
_XLA_COUNT_ENV = "PJRT_NPROC"  # read by XLA's CPU client when the backend starts


class ThreadPolicy(NamedTuple):
    """Thread counts for one process.

    Attributes:
      blas: threads for BLAS/LAPACK (OpenBLAS, MKL, ...).
      xla: threads for XLA's CPU runtime, ``None`` for XLA's default (every core).
      source: where the numbers came from, for the report.
    """

    blas: int
    xla: int | None
    source: str


def _count(environ: Mapping[str, str], name: str) -> int | None:
    raw = environ.get(name)
    if raw is None or raw.strip() == "":
        return None
    try:
        value = int(raw.strip())
    except ValueError:
        value = 0
    if value < 1:
        raise InputError(
            f"environment variable {name} = {raw!r} is not a thread count",
            expected="a whole number >= 1",
            key=name,
            hint=f"unset {name} to use isoscope's default",
        )
    return value


def thread_policy(environ: Mapping[str, str] | None = None) -> ThreadPolicy:
    """The thread policy: ``blas = 1`` and ``xla = None`` (XLA's default) unless overridden.

    One BLAS thread, because JAX calls LAPACK from inside XLA's own worker threads: a second
    pool on top oversubscribes the cores (see the module docstring for the measured cost).
    The overrides are ``ISOSCOPE_BLAS_THREADS`` and ``ISOSCOPE_XLA_THREADS`` (whole numbers
    >= 1).  A choice of practice, measured on this project's benchmarks, with no source.

    Args:
      environ: the environment to read (default ``os.environ``).

    Raises:
      InputError: a variable is set to something other than a whole number >= 1.
    """
    env = os.environ if environ is None else environ
    blas, xla = _count(env, BLAS_ENV), _count(env, XLA_ENV)
    set_by = [name for name, v in ((BLAS_ENV, blas), (XLA_ENV, xla)) if v is not None]
    source = "default" if not set_by else "default, with " + ", ".join(set_by)
    return ThreadPolicy(blas=1 if blas is None else blas, xla=xla, source=source)


def configure_xla(environ: dict[str, str] | None = None) -> int | None:
    """Set XLA's CPU thread count (``PJRT_NPROC``) from ``ISOSCOPE_XLA_THREADS``.

    Called by ``import isoscope`` before JAX is imported.  Leaves an explicit ``PJRT_NPROC``
    alone, and does nothing for a malformed value (:func:`thread_policy` reports it as an
    :class:`~isoscope.errors.InputError` when an analysis starts).

    Returns:
      The thread count written, or ``None``.
    """
    env = os.environ if environ is None else environ
    try:
        xla = thread_policy(env).xla
    except ValueError:
        return None
    if xla is None or _XLA_COUNT_ENV in env:
        return None
    env[_XLA_COUNT_ENV] = str(xla)
    return xla


@contextlib.contextmanager
def limited_blas(policy: ThreadPolicy | None = None) -> Iterator[ThreadPolicy]:
    """Hold BLAS/LAPACK to ``policy.blas`` threads inside the block (``threadpoolctl``).

    SciPy's LAPACK is loaded first (JAX's CPU kernels call it), so the limit reaches it even
    before JAX's first QR or SVD; on exit the previous counts are restored.
    """
    import scipy.linalg  # noqa: F401  (loads SciPy's BLAS/LAPACK so the limit applies to it)
    from threadpoolctl import threadpool_limits

    policy = thread_policy() if policy is None else policy
    with threadpool_limits(limits=policy.blas, user_api="blas"):
        yield policy
