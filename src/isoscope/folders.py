"""Output folders that survive a kill at any instant, and safe folder names.

Layout.  A result folder ``DIR`` is a symbolic link to a complete sibling folder
``.DIR.v-<pid>-<start>-<random>`` (``pid`` and ``start``, the process start time, name the
run that wrote it).  A run:

1. :func:`reserve` (before any computation): checks that ``DIR`` may be replaced (absent, an
   empty folder, or written by isoscope) and creates its own version folder next to it, which
   proves the parent is writable before the work starts;
2. writes its files into the version folder, then the marker ``.isoscope-output`` (the folder
   is complete only once the marker exists);
3. :meth:`Reservation.commit`: under an exclusive ``fcntl.flock`` on ``.DIR.lock`` it points a
   fresh temporary link at the version folder and renames that link over ``DIR``
   (``os.replace``, one atomic ``rename(2)``), then deletes the version ``DIR`` pointed at before
   and the version folders of runs that died (their pid is no longer alive).

Why this is safe under ``SIGKILL`` at any instant: ``DIR`` only ever changes by one
``rename(2)``, which POSIX makes atomic, from one link to another; a link is only ever pointed
at a folder that already holds its marker, and a version folder is deleted only after ``DIR``
stopped pointing at it.  So ``DIR`` always resolves to a complete result (the old or the new
one) or does not exist because no run ever finished.  Debris of a killed run is a version
folder or temporary link named with a dead pid; the next run into the same ``DIR`` removes it.
Two runs into one ``DIR`` take the lock in turn for the short switch (the later one wins);
neither fails.

A folder written by an older isoscope (a real directory holding the marker) is moved aside and
replaced by the link with ``renameat2(RENAME_EXCHANGE)`` where the kernel offers it (one atomic
swap); elsewhere by two renames, after which an interrupted swap is finished by the next run.

References: POSIX ``rename(2)`` (atomic replacement of the destination); Linux ``flock(2)``,
``renameat2(2)``.
"""

from __future__ import annotations

import ctypes
import ctypes.util
import errno
import fcntl
import hashlib
import os
import secrets
import shutil
import signal
import threading
import time
import unicodedata
from pathlib import Path

from isoscope.errors import InputError

__all__ = [
    "MARKER",
    "Reservation",
    "reserve",
    "safe_folder_name",
    "interrupted",
    "install_interrupt_flag",
    "committed",
    "glob_escape",
]

MARKER = ".isoscope-output"
_MAX_NAME_BYTES = 100  # leaves room for ".NAME.v-<pid>-<start>-<random>" within 255 bytes
_SAFE_PUNCT = set("-_.+ ()")

# Test hook: ISOSCOPE_TEST_PAUSE="step:seconds,step:seconds" sleeps at the named steps of a
# commit so that tests can kill the process there.  Unset in normal use.
_PAUSE_ENV = "ISOSCOPE_TEST_PAUSE"


def _pause(step: str) -> None:
    spec = os.environ.get(_PAUSE_ENV)
    if not spec:
        return
    for item in spec.split(","):
        name, _, seconds = item.partition(":")
        if name == step:
            time.sleep(float(seconds or 0))


# ----------------------------------------------------------------------------- interrupts
_INTERRUPTED = False


def _on_sigint(signum, frame):
    global _INTERRUPTED
    _INTERRUPTED = True
    raise KeyboardInterrupt


def install_interrupt_flag() -> None:
    """Route SIGINT through a handler that records it before raising KeyboardInterrupt.

    C extensions and finalizers can swallow a KeyboardInterrupt (an exception raised inside a
    ``__del__`` is printed as "ignored" and dropped); the recorded flag is checked again before
    a result folder is switched (:meth:`Reservation.commit`), so an interrupt always stops the
    run.  Only installable from the main thread.
    """
    signal.signal(signal.SIGINT, _on_sigint)


def interrupted() -> bool:
    """True once SIGINT arrived since :func:`install_interrupt_flag`."""
    return _INTERRUPTED


def _check_interrupt() -> None:
    if _INTERRUPTED:
        raise KeyboardInterrupt


def committed() -> tuple[Path, ...]:
    """The result folders this process has switched so far (for an honest interrupt message)."""
    return tuple(_COMMITTED)


class _sigint_held:
    """Hold SIGINT back (``pthread_sigmask``) inside the block; it is delivered on exit."""

    def __enter__(self):
        self.on = threading.current_thread() is threading.main_thread() and hasattr(
            signal, "pthread_sigmask"
        )
        if self.on:
            signal.pthread_sigmask(signal.SIG_BLOCK, {signal.SIGINT})

    def __exit__(self, *exc):
        if self.on:
            signal.pthread_sigmask(signal.SIG_UNBLOCK, {signal.SIGINT})
        return False


# ----------------------------------------------------------------------------- names
def safe_folder_name(label: str, fallback: str = "design") -> str:
    """A single, harmless path component derived from a design's label.

    Keeps letters and digits (any script, NFKC-normalised), spaces and ``- _ . + ( )``; every
    other character (``/``, ``\\``, NUL, control characters, markup ``< > & " '``, ...) becomes
    ``-``.  Leading dots and dashes are dropped (no hidden names, no ``..``, nothing read as an
    option).  When anything was changed (or the label is longer than 100 bytes of UTF-8), the
    kept text is cut to 91 bytes and ``-`` and the first 8 hex digits of the label's SHA-256
    are appended, so that two labels that differ only in removed characters do not share a
    folder; an empty kept text becomes ``fallback``.  The result is at most 100 bytes and a
    fixed point: the name of a folder it made maps to itself.

    Examples: ``"tanh-512"`` stays; ``"../../x"`` becomes ``"x-<hash>"``; ``"a/b"`` becomes
    ``"a-b-<hash>"``.
    """
    text = unicodedata.normalize("NFKC", label)
    kept = "".join(c if (c.isalnum() or c in _SAFE_PUNCT) else "-" for c in text)
    while "--" in kept:
        kept = kept.replace("--", "-")
    kept = kept.lstrip(".- ").rstrip(". ")
    if kept == label and len(kept.encode("utf-8")) <= _MAX_NAME_BYTES:
        return kept
    digest = hashlib.sha256(label.encode("utf-8", errors="surrogatepass")).hexdigest()[:8]
    raw = kept.encode("utf-8")[: _MAX_NAME_BYTES - 1 - len(digest)]
    kept = unicodedata.normalize("NFKC", raw.decode("utf-8", errors="ignore")).rstrip(".- ")
    return f"{kept}-{digest}" if kept else f"{fallback}-{digest}"


# ----------------------------------------------------------------------------- process identity
def _start_time(pid: int) -> str:
    """Process start time in clock ticks since boot (field 22 of /proc/PID/stat), or "0"."""
    try:
        with open(f"/proc/{pid}/stat", "rb") as f:
            stat = f.read().decode("ascii", "replace")
        return stat.rsplit(")", 1)[1].split()[19]
    except (OSError, IndexError):
        return "0"


def _alive(pid: int, start: str) -> bool:
    try:
        os.kill(pid, 0)
    except ProcessLookupError:
        return False
    except PermissionError:
        return True
    return start == "0" or _start_time(pid) in (start, "0")


_IN_FLIGHT: set[str] = set()  # version folders this process is still writing
_COMMITTED: list[Path] = []  # targets this process switched, in order


def _owner_id() -> str:
    return f"{os.getpid()}-{_start_time(os.getpid())}"


def _owner_of(name: str, prefix: str) -> tuple[int, str] | None:
    """(pid, start) encoded in ``prefix + "<pid>-<start>-<random>"``, or None."""
    parts = name[len(prefix) :].split("-")
    if len(parts) != 3 or not parts[0].isdigit() or not parts[1].isdigit():
        return None
    return int(parts[0]), parts[1]


# ----------------------------------------------------------------------------- the target
def _state(target: Path) -> str:
    """ "absent" | "link" (ours) | "legacy" (an isoscope directory) | "empty"; else InputError."""
    if target.is_symlink():
        dest = os.readlink(target)
        ours = os.sep not in dest and dest.startswith(f".{target.name}.v-")
        if ours and (
            (target.parent / dest / MARKER).exists() or not os.path.lexists(target.parent / dest)
        ):
            return "link"  # our link (dangling only if someone removed the version folder by hand)
        raise InputError(
            f"output path {str(target)!r} is a link to {dest!r}, which isoscope did not write",
            expected="a new folder, an empty one, or one isoscope wrote before",
            hint="choose another --out; isoscope never overwrites other files",
        )
    if not target.exists():
        return "absent"
    if not target.is_dir():
        raise InputError(
            f"output path {str(target)!r} exists and is not a folder",
            expected="a new or isoscope-written folder",
            hint="choose another --out",
        )
    try:
        entries = list(target.iterdir())
    except PermissionError:
        raise InputError(
            f"output folder {str(target)!r} cannot be read",
            expected="a folder you may write",
            hint="check its permissions or choose another --out",
        ) from None
    if not entries:
        return "empty"
    if (target / MARKER).exists():
        return "legacy"
    raise InputError(
        f"output folder {str(target)!r} is not empty and was not written by isoscope",
        expected="a new folder, an empty one, or one isoscope wrote before",
        hint="choose another --out; isoscope never overwrites other files",
    )


def _exchange(a: Path, b: Path) -> bool:
    """Atomically swap two paths with renameat2(RENAME_EXCHANGE); False where unsupported."""
    try:
        libc = ctypes.CDLL(ctypes.util.find_library("c") or None, use_errno=True)
        fn = libc.renameat2
    except (OSError, AttributeError):
        return False
    at_fdcwd, rename_exchange = -100, 2
    fn.argtypes = [ctypes.c_int, ctypes.c_char_p, ctypes.c_int, ctypes.c_char_p, ctypes.c_uint]
    if fn(at_fdcwd, os.fsencode(a), at_fdcwd, os.fsencode(b), rename_exchange) == 0:
        return True
    err = ctypes.get_errno()
    if err in (errno.EINVAL, errno.ENOSYS, errno.EOPNOTSUPP):
        return False
    raise OSError(err, os.strerror(err), str(a))


class Reservation:
    """A version folder being written for ``target``; see the module docstring.

    Attributes:
      target: the result path (absolute).
      folder: the version folder to write into.
    """

    def __init__(self, target: Path, folder: Path):
        self.target, self.folder = target, folder
        self._done = False

    def commit(self) -> Path:
        """Mark the version folder complete and switch ``target`` to it (atomic; see module).

        Raises KeyboardInterrupt, leaving ``target`` as it was, if SIGINT arrived during the run
        (even if the exception it raised was swallowed on the way).  From the last check to the
        switch SIGINT is held back, so an interrupt lands either before the switch (nothing
        changed) or after it (the new result is complete).
        """
        _pause("commit")
        _check_interrupt()
        (self.folder / MARKER).write_text(
            "written by isoscope; this folder is replaced on the next run\n"
        )
        os.chmod(self.folder, 0o755)
        t, parent = self.target, self.target.parent
        with open(parent / f".{t.name}.lock", "a+b") as lock:
            fcntl.flock(lock, fcntl.LOCK_EX)
            with _sigint_held():
                _check_interrupt()
                self._switch()
        return t

    def _switch(self) -> None:
        """The switch itself (lock held, SIGINT held back)."""
        t, parent = self.target, self.target.parent
        state = _state(t)
        old = parent / os.readlink(t) if state == "link" else None
        link = parent / f".{t.name}.l-{self.folder.name.split('.v-', 1)[1]}"
        os.symlink(self.folder.name, link)
        _pause("linked")
        if state in ("absent", "link"):
            os.replace(link, t)
        elif state == "empty":
            os.rmdir(t)
            os.replace(link, t)
        else:  # legacy real directory: swap it out, then keep it as a dead version folder
            if not _exchange(link, t):
                aside = parent / f".{t.name}.v-legacy-{secrets.token_hex(3)}"
                os.replace(t, aside)
                _pause("legacy-aside")
                os.replace(link, t)
                link = aside
            shutil.rmtree(link, ignore_errors=True)
        _pause("switched")
        self._done = True
        _IN_FLIGHT.discard(self.folder.name)
        _COMMITTED.append(t)
        if old is not None and old.name != self.folder.name:
            shutil.rmtree(old, ignore_errors=True)
        _sweep(t)

    def abort(self) -> None:
        """Remove the version folder (the run failed); ``target`` is untouched."""
        if not self._done:
            shutil.rmtree(self.folder, ignore_errors=True)
            _IN_FLIGHT.discard(self.folder.name)
            self._done = True


def _sweep(target: Path) -> None:
    """Remove version folders, temporary links and aside copies of dead runs (lock held)."""
    parent, name = target.parent, target.name
    current = os.readlink(target) if target.is_symlink() else None
    for prefix in (f".{name}.v-", f".{name}.l-"):
        for p in parent.glob(f"{glob_escape(prefix)}*"):
            if p.name == current or p.name in _IN_FLIGHT:
                continue
            owner = _owner_of(p.name, prefix)
            if owner is None:
                dead = p.name.startswith(f".{name}.v-legacy-")
            elif f"{owner[0]}-{owner[1]}" == _owner_id():
                dead = True  # ours and no longer in flight: left over from an earlier call
            else:
                dead = not _alive(*owner)
            if dead:
                if p.is_symlink() or p.is_file():
                    p.unlink(missing_ok=True)
                else:
                    shutil.rmtree(p, ignore_errors=True)


def glob_escape(text: str) -> str:
    """``text`` with the glob metacharacters ``* ? [`` escaped."""
    return "".join(f"[{c}]" if c in "*?[" else c for c in text)


def reserve(target: str | Path) -> Reservation:
    """Check that ``target`` may be (re)placed and create the version folder to write into.

    Done before any computation, so that an unwritable destination fails at once.

    Raises:
      InputError: ``target`` is empty, a file, a folder isoscope did not write, or its parent
        cannot be created or written (read-only, under a file, a virtual file system).
    """
    if str(target) == "":
        raise InputError(
            "--out is empty", expected="a folder path", hint="give a folder, e.g. --out results"
        )
    t = Path(os.path.abspath(os.fspath(target)))
    if t.name in ("", ".", ".."):
        raise InputError(
            f"output path {str(target)!r} has no folder name",
            expected="a folder path",
            hint="name a folder to create, e.g. --out results",
        )
    _state(t)
    try:
        t.parent.mkdir(parents=True, exist_ok=True)
        folder = t.parent / f".{t.name}.v-{_owner_id()}-{secrets.token_hex(4)}"
        folder.mkdir()
    except OSError as e:
        raise InputError(
            f"cannot create output folder {str(t)!r} ({e.strerror or e})",
            expected="a path in a folder you may write",
            hint="check the path and its permissions, or choose another --out",
        ) from None
    _IN_FLIGHT.add(folder.name)
    return Reservation(t, folder)
