"""Advisory locks on notebook folders that a killed process cannot leave held.

Locks are :func:`fcntl.flock` locks on small files under ``NOTEBOOK/.locks/``.
The kernel drops them when the process holding them exits, however it exits
(a SIGKILL included), so no lock is ever left stuck.  Three kinds are used:

``.locks/STAGE-IDENT.lock``
    the stage folder: held shared by every task writing into the folder and
    exclusively by whoever renames or removes the folder (a forced re-run,
    ``notebook prune``) or sweeps its leftover temporary files;
``.locks/STAGE-IDENT/NAME.lock``
    one product of the folder: held exclusively by the task making it, so
    that a second reducer waits, then finds the product made and reuses it;
``.locks/notebook.lock``
    the notebook page and its machine-readable index.

A lock file may be removed (``notebook prune``) only by a process holding
the folder's exclusive lock; :func:`acquire` checks after locking that the
file it locked is still the one on disk, and tries again otherwise.
"""

import fcntl
import os
from contextlib import contextmanager
from pathlib import Path

__all__ = ["LOCK_DIR", "acquire", "release", "locked", "folder_lock_path", "product_lock_path",
           "notebook_lock_path"]

LOCK_DIR = ".locks"


def folder_lock_path(folder):
    """Lock file of a stage folder ``NOTEBOOK/STAGE-IDENT``."""
    folder = Path(folder)
    return folder.parent / LOCK_DIR / f"{folder.name}.lock"


def product_lock_path(folder, name):
    """Lock file of the product ``name`` of a stage folder."""
    folder = Path(folder)
    return folder.parent / LOCK_DIR / folder.name / f"{name}.lock"


def notebook_lock_path(notebook):
    """Lock file of a notebook's page and index."""
    return Path(notebook) / LOCK_DIR / "notebook.lock"


def acquire(path, *, shared=False, blocking=True):
    """Lock ``path`` (created if missing); return its descriptor, or None when busy.

    Parameters
    ----------
    path : str or Path
    shared : bool
        A shared (reader) lock instead of an exclusive one.
    blocking : bool
        Wait for the lock; when False, return None at once if it is held.
    """
    path = Path(path)
    path.parent.mkdir(parents=True, exist_ok=True)
    flags = (fcntl.LOCK_SH if shared else fcntl.LOCK_EX) | (0 if blocking else fcntl.LOCK_NB)
    while True:
        fd = os.open(path, os.O_RDWR | os.O_CREAT, 0o666)
        try:
            fcntl.flock(fd, flags)
        except BlockingIOError:
            os.close(fd)
            return None
        except BaseException:
            os.close(fd)
            raise
        try:
            same = os.fstat(fd).st_ino == os.stat(path).st_ino
        except FileNotFoundError:
            same = False
        if same:
            return fd
        os.close(fd)          # the file was removed while we waited: lock the new one


def release(fd):
    """Release a lock taken by :func:`acquire` (closing its descriptor)."""
    if fd is not None:
        os.close(fd)


@contextmanager
def locked(path, *, shared=False, blocking=True):
    """Context manager around :func:`acquire`; yields True when held, False when busy."""
    fd = acquire(path, shared=shared, blocking=blocking)
    try:
        yield fd is not None
    finally:
        release(fd)
