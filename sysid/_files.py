"""Atomic file output: a reader never sees a half-written file, and a failure leaves nothing behind."""

from __future__ import annotations

import contextlib
import os
import shutil
import tempfile
from pathlib import Path

from .exceptions import StimsteerError

__all__ = ["atomic_path", "atomic_dir", "write_bytes", "hdf5_bytes"]


def _umask() -> int:
    mask = os.umask(0)
    os.umask(mask)
    return mask


@contextlib.contextmanager
def atomic_path(path, suffix: str | None = None):
    """Yield a temporary path beside ``path``; on success it is renamed onto ``path``, on error removed.

    Use for any single output file: ``with atomic_path(out) as tmp: write(tmp)``.
    """
    path = Path(path)
    parent = path.parent if str(path.parent) else Path(".")
    if not parent.is_dir():
        raise StimsteerError(f"cannot write {path}: the folder {parent} does not exist. Create it first.")
    fd, tmp = tempfile.mkstemp(prefix=f".{path.name}.", suffix=suffix or path.suffix or ".tmp", dir=parent)
    os.close(fd)
    os.chmod(tmp, 0o666 & ~_umask())  # mkstemp makes 0600; a saved file gets the usual permissions
    try:
        yield Path(tmp)
        os.replace(tmp, path)
    except BaseException:
        with contextlib.suppress(FileNotFoundError):
            os.remove(tmp)
        raise


@contextlib.contextmanager
def atomic_dir(path, force: bool = False):
    """Yield a temporary folder beside ``path``; on success it replaces ``path``, on error it is removed.

    An existing non-empty ``path`` is refused unless ``force`` (then it is replaced whole, never mixed).
    """
    path = Path(path)
    if path.exists() and not path.is_dir():
        raise StimsteerError(f"output folder {path} exists and is a file; choose another --out.")
    if path.is_dir() and any(path.iterdir()) and not force:
        raise StimsteerError(
            f"output folder {path} already holds files (another run?); choose a new --out or pass --force to "
            "replace it."
        )
    parent = path.parent if str(path.parent) else Path(".")
    parent.mkdir(parents=True, exist_ok=True)
    tmp = Path(tempfile.mkdtemp(prefix=f".{path.name}.", dir=parent))
    os.chmod(tmp, 0o777 & ~_umask())
    try:
        yield tmp
        if path.exists():
            old = Path(tempfile.mkdtemp(prefix=f".{path.name}.old.", dir=parent))
            os.replace(path, old / "x")
            os.replace(tmp, path)
            shutil.rmtree(old, ignore_errors=True)
        else:
            os.replace(tmp, path)
    except BaseException:
        shutil.rmtree(tmp, ignore_errors=True)
        raise


def write_bytes(path, data, suffix: str | None = None) -> Path:
    """Write ``data`` (bytes or a buffer) to ``path`` atomically; a full disk raises a plain :class:`OSError`."""
    with atomic_path(path, suffix=suffix) as tmp:
        with open(tmp, "wb") as fh:
            fh.write(data)
    return Path(path)


@contextlib.contextmanager
def hdf5_bytes():
    """Yield an in-memory file for ``h5py.File(buf, "w")``; afterwards ``buf.getbuffer()`` holds the whole file.

    HDF5 files are built in memory and written with :func:`write_bytes`: the HDF5 library, writing to a disk that
    fills up, reports the failure again on every object it closes and can crash the interpreter while cleaning up
    (a segmentation fault after dozens of tracebacks); a plain write of finished bytes fails once, cleanly.
    """
    import io

    buf = io.BytesIO()
    yield buf
