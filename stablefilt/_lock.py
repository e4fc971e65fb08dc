"""The lock of a run directory: one writer at a time.

A run takes the lock by creating ``<out>/.lock`` with ``O_CREAT | O_EXCL``
(atomic on local file systems: of two runs racing, exactly one creates it)
and writes its process id into it; the lock is removed when the run ends,
however it ends. A lock whose process no longer runs (the run was killed) is
stale: ``--resume`` takes it over and says so; a new run refuses and says how
to clear it, since the folder holds an unfinished run.
"""

from __future__ import annotations

import contextlib
import os

from ._errors import RunError

LOCK = ".lock"


def lock_path(out: str) -> str:
    return os.path.join(out, LOCK)


def _holder(path: str):
    """The process id in a lock file; 0 when it is empty or unreadable (a
    run that is creating it right now), None when the file is gone."""
    try:
        with open(path, encoding="ascii", errors="replace") as fh:
            text = fh.read().strip()
    except (FileNotFoundError, NotADirectoryError):
        return None
    except OSError:
        return 0
    return int(text) if text.isdigit() else 0


def _alive(pid: int) -> bool:
    if pid <= 0:
        return True  # unknown holder: assume a run is creating the lock
    try:
        os.kill(pid, 0)
    except ProcessLookupError:
        return False
    except PermissionError:  # exists, owned by someone else
        return True
    except OSError:
        return True
    return True


def _busy(out: str, path: str, pid: int) -> RunError:
    who = f"process {pid}" if pid > 0 else "a process that is starting"
    return RunError(f"run directory {out!r} is being written by another run ({who}, lock file {path!r}); wait for it "
                    "to finish or choose another --out.")


def check_unlocked(out: str, resume: bool) -> None:
    """Refuse early, before any work, when a live run holds ``out``; a stale
    lock refuses a new run (not ``--resume``). Changes nothing."""
    path = lock_path(out)
    pid = _holder(path)
    if pid is None:
        return
    if _alive(pid):
        raise _busy(out, path, pid)
    if not resume:
        raise RunError(f"run directory {out!r} holds a lock left by process {pid}, which is no longer running "
                       f"(a killed run); continue it with --resume, or delete {path!r} to start over.")


def _create(path: str) -> bool:
    try:
        fd = os.open(path, os.O_CREAT | os.O_EXCL | os.O_WRONLY, 0o644)
    except FileExistsError:
        return False
    with os.fdopen(fd, "w", encoding="ascii") as fh:
        fh.write(f"{os.getpid()}\n")
    return True


def _take_over(out: str, path: str, pid: int) -> bool:
    """Move a stale lock of ``pid`` aside; False when another run got there
    first (its fresh lock is put back, never removed)."""
    aside = f"{path}.stale.{os.getpid()}"
    try:
        os.rename(path, aside)
    except FileNotFoundError:
        return True
    if _holder(aside) == pid:
        os.unlink(aside)
        return True
    try:  # we moved someone's fresh lock: put it back without overwriting
        os.link(aside, path)
    except FileExistsError:
        pass
    os.unlink(aside)
    return False


@contextlib.contextmanager
def run_lock(out: str, *, resume: bool = False, note=None):
    """Hold the lock of run directory ``out`` (which must exist) for the
    ``with`` block. ``note(message)`` hears about a stale lock taken over.

    Raises:
      RunError: another live run holds it, or a stale lock blocks a new run.
    """
    path = lock_path(out)
    for _ in range(5):
        if _create(path):
            break
        pid = _holder(path)
        if pid is None:
            continue  # released between our two looks: try again
        if _alive(pid):
            raise _busy(out, path, pid)
        if not resume:
            check_unlocked(out, resume)
        if not _take_over(out, path, pid):
            raise _busy(out, path, _holder(path) or 0)
        if note is not None:
            note(f"took over the lock of {out!r} left by process {pid}, which is no longer running")
    else:
        raise _busy(out, path, _holder(path) or 0)
    try:
        yield path
    finally:
        if _holder(path) == os.getpid():
            with contextlib.suppress(OSError):
                os.unlink(path)
