"""Processes for a stage's own independent fits (the detrend grid's models side by side).

``lightledger reduce --workers N`` runs up to N Luigi tasks at once; the
detrend stage, which runs alone at the end of a visit, then fits its grid's
models in up to N processes instead (:func:`fit_map`).  Each process is a
fork of the task's: it inherits the one-thread BLAS of the command line
(``OPENBLAS_NUM_THREADS`` etc.; see the README's Performance section) and
the libraries already imported, and sends back only its fits.
"""

import functools
import multiprocessing
import os
from contextlib import contextmanager

__all__ = ["PROCESSES", "fit_map"]

#: Processes a task may use for its own independent fits; the reducer sets it to its workers.
PROCESSES = {"count": 1}


@contextmanager
def fit_map(n_jobs):
    """A ``map(function, jobs)`` that keeps the jobs' order, over up to :data:`PROCESSES` processes.

    Parameters
    ----------
    n_jobs : int
        Jobs the caller has at most (no more processes than jobs, or cores).

    Yields
    ------
    callable
        The builtin ``map`` for one process; else a pool's ordered ``imap``
        (one job at a time per process), the pool ended when the block ends.
        An exception in a job is raised again in the caller.
    """
    n = min(int(PROCESSES.get("count", 1)), int(n_jobs), os.cpu_count() or 1)
    if n <= 1:
        yield map
        return
    pool = multiprocessing.get_context("fork").Pool(n)
    try:
        yield functools.partial(pool.imap, chunksize=1)
    finally:
        pool.terminate()
        pool.join()
