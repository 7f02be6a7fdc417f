"""Sweeps: grids of designs measured in parallel into a durable SQLite store.

* :mod:`isoscope.sweep.grid` -- grid files (a spec plus ``[grid]``), their points;
* :mod:`isoscope.sweep.store` -- the SQLite store (schema ``isoscope.sweep/1``), resumable;
* :mod:`isoscope.sweep.execute` -- the per-point task, its order, local processes and Dask;
* :mod:`isoscope.sweep.run` -- one sweep end to end (:func:`run_sweep`).
"""

from isoscope.sweep.grid import Grid, Point, load_grid, parse_grid
from isoscope.sweep.run import SweepSummary, run_sweep
from isoscope.sweep.store import SCHEMA, Store, check_store

__all__ = [
    "Grid",
    "Point",
    "load_grid",
    "parse_grid",
    "SweepSummary",
    "run_sweep",
    "SCHEMA",
    "Store",
    "check_store",
]
