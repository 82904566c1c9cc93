"""Problems found while validating a visit, collected rather than raised one by one.

Every loader of the validation pass (:mod:`.config`, :mod:`.rawio`,
:mod:`.references`, :mod:`.check`) takes a :class:`Problems` list and appends
to it, so that one run names every problem of a visit.  A problem is one line
``FILE: what is wrong`` naming the key, keyword or extension; its ``level``
says whether it stops the reduction (``"error"``), is reported and carried
(``"warning"``), or is a failure of the machine (``"environment"``).

:func:`environment_message` turns an ``OSError`` that the machine raised
(disk full, file-size limit, permission denied, read-only file system) into
such a line; :func:`describe_failure` classifies any exception for the
command line (exit status and the text to print).
"""

import errno
import traceback
from dataclasses import dataclass

from lightledger.pipeline.errors import (AllMaskedError, EnvironmentFailure, LightledgerError,
                                         ParameterError)

__all__ = ["Problem", "Problems", "environment_message", "describe_failure", "diagnose_write",
           "ENVIRONMENT_ERRNOS"]

#: errno values that mean "the machine refused", not "the input is wrong".
ENVIRONMENT_ERRNOS = {
    errno.ENOSPC: "no space left on the device",
    errno.EDQUOT: "disk quota exceeded",
    errno.EFBIG: "file larger than the file-size limit (ulimit -f) or the file system allows",
    errno.EACCES: "permission denied",
    errno.EPERM: "operation not permitted",
    errno.EROFS: "read-only file system",
    errno.EMFILE: "too many open files (ulimit -n)",
    errno.ENFILE: "too many open files in the system",
    errno.ENOMEM: "out of memory",
    errno.EIO: "input/output error of the device",
}


@dataclass(frozen=True)
class Problem:
    """One problem: where (a file, or an option such as ``--set``), what, how bad."""

    where: str
    what: str
    level: str = "error"        # "error", "warning" or "environment"

    @property
    def text(self):
        """``WHERE: what`` (the message without the ``lightledger:`` prefix)."""
        return f"{self.where}: {self.what}" if self.where else self.what

    @property
    def line(self):
        """The line printed on the console."""
        label = "warning" if self.level == "warning" else "error"
        return f"lightledger: {label}: {self.text}"


class Problems:
    """An ordered list of :class:`Problem`, without repeats."""

    def __init__(self):
        self.items = []

    def add(self, where, what, level="error"):
        problem = Problem(str(where), str(what).replace("\n", " ").strip(), level)
        if problem not in self.items:
            self.items.append(problem)
        return problem

    def error(self, where, what):
        return self.add(where, what, "error")

    def warning(self, where, what):
        return self.add(where, what, "warning")

    def environment(self, where, what):
        return self.add(where, what, "environment")

    def extend(self, other):
        for p in other.items if isinstance(other, Problems) else other:
            self.add(p.where, p.what, p.level)

    @property
    def errors(self):
        """Problems that stop the reduction (errors and environment failures)."""
        return [p for p in self.items if p.level != "warning"]

    @property
    def warnings(self):
        return [p for p in self.items if p.level == "warning"]

    def __len__(self):
        return len(self.items)

    def __bool__(self):
        return bool(self.items)

    def exception(self, cls=LightledgerError):
        """One exception holding every error, one per line (None when there is none)."""
        errors = self.errors
        if not errors:
            return None
        if all(p.level == "environment" for p in errors):
            cls = EnvironmentFailure
        return cls("\n".join(p.text for p in errors))

    def raise_errors(self, cls=LightledgerError):
        exc = self.exception(cls)
        if exc is not None:
            raise exc


def _names_a_file(line):
    head = line.split(": ", 1)[0]
    return "/" in head or head.endswith((".toml", ".fits", ".ecsv", ".json"))


def _machine_error(exc):
    """The OSError with an environment errno in ``exc``'s chain (libraries re-raise without it)."""
    seen = set()
    while exc is not None and id(exc) not in seen:
        seen.add(id(exc))
        if isinstance(exc, OSError) and exc.errno in ENVIRONMENT_ERRNOS:
            return exc
        exc = exc.__cause__ or exc.__context__
    return None


def environment_message(exc, path=None):
    """``PATH: condition (what to do)`` for an OSError the machine raised, else None.

    The chain of causes is searched: a library may re-raise the system's
    error as a new OSError without its errno (astropy's FITS writer does).
    """
    exc = _machine_error(exc)
    if exc is None:
        return None
    where = path or exc.filename or "lightledger"
    condition = ENVIRONMENT_ERRNOS[exc.errno]
    advice = {errno.ENOSPC: "free space or move the notebook (visit.notebook), then run again",
              errno.EDQUOT: "free space or move the notebook (visit.notebook), then run again",
              errno.EFBIG: "raise the limit or use a smaller calibrate.chunk_size, then run again",
              errno.EROFS: "set visit.notebook to a writable folder"}.get(
                  exc.errno, "check the file's permissions and run again")
    return f"{where}: {condition} ({advice}; complete products are kept)"


def diagnose_write(exc, path, partial=None):
    """An OSError naming ``path`` and the machine's condition, for a failed write; else None.

    Writers that lose the system's errno (numpy's ``tofile`` reports a short
    write as ``N requested and M written``) are diagnosed from the machine:
    a partial file that reached the file-size limit (RLIMIT_FSIZE) is EFBIG,
    a file system with less than a megabyte free is ENOSPC.

    Parameters
    ----------
    exc : BaseException
        What the write raised.
    path : str or Path
        The file being written (its final name).
    partial : str or Path, optional
        The partial file, while it still exists.
    """
    import os
    import shutil

    found = _machine_error(exc)
    if found is not None:
        return OSError(found.errno, found.strerror or os.strerror(found.errno), str(path))
    if not isinstance(exc, OSError) or exc.errno is not None:
        return None
    try:
        import resource

        soft = resource.getrlimit(resource.RLIMIT_FSIZE)[0]
        if partial is not None and soft != resource.RLIM_INFINITY \
                and os.path.getsize(partial) >= soft:
            return OSError(errno.EFBIG, os.strerror(errno.EFBIG), str(path))
    except (ImportError, OSError, ValueError):
        pass
    try:
        if shutil.disk_usage(os.path.dirname(os.path.abspath(path))).free < 1 << 20:
            return OSError(errno.ENOSPC, os.strerror(errno.ENOSPC), str(path))
    except OSError:
        pass
    return None


def describe_failure(exc, context=None):
    """Exit status and console text for an exception that ended a task or a command.

    ``context`` (e.g. ``VISIT.toml (extract stage, chunk 3)``) prefixes a
    pipeline error whose message names no file (a
    :class:`~lightledger.pipeline.errors.ParameterError` or
    :class:`~lightledger.pipeline.errors.AllMaskedError` from a pure
    function), so that every line names where the problem is.

    Returns
    -------
    status : int
        2 for a user's mistake (:class:`LightledgerError`), 3 for the machine
        (disk full, file-size limit, permission denied, out of memory), 1 for
        anything else (a bug).
    text : str
        ``lightledger: error: ...`` lines, or for a bug a line saying so
        followed by the traceback.
    """
    if isinstance(exc, LightledgerError):
        lines = exc.lines()
        if context and isinstance(exc, (ParameterError, AllMaskedError)):
            lines = [line if _names_a_file(line) else f"{context}: {line}" for line in lines]
        return exc.exit_status, "\n".join(f"lightledger: error: {line}" for line in lines)
    message = environment_message(exc)
    if message is not None:
        return 3, f"lightledger: error: {message}"
    if isinstance(exc, MemoryError):
        return 3, ("lightledger: error: out of memory (use a smaller calibrate.chunk_size or "
                   "fewer --workers)")
    return 1, ("lightledger: internal error (a bug; please report it with this traceback):\n"
               + "".join(traceback.format_exception(exc)).rstrip())
