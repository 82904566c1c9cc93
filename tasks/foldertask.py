"""Making one notebook folder: locks, forcing and made-records around a task's run.

:class:`FolderTask` is the mixin of every task that makes one notebook folder
(the stage tasks through :class:`.base.VisitTask`, a programme's joint fit):
its ``run()`` is wrapped by :func:`guarded`, which holds the folder's shared
lock and the output's exclusive lock (:mod:`.locks`), moves a forced stage's
old folder aside (:func:`supersede`), removes temporary files of dead
writers (:func:`remove_parts`), returns at once when another reducer made the
output meanwhile, and writes the output's made-record after the run.
"""

import inspect
import os
import socket
import time
from contextlib import contextmanager
from datetime import datetime, timezone
from pathlib import Path

from . import locks
from .digests import sha256_of
from .entries import ENTRY_NAME, _stat_key, made_record_path, read_entry, read_made_record
from .products import known_digest, part_pattern, write_json

__all__ = ["FolderTask", "guarded", "supersede", "remove_parts", "PROGRESS"]

#: Where the command line puts its progress reporter (one per process).
PROGRESS = {}


class FolderTask:
    """What a task that makes one notebook folder shares: locks, forcing, made-records.

    A subclass (a :class:`luigi.Task`) provides ``stage``, ``folder``,
    ``output()``, ``force_after``, ``run_id`` and ``forced``; it is complete
    when its output is (:meth:`complete`); its ``run()`` is wrapped
    (:func:`guarded`): the folder's shared lock and the output's exclusive
    lock are held while it runs, leftover temporary files of the output are
    removed, a forced stage's old folder is moved aside first, the run
    returns at once when another reducer made the output meanwhile, and the
    output's made-record is written after it.  It reports progress
    (:meth:`progress`) and records a failure's status and line for the
    command line (:meth:`on_failure`, naming ``_failure_context()``).
    """

    #: Whether an internal error's line names the task's family.
    failure_names_task = True

    def __init_subclass__(cls, **kwargs):
        super().__init_subclass__(**kwargs)
        if "run" in cls.__dict__:
            cls.run = guarded(cls.__dict__["run"])

    def complete(self):
        """One file test (two for a forced stage; an entry is also parsed).

        The output exists; when the stage is forced, its folder's entry (or
        the output, when that is the entry) is not older than the run's
        start (``force_after``); an entry output must also parse as an entry
        of ``stage``.
        """
        path = Path(self.output().path)
        try:
            st = os.stat(path)
        except FileNotFoundError:
            return False
        entry = self.folder / ENTRY_NAME
        if self.forced:
            try:
                est = st if path == entry else os.stat(entry)
            except FileNotFoundError:
                est = None          # the folder is being made anew
            if est is not None and est.st_mtime < self.force_after:
                return False
        if path.name == ENTRY_NAME:
            return read_entry(path, self.stage) is not None
        return True

    def progress(self, done, total, what, *, part=None):
        """Report progress to Luigi's scheduler and to the command line's bar of the stage.

        A task that is its whole stage gives its own ``done`` of ``total``
        steps; a chunk task gives ``part`` (its chunk number), the units it
        has done and the stage's total units (see ``tasks/console.py``).
        """
        percent = 100.0 * done / max(total, 1)
        try:
            self.set_status_message(f"{what}: {done}/{total}")
            self.set_progress_percentage(round(percent, 1))
        except Exception:  # no scheduler attached (a task run by hand)
            pass
        reporter = PROGRESS.get("callback")
        if reporter is not None:
            reporter(self.stage, what, done, total, part)

    def on_failure(self, exception):
        """Record the reason and exit status for the command line, then let Luigi record its own.

        A user's mistake or a failure of the machine is one line per problem
        (see :func:`lightledger.tasks.problems.describe_failure`); a pipeline
        error that names no file is prefixed with ``_failure_context()`` (the
        visit or programme and the stage).  The line goes to
        ``NOTEBOOK/.failures/RUN/TASK_ID.txt`` (status, then text), which the
        command line reads after the build.
        """
        from .problems import describe_failure

        status, text = describe_failure(exception, context=self._failure_context())
        if status == 1 and self.failure_names_task:
            text = text.replace("lightledger: internal error", f"lightledger: {self.task_family} "
                                                                "failed: internal error", 1)
        try:
            folder = Path(self.config.notebook) / ".failures" / (self.run_id or "by-hand")
            folder.mkdir(parents=True, exist_ok=True)
            (folder / f"{self.task_id}.txt").write_text(f"{status}\n{text}\n", encoding="utf-8")
        except Exception:
            pass
        return super().on_failure(exception)

    def _failure_context(self):
        """What a failure's line names when the error names no file (the subclass says)."""
        return f"{self.stage} stage"

    def check_identity(self):
        """Raise when the task's inputs no longer give its identity (default: nothing to check)."""

    def made_by_this_run(self):
        """True when this task's output was made by the run that scheduled it."""
        return bool(self.run_id) and read_made_record(self.output().path).get("run") == self.run_id

    def supersede_if_old(self):
        """Move a forced stage's complete folder aside when its entry predates the run.

        Done under the folder's exclusive lock, so never while another task
        writes into it; a folder whose entry is newer than the run's start was
        made again by a run that started later, or is being made (no entry):
        it is kept.
        """
        folder = self.folder
        entry = folder / ENTRY_NAME
        try:
            if os.stat(entry).st_mtime >= self.force_after:
                return
        except FileNotFoundError:
            return
        with locks.locked(locks.folder_lock_path(folder)):
            try:
                if os.stat(entry).st_mtime >= self.force_after:
                    return
            except FileNotFoundError:
                return
            supersede(folder)


def supersede(folder):
    """Rename a stage folder to ``NAME.superseded-TIME`` (the caller holds its lock)."""
    folder = Path(folder)
    stamp = datetime.now(timezone.utc).strftime("%Y%m%dT%H%M%S")
    target = folder.with_name(f"{folder.name}.superseded-{stamp}")
    n = 1
    while target.exists():
        n += 1
        target = folder.with_name(f"{folder.name}.superseded-{stamp}-{n}")
    folder.rename(target)
    folder.mkdir()          # its replacement is being made: the folder says so at once
    return target


def remove_parts(folder, name=None):
    """Remove temporary files of dead writers in a folder (of one product, or all).

    The caller holds the product's lock (or the folder's exclusive lock), so
    no live process is writing them.
    """
    pattern = part_pattern(name) if name else ".*.part"
    removed = 0
    for part in Path(folder).glob(pattern):
        try:
            part.unlink()
            removed += 1
        except FileNotFoundError:
            pass
    return removed


def guarded(run):
    """Wrap a task's ``run`` (plain or generator) with the checks and locks of :class:`FolderTask`."""
    if inspect.isgeneratorfunction(run):
        def wrapper(self):
            with _claim(self) as fresh:
                if fresh:
                    yield from run(self)
                    _record(self)
    else:
        def wrapper(self):
            with _claim(self) as fresh:
                if fresh:
                    result = run(self)
                    _record(self)
                    return result
    wrapper.__name__ = run.__name__
    wrapper.__doc__ = run.__doc__
    wrapper.__wrapped__ = run
    return wrapper


_guarded = guarded


@contextmanager
def _claim(task):
    task.check_identity()
    if task.forced:
        task.supersede_if_old()
    folder = task.folder
    output = Path(task.output().path)
    shared = locks.acquire(locks.folder_lock_path(folder), shared=True)
    try:
        own = locks.acquire(locks.product_lock_path(folder, output.name))
        try:
            if task.complete():
                yield False          # another reducer made it while this one waited
                return
            remove_parts(folder, output.name)
            task.__dict__["_started"] = time.time()
            yield True
        finally:
            locks.release(own)
    finally:
        locks.release(shared)


def _record(task):
    output = Path(task.output().path)
    if not output.exists():
        return
    record = {"run": task.run_id, "task": task.task_family,
              "seconds": round(time.time() - task.__dict__.get("_started", time.time()), 3),
              "host": socket.gethostname(), "pid": os.getpid(),
              "stat": _stat_key(output), "sha256": known_digest(output) or sha256_of(output)}
    write_json(made_record_path(output), record)
