"""The sweep store: one SQLite file (standard library ``sqlite3``, WAL mode), one row per point.

Schema ``isoscope.sweep/1``::

    meta(key TEXT PRIMARY KEY, value TEXT)        schema, created, isoscope version, glossary
    runs(id, started, finished, grid_file, grid_text, executor, computed, skipped, failed,
         status 'running' | 'finished' | 'interrupted' | 'killed')
    points(id, point_key UNIQUE, name, status 'done' | 'failed', error, seed TEXT,
           point_values JSON, spec JSON, versions JSON, result JSON, seconds, run_id, finished)
    settings(point_id, key, value)                every dotted spec key of the point's spec
    numbers(point_id, name, value)                every scalar of result.json under its dotted
                                                  name: score.isometry, measured.log_s.std, ...

A point is written in one transaction (its ``points`` row, its settings and numbers), so a
kill at any instant leaves each point either wholly stored or absent; ``point_key`` is unique,
so nothing is stored twice.  ``synchronous = FULL``: a committed point survives a power cut
too.  Integers beyond SQLite's 64-bit range (a seed up to 2^64 - 1) are stored as text.

Opening never changes a file it refuses: a file that is not SQLite, a SQLite database without
isoscope's ``meta`` table, or one of another schema version is refused (exit 2) after a
read-only look.  A new store is built under a temporary name and renamed into place, so a
half-created store never exists under the user's name.  One sweep at a time writes a store:
:func:`lock` holds an exclusive ``flock`` on ``FILE.lock`` beside it (removed on exit)
and a second sweep on the same store is refused; readers (``isoscope show``) never wait.

Example queries (any SQLite client)::

    SELECT s.value AS sigma_w, n.value AS isometry FROM points p
      JOIN settings s ON s.point_id = p.id AND s.key = 'init.sigma_w'
      JOIN numbers n ON n.point_id = p.id AND n.name = 'score.isometry';
"""

from __future__ import annotations

import contextlib
import dataclasses
import fcntl
import json
import math
import os
import sqlite3
import time
from collections.abc import Iterator
from pathlib import Path
from typing import Any

from isoscope.errors import InputError

__all__ = [
    "SCHEMA",
    "Store",
    "StoredPoint",
    "check_store",
    "flat_numbers",
    "lock",
    "stored_statuses",
]

SCHEMA = "isoscope.sweep/1"
_HEADER = b"SQLite format 3\x00"
_INT64 = 2**63

_TABLES = """
CREATE TABLE meta (key TEXT PRIMARY KEY, value TEXT NOT NULL);
CREATE TABLE runs (
    id INTEGER PRIMARY KEY, started TEXT NOT NULL, finished TEXT, grid_file TEXT,
    grid_text TEXT, executor TEXT, computed INTEGER, skipped INTEGER, failed INTEGER,
    status TEXT NOT NULL);
CREATE TABLE points (
    id INTEGER PRIMARY KEY, point_key TEXT NOT NULL UNIQUE, name TEXT NOT NULL,
    status TEXT NOT NULL CHECK (status IN ('done', 'failed')), error TEXT, seed TEXT NOT NULL,
    point_values TEXT NOT NULL, spec TEXT NOT NULL, versions TEXT, result TEXT, seconds REAL,
    run_id INTEGER REFERENCES runs(id), finished TEXT NOT NULL);
CREATE TABLE settings (
    point_id INTEGER NOT NULL REFERENCES points(id) ON DELETE CASCADE, key TEXT NOT NULL,
    value, PRIMARY KEY (point_id, key));
CREATE TABLE numbers (
    point_id INTEGER NOT NULL REFERENCES points(id) ON DELETE CASCADE, name TEXT NOT NULL,
    value, PRIMARY KEY (point_id, name));
CREATE INDEX numbers_by_name ON numbers(name);
CREATE INDEX settings_by_key ON settings(key);
"""


@dataclasses.dataclass(frozen=True)
class StoredPoint:
    """One row of the store, as :meth:`Store.points` returns it.

    Attributes:
      key: the point's identity (:func:`isoscope.sweep.grid.point_key`).
      name: its label.
      status: ``"done"`` or ``"failed"``.
      error: the failure message (failed points).
      settings: every dotted spec key and its value.
      values: the keys its grid varied.
      numbers: every scalar of its result under the ``result.json`` names (empty if failed).
      seconds: wall time of the analysis.
    """

    key: str
    name: str
    status: str
    error: str | None
    settings: dict[str, Any]
    values: dict[str, Any]
    numbers: dict[str, Any]
    seconds: float | None


def _now() -> str:
    return time.strftime("%Y-%m-%dT%H:%M:%S%z")


def _sql(v: Any) -> Any:
    """A value SQLite can hold: bools as 0/1, integers beyond 64 bits as text, NaN as NULL."""
    if isinstance(v, bool):
        return int(v)
    if isinstance(v, int) and not -_INT64 <= v < _INT64:
        return str(v)
    if isinstance(v, float) and not math.isfinite(v):
        return None
    return v


def flat_numbers(result: dict[str, Any], prefix: str = "") -> dict[str, Any]:
    """Every scalar of a ``result.json`` mapping under its dotted name (``score.isometry``,
    ``measured.log_s.std``, ``agreement.ks``, ...).  Lists (densities, per-layer arrays), the
    spec (kept as settings), the environment (kept as versions) and the glossary are left out."""
    out: dict[str, Any] = {}
    for k, v in result.items():
        if not prefix and k in ("spec", "environment", "glossary", "schema", "name", "warnings"):
            continue
        name = f"{prefix}{k}"
        if isinstance(v, dict):
            out.update(flat_numbers(v, name + "."))
        elif not isinstance(v, list):
            out[name] = v
    return out


def _refuse(path: Path, message: str, hint: str) -> InputError:
    return InputError(
        f"store {str(path)!r} {message}",
        expected=f"an isoscope sweep store "
        f"(schema {SCHEMA}) or a path where a new one can be created",
        hint=hint,
    )


def check_store(path: str | Path) -> bool:
    """Whether ``path`` is a store of this schema (True), or absent or an empty file (False,
    a new store will be made there); anything else raises, after a read-only look.

    Raises:
      InputError: a folder, a file that is not SQLite, a SQLite database that is not a sweep
        store, or a store of another schema version (never modified).
    """
    path = Path(path)
    if path.is_dir():
        raise _refuse(path, "is a folder", "name a file, e.g. --store sweep.sqlite")
    if not path.exists():
        if not path.parent.is_dir():
            raise _refuse(
                path,
                f"is in {str(path.parent)!r}, which does not exist",
                "create the folder first or choose another path",
            )
        if not os.access(path.parent, os.W_OK | os.X_OK):
            raise _refuse(
                path,
                f"cannot be created: {str(path.parent)!r} is not writable",
                "choose a folder you may write",
            )
        return False
    try:
        with open(path, "rb") as f:
            head = f.read(len(_HEADER))
    except OSError as e:
        raise _refuse(
            path, f"cannot be read ({e.strerror or e})", "check its permissions"
        ) from None
    if head == b"":
        return False
    if head != _HEADER:
        raise _refuse(
            path,
            "is not an SQLite database",
            "choose another --store path; isoscope never writes into a file it did not create",
        )
    try:
        con = sqlite3.connect(f"{path.resolve().as_uri()}?mode=ro", uri=True)
        try:
            rows = dict(
                con.execute(
                    "SELECT key, value FROM meta WHERE key IN ('schema', 'isoscope')"
                ).fetchall()
            )
        finally:
            con.close()
    except sqlite3.DatabaseError as e:
        raise _refuse(
            path,
            f"is an SQLite database but not an isoscope sweep store ({e})",
            "choose another --store path",
        ) from None
    schema = rows.get("schema")
    if schema != SCHEMA:
        written = f" by isoscope {rows['isoscope']}" if "isoscope" in rows else ""
        raise _refuse(
            path,
            f"was written with schema {schema!r}{written}; this isoscope reads {SCHEMA!r} only",
            "use the isoscope version that wrote it, or a new "
            "--store path (the store was not changed)",
        )
    return True


def _create(path: Path) -> None:
    """Build an empty store under a temporary name and rename it into place."""
    from isoscope import __version__
    from isoscope.report import GLOSSARY

    tmp = path.with_name(f".{path.name}.new-{os.getpid()}")
    try:
        con = sqlite3.connect(tmp)
        try:
            con.executescript(_TABLES)
            con.executemany(
                "INSERT INTO meta VALUES (?, ?)",
                [
                    ("schema", SCHEMA),
                    ("created", _now()),
                    ("isoscope", __version__),
                    ("glossary", json.dumps(GLOSSARY)),
                ],
            )
            con.commit()
            con.execute("PRAGMA journal_mode = WAL")
        finally:
            con.close()
        with open(tmp, "rb+") as f:
            os.fsync(f.fileno())
        os.replace(tmp, path)
    finally:
        if tmp.exists():
            tmp.unlink()


def stored_statuses(path: str | Path) -> dict[str, str]:
    """``{point_key: status}`` of the store at ``path`` (empty when there is none yet)."""
    if not check_store(path):
        return {}
    with Store.reader(path) as store:
        return store.statuses()


class Store:
    """A sweep store, opened for reading (:meth:`reader`) or writing (:meth:`writer`)."""

    def __init__(self, path: Path, con: sqlite3.Connection):
        self.path, self.con = path, con

    # ---------------------------------------------------------------- opening
    @classmethod
    @contextlib.contextmanager
    def writer(cls, path: str | Path) -> Iterator[Store]:
        """Open the store at ``path`` for writing, creating it if absent.  The caller holds
        :func:`lock` on the path (one sweep at a time).

        Raises:
          InputError: the path is refused (:func:`check_store`).
        """
        path = Path(path)
        if not check_store(path):
            _create(path)
        con = sqlite3.connect(path, isolation_level=None)
        try:
            con.execute("PRAGMA journal_mode = WAL")
            con.execute("PRAGMA synchronous = FULL")
            con.execute("PRAGMA foreign_keys = ON")
            yield cls(path, con)
        finally:
            con.close()

    @classmethod
    @contextlib.contextmanager
    def reader(cls, path: str | Path) -> Iterator[Store]:
        """Open an existing store read-only (never waits for a running sweep).

        Raises:
          InputError: no store at ``path``, or one that is refused (:func:`check_store`).
        """
        path = Path(path)
        if not check_store(path):
            raise _refuse(
                path,
                "does not exist or is empty",
                "give the --store file of a sweep (`isoscope sweep GRID.toml --store FILE.sqlite`)",
            )
        con = sqlite3.connect(f"{path.resolve().as_uri()}?mode=ro", uri=True)
        try:
            yield cls(path, con)
        finally:
            con.close()

    # ---------------------------------------------------------------- runs
    def begin_run(self, grid_file: str | None, grid_text: str, executor: str) -> int:
        """Record the start of a sweep; returns its run id.  A run still marked ``running``
        was killed outright (the caller holds the store's lock, so no other sweep is writing):
        it is marked ``killed``."""
        with self._transaction():
            self.con.execute("UPDATE runs SET status = 'killed' WHERE status = 'running'")
            cur = self.con.execute(
                "INSERT INTO runs (started, grid_file, grid_text, executor, status) "
                "VALUES (?, ?, ?, ?, 'running')",
                (_now(), grid_file, grid_text, executor),
            )
        assert cur.lastrowid is not None, "an INSERT sets lastrowid"
        return int(cur.lastrowid)

    def end_run(self, run: int, computed: int, skipped: int, failed: int, status: str) -> None:
        """Record how a sweep ended (``finished`` or ``interrupted``) and its counts."""
        with self._transaction():
            self.con.execute(
                "UPDATE runs SET finished = ?, computed = ?, skipped = ?, failed = ?, "
                "status = ? WHERE id = ?",
                (_now(), computed, skipped, failed, status, run),
            )

    # ---------------------------------------------------------------- points
    def statuses(self) -> dict[str, str]:
        """``{point_key: status}`` of every stored point."""
        return dict(self.con.execute("SELECT point_key, status FROM points").fetchall())

    def record(self, point, outcome: dict[str, Any], run: int) -> None:
        """Store one finished point (a :class:`~isoscope.sweep.grid.Point`) and its outcome in one
        transaction; a failed point already stored is replaced (``--retry-failed``), a done one
        never is."""
        from isoscope.sweep.grid import flat_spec

        result = outcome.get("result")
        settings = flat_spec(point.spec)
        with self._transaction():
            old = self.con.execute(
                "SELECT id, status FROM points WHERE point_key = ?", (point.key,)
            ).fetchone()
            if old is not None:
                if old[1] == "done":
                    return
                self.con.execute("DELETE FROM points WHERE id = ?", (old[0],))
            cur = self.con.execute(
                "INSERT INTO points (point_key, name, status, error, seed, point_values, spec, "
                "versions, result, seconds, run_id, finished) VALUES (?,?,?,?,?,?,?,?,?,?,?,?)",
                (
                    point.key,
                    point.spec.name,
                    outcome["status"],
                    outcome.get("error"),
                    str(point.spec.analysis.seed),
                    json.dumps(point.values),
                    json.dumps(point.spec.to_dict()),
                    None if result is None else json.dumps(result.get("environment")),
                    None if result is None else json.dumps(result, allow_nan=False),
                    outcome.get("seconds"),
                    run,
                    _now(),
                ),
            )
            pid = cur.lastrowid
            self.con.executemany(
                "INSERT INTO settings VALUES (?, ?, ?)",
                [(pid, k, _sql(v)) for k, v in settings.items()],
            )
            if result is not None:
                self.con.executemany(
                    "INSERT INTO numbers VALUES (?, ?, ?)",
                    [(pid, k, _sql(v)) for k, v in flat_numbers(result).items()],
                )

    def points(self) -> list[StoredPoint]:
        """Every stored point with its settings and numbers, in the order they were stored."""
        settings: dict[int, dict[str, Any]] = {}
        for pid, k, v in self.con.execute("SELECT point_id, key, value FROM settings"):
            settings.setdefault(pid, {})[k] = v
        numbers: dict[int, dict[str, Any]] = {}
        for pid, k, v in self.con.execute("SELECT point_id, name, value FROM numbers"):
            numbers.setdefault(pid, {})[k] = v
        rows = self.con.execute(
            "SELECT id, point_key, name, status, error, point_values, seconds "
            "FROM points ORDER BY id"
        ).fetchall()
        return [
            StoredPoint(
                key,
                name,
                status,
                error,
                settings.get(pid, {}),
                json.loads(values),
                numbers.get(pid, {}),
                seconds,
            )
            for pid, key, name, status, error, values, seconds in rows
        ]

    def result(self, key: str) -> dict[str, Any] | None:
        """The full ``result.json`` of a stored point (without the glossary), or ``None``."""
        row = self.con.execute("SELECT result FROM points WHERE point_key = ?", (key,)).fetchone()
        return None if row is None or row[0] is None else json.loads(row[0])

    def meta(self) -> dict[str, str]:
        """The ``meta`` table (schema, created, isoscope version, glossary as JSON)."""
        return dict(self.con.execute("SELECT key, value FROM meta").fetchall())

    def runs(self) -> list[dict[str, Any]]:
        """Every recorded sweep of this store, oldest first."""
        cur = self.con.execute(
            "SELECT id, started, finished, grid_file, executor, computed, "
            "skipped, failed, status FROM runs ORDER BY id"
        )
        names = [d[0] for d in cur.description]
        return [dict(zip(names, row)) for row in cur.fetchall()]

    @contextlib.contextmanager
    def _transaction(self) -> Iterator[None]:
        self.con.execute("BEGIN IMMEDIATE")
        try:
            yield
        except BaseException:
            self.con.execute("ROLLBACK")
            raise
        self.con.execute("COMMIT")


@contextlib.contextmanager
def lock(path: str | Path) -> Iterator[None]:
    """Hold ``flock(LOCK_EX)`` on ``path.lock`` for the block, refusing (not waiting) when
    another sweep holds it.  The lock file is removed on exit; a holder checks after locking
    that the file it locked is still the one at the path (another holder may have removed it
    in between), and locks afresh otherwise."""
    path = Path(path)
    lock = path.with_name(path.name + ".lock")
    while True:
        try:
            fd = os.open(lock, os.O_RDWR | os.O_CREAT, 0o644)
        except OSError as e:
            raise _refuse(
                path,
                f"cannot be locked ({lock}: {e.strerror or e})",
                "choose a folder you may write",
            ) from None
        try:
            fcntl.flock(fd, fcntl.LOCK_EX | fcntl.LOCK_NB)
        except BlockingIOError:
            holder = os.pread(fd, 64, 0).decode("ascii", "replace").strip() or "another process"
            os.close(fd)
            raise InputError(
                f"store {str(path)!r} is being written by another sweep ({holder})",
                expected="one sweep at a time per store",
                hint="wait for it to finish, or sweep into another --store; "
                "`isoscope show` can read the store meanwhile",
            ) from None
        try:
            same = os.stat(lock).st_ino == os.fstat(fd).st_ino
        except FileNotFoundError:
            same = False
        if same:
            break
        os.close(fd)
    try:
        os.ftruncate(fd, 0)
        os.pwrite(fd, f"pid {os.getpid()}".encode("ascii"), 0)
        yield
    finally:
        with contextlib.suppress(FileNotFoundError):
            os.unlink(lock)
        os.close(fd)
