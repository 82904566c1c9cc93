"""Work a stage task hands to a forked process while it goes on (its figures beside its tables).

Under ``lightledger reduce --workers N`` (N > 1) a stage's summary step runs
alone: the chunks are done and the next stage waits for its entry.  Its
figures need only arrays already in memory, so :func:`alongside` draws them
in forked processes while the task writes its tables, and waits for them
before the entry is written (the entry lists the figures' digests).  With
one worker the same calls run in the task's own process at the end of the
block, in the order they were handed over, so that a one-worker reduction
keeps one process and the memory it had.
"""

import multiprocessing
import traceback

from .fitpool import PROCESSES

__all__ = ["alongside", "Alongside"]


def _child(conn, function, args, kwargs):
    """Run ``function`` in the forked process and send back its result or its exception."""
    try:
        result = function(*args, **kwargs)
        message = ("ok", result)
    except BaseException as exc:             # noqa: BLE001  (sent back and raised in the task)
        message = ("error", exc, traceback.format_exc())
    try:
        conn.send(message)
    except Exception:                        # the result or exception does not pickle
        conn.send(("error", None, message[-1] if message[0] == "error" else
                   f"{getattr(function, '__name__', function)}: its result cannot be sent back"))
    finally:
        conn.close()


class Alongside:
    """Calls handed to forked processes (``forked=True``) or kept for the end of the block."""

    def __init__(self, forked):
        self.forked = bool(forked)
        self._jobs = []         # (name, process, connection) or (name, function, args, kwargs)
        self.results = []

    def start(self, function, *args, **kwargs):
        """Run ``function(*args, **kwargs)`` beside the caller (forked) or at the block's end."""
        name = getattr(function, "__name__", str(function))
        if not self.forked:
            self._jobs.append((name, function, args, kwargs))
            return
        receive, send = multiprocessing.Pipe(duplex=False)
        process = multiprocessing.get_context("fork").Process(
            target=_child, args=(send, function, args, kwargs), name=f"lightledger-{name}",
            daemon=True)         # ended with the task's process if the task fails before waiting
        process.start()
        send.close()
        self._jobs.append((name, process, receive))

    def wait(self):
        """Wait for every call; their results in the order handed over.

        Raises
        ------
        Exception
            The first call's exception (raised again here), or RuntimeError
            when a forked process ended without a result.
        """
        jobs, self._jobs = self._jobs, []
        failure = None
        for job in jobs:
            if not self.forked:
                name, function, args, kwargs = job
                self.results.append(function(*args, **kwargs))
                continue
            name, process, receive = job
            try:
                message = receive.recv()
            except EOFError:
                message = ("error", None, f"the process running {name} ended without a result "
                                          f"(exit code {process.exitcode})")
            finally:
                receive.close()
                process.join()
            if message[0] == "ok":
                self.results.append(message[1])
            elif failure is None:
                failure = message
        if failure is not None:
            _, exc, text = failure
            if exc is not None:
                raise exc
            raise RuntimeError(f"{text.rstrip()}")
        return self.results

    def stop(self):
        """End every forked process still running (the task failed before waiting)."""
        jobs, self._jobs = self._jobs, []
        for job in jobs:
            if self.forked:
                _, process, receive = job
                if process.is_alive():
                    process.terminate()
                process.join()
                receive.close()

    def __enter__(self):
        return self

    def __exit__(self, kind, value, tb):
        if kind is None:
            self.wait()
        self.stop()
        return False


def alongside():
    """An :class:`Alongside` that forks under ``--workers N`` (N > 1), else keeps calls for ``wait``.

    Use it as a context manager (waits at the block's end) or call ``wait()``
    where the results are needed; forked processes are daemonic, so a task
    that fails before waiting does not leave them behind.

    Examples
    --------
    >>> with alongside() as side:                 # doctest: +SKIP
    ...     side.start(draw_figure, path, arrays)
    ...     write_tables()
    """
    return Alongside(forked=int(PROCESSES.get("count", 1)) > 1)
