"""Claiming an output before computing it, and saying plainly why the file system refused a write.

A run that writes ``out`` first creates the claim ``.<name>.claim`` beside it with ``O_CREAT | O_EXCL`` (atomic on
local file systems: of two runs, exactly one succeeds). The claim holds the owner's process id and start time, so a
later run can tell a live owner (refuse at once) from a dead one (a killed run: its claim and its temporary files
``.<name>.*`` are removed, and the new run says so). Without ``force`` an existing output is refused before any
computing; with ``force`` it is replaced whole at the end, never mixed. The claim is released when the run ends,
however it ends.
"""

from __future__ import annotations

import contextlib
import errno
import os
import shutil
import time
from pathlib import Path

from .exceptions import OutputError

__all__ = ["claim_output", "os_error_text"]

_HINTS = {
    errno.ENOSPC: "free some space or write to another disk (--out)",
    errno.EROFS: "the file system is read-only; choose another --out",
    errno.EDQUOT: "the disk quota is used up; free some space or choose another --out",
    errno.EACCES: "permission denied; choose a folder you can write to",
    errno.EPERM: "operation not permitted; choose a folder you can write to",
    errno.EMFILE: "too many open files in this process; raise the limit (ulimit -n) and run again",
    errno.ENFILE: "too many open files on this system; close other programs and run again",
    errno.ENAMETOOLONG: "the name is too long; choose a shorter path",
}


def _errno_of(exc: OSError) -> int | None:
    if exc.errno:
        return exc.errno
    text = str(exc)  # h5py folds the system error into its message: "... errno = 28, error message = ..."
    marker = "errno = "
    if marker in text:
        digits = text.split(marker, 1)[1].split(",", 1)[0].strip()
        if digits.isdigit():
            return int(digits)
    return None


def os_error_text(exc: OSError, path=None, *, verb: str = "write") -> str:
    """One line naming the path, the system's reason and what to do, for an :class:`OSError`.

    ``path`` is named when the error carries no file name, or when that name is one of the temporary files
    ``.<name>.*`` written beside ``path`` (a user knows the output they asked for, not our temporary names).
    ``verb`` says what was being done (``write``, ``read``).
    """
    code = _errno_of(exc)
    where = exc.filename or path or "a file"
    if path is not None and exc.filename and _is_temporary_of(Path(str(exc.filename)), Path(path)):
        where = path
    if code is None:
        return f"cannot {verb} {where}: {exc}"
    reason = os.strerror(code)
    name = errno.errorcode.get(code, str(code))
    hint = _HINTS.get(code, "check the path and the file system")
    if verb != "write" and code in (errno.EACCES, errno.EPERM):
        hint = "check the file's permissions"
    return f"cannot {verb} {where}: {reason} ({name}); {hint}."


def _errno_known(exc: BaseException) -> bool:
    """Whether ``exc`` is an OSError that carries a system error number (also folded into an h5py message)."""
    return isinstance(exc, OSError) and _errno_of(exc) is not None


def _is_temporary_of(name: Path, path: Path) -> bool:
    """``name`` is ``path`` itself, inside it, or one of the temporary files ``.<name>.*`` beside it (or inside)."""
    try:
        name, path = name.absolute(), path.absolute()
    except OSError:
        return False
    if name == path or path in name.parents:
        return True
    return any(p.name.startswith(f".{path.name}.") and p.parent == path.parent for p in (name, *name.parents))


def _start_time(pid: int) -> str:
    try:  # field 22 of /proc/<pid>/stat: the start time, so a reused pid is not taken for the owner
        return Path(f"/proc/{pid}/stat").read_text().rsplit(")", 1)[1].split()[19]
    except (OSError, IndexError):
        return ""


def _alive(pid: int, started: str) -> bool:
    try:
        os.kill(pid, 0)
    except ProcessLookupError:
        return False
    except PermissionError:
        return True
    return not started or not _start_time(pid) or _start_time(pid) == started


def _read_claim(lock: Path) -> tuple[int, str]:
    try:
        pid_text, _, started = lock.read_text().partition(" ")
        return int(pid_text), started.strip()
    except (OSError, ValueError):
        return -1, ""


def _remove_leftovers(path: Path) -> list[str]:
    """Remove the temporary files and folders a dead run left beside ``path``; their names."""
    removed = []
    for item in path.parent.glob(f".{path.name}.*"):
        if item.name == f".{path.name}.claim":
            continue
        if item.is_dir() and not item.is_symlink():
            shutil.rmtree(item, ignore_errors=True)
        else:
            with contextlib.suppress(FileNotFoundError):
                item.unlink()
        removed.append(item.name)
    return removed


def _take(lock: Path) -> None:
    fd = os.open(lock, os.O_CREAT | os.O_EXCL | os.O_WRONLY, 0o644)
    try:
        with os.fdopen(fd, "w") as fh:
            fh.write(f"{os.getpid()} {_start_time(os.getpid())}")
    except BaseException:  # a full disk can refuse the few bytes after creating the name: leave no empty claim
        with contextlib.suppress(OSError):
            lock.unlink()
        raise


def _mtime(lock: Path) -> float:
    try:
        return lock.stat().st_mtime
    except FileNotFoundError:  # released between our two looks: it is free now
        return 0.0


def _acquire(path: Path, lock: Path, notes: list) -> None:
    for _ in range(2):
        try:
            _take(lock)
            return
        except FileExistsError:
            pid, started = _read_claim(lock)
            if pid > 0 and _alive(pid, started):
                raise OutputError(f"{path} is being written by another run (process {pid}); wait for it to end or "
                                  "choose another --out.") from None
            if pid < 0 and time.time() - _mtime(lock) < 2.0:
                time.sleep(0.1)  # a claim being written this instant: read it again
                continue
            with contextlib.suppress(FileNotFoundError):
                lock.unlink()
            left = _remove_leftovers(path)
            notes.append(f"removed what a run that ended without finishing left beside {path}: "
                         f"{', '.join(['.' + path.name + '.claim', *left])}")
    raise OutputError(f"could not claim {path}: another run keeps claiming it; choose another --out.")


@contextlib.contextmanager
def claim_output(path, *, force: bool = False, notes: list | None = None):
    """Claim ``path`` for this run before computing; yields the path.

    Parameters
    ----------
    path : str or Path
        The output file or folder the run will write (atomically, at the end).
    force : bool, default False
        Allow an existing output to be replaced (whole) at the end.
    notes : list, optional
        Receives a line when a dead run's leftovers were removed.

    Raises
    ------
    OutputError
        Another live run holds the claim; or ``path`` exists and ``force`` is False; or the folder that would hold
        it cannot be created or written (the system's reason is named).
    """
    path = Path(path)
    parent = path.parent if str(path.parent) else Path(".")
    try:
        parent.mkdir(parents=True, exist_ok=True)
    except OSError as exc:
        raise OutputError(os_error_text(exc, parent)) from None
    lock = parent / f".{path.name}.claim"
    try:
        _acquire(path, lock, notes if notes is not None else [])
    except OSError as exc:
        if isinstance(exc, OutputError):
            raise
        raise OutputError(os_error_text(exc, path)) from None
    try:
        if not force and path.is_dir() and any(path.iterdir()):
            raise OutputError(f"output folder {path} already holds files (another run's output?); choose a new --out "
                              "or pass --force to replace it whole.")
        if not force and path.exists() and not path.is_dir():
            raise OutputError(f"{path} already exists (another run's output?); choose a new --out or pass --force "
                              "to replace it.")
        yield path
    finally:
        with contextlib.suppress(FileNotFoundError):
            lock.unlink()
