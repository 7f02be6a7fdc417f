"""A local sweep worker: ``python -m isoscope.sweep.worker FD PARENT_PID``.

Started by :class:`isoscope.sweep.execute.LocalWorkers` as a fresh interpreter (so a user's
script is never re-imported in it, and its thread environment is set before JAX starts).  It
talks to the coordinator over the socket ``FD`` with ``multiprocessing.connection`` messages:
it sends ``"ready"`` once isoscope is imported, then for each ``(spec_data, source)`` received
it sends :func:`~isoscope.sweep.execute.measure_point`'s outcome; ``None`` or the end of the
connection stops it.  On Linux it dies with the coordinator (``PR_SET_PDEATHSIG``).
"""

from __future__ import annotations

import os
import signal
import sys


def _die_with_parent(parent: int) -> bool:
    """Ask for SIGKILL when the parent dies (Linux); False if the parent is already gone."""
    if sys.platform.startswith("linux"):
        import ctypes
        import ctypes.util

        try:
            libc = ctypes.CDLL(ctypes.util.find_library("c") or "libc.so.6", use_errno=True)
            libc.prctl(1, signal.SIGKILL, 0, 0, 0)  # PR_SET_PDEATHSIG = 1
        except (OSError, AttributeError):
            pass
    return os.getppid() == parent


def main(argv: list[str]) -> int:
    """The worker loop (see the module docstring)."""
    from multiprocessing.connection import Connection

    fd, parent = int(argv[0]), int(argv[1])
    signal.signal(signal.SIGINT, signal.SIG_IGN)  # Ctrl-C is the coordinator's to handle
    conn = Connection(fd)
    if not _die_with_parent(parent):
        return 0
    from isoscope.sweep.execute import measure_point

    conn.send("ready")
    while True:
        try:
            task = conn.recv()
        except (EOFError, OSError):
            return 0
        if task is None:
            return 0
        try:
            conn.send(measure_point(*task))
        except (BrokenPipeError, OSError):
            return 0


if __name__ == "__main__":
    sys.exit(main(sys.argv[1:]))
