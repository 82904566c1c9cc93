"""Work handed to forked processes beside a stage task (tasks/alongside.py).

Checks against the standard library's own facts (os.getpid, the PNG bytes
of a matplotlib figure drawn twice from the same arrays): a forked call runs
in another process and gives back its result or its exception; with one
worker the calls run in the task's process at ``wait()``, in order.
"""

import os
import time

import numpy as np
import pytest

from lightledger.tasks import alongside as side_mod
from lightledger.tasks.fitpool import PROCESSES


def _pid_and(value):
    return os.getpid(), value


def _fails(text):
    raise ValueError(text)


def _draw(path, values):
    from lightledger.tasks.figurekit import _figure
    from lightledger.tasks.products import save_figure

    fig, axes = _figure(1, 2, (6, 3))
    axes[0, 0].plot(values, ".")
    axes[0, 1].imshow(np.outer(values, values))
    axes[0, 0].set_title("points")
    return save_figure(fig, path)


@pytest.fixture
def two_workers():
    PROCESSES["count"] = 2
    try:
        yield
    finally:
        PROCESSES["count"] = 1


def test_forked_calls_run_elsewhere_and_return_in_order(two_workers):
    with side_mod.alongside() as side:
        assert side.forked
        for k in range(3):
            side.start(_pid_and, k)
    pids, values = zip(*side.results)
    assert values == (0, 1, 2)
    assert os.getpid() not in pids


def test_one_worker_runs_the_calls_here_at_wait():
    side = side_mod.alongside()
    assert not side.forked
    seen = []
    side.start(seen.append, "a")
    side.start(seen.append, "b")
    assert seen == []                   # nothing runs before wait()
    side.wait()
    assert seen == ["a", "b"]


def test_an_exception_in_a_forked_call_is_raised_again(two_workers):
    with pytest.raises(ValueError, match="no such column"):
        with side_mod.alongside() as side:
            side.start(_pid_and, 1)
            side.start(_fails, "no such column")


def test_stop_ends_forked_calls_still_running(two_workers):
    side = side_mod.alongside()
    side.start(time.sleep, 30)
    t0 = time.monotonic()
    side.stop()
    assert time.monotonic() - t0 < 10


def test_a_figure_drawn_in_a_forked_process_has_the_same_bytes(tmp_path, two_workers):
    values = np.sin(np.linspace(0.0, 6.0, 40))
    here = tmp_path / "here.png"
    _draw(here, values)
    with side_mod.alongside() as side:
        side.start(_draw, tmp_path / "forked.png", values)
    assert (tmp_path / "forked.png").read_bytes() == here.read_bytes()
    assert not list(tmp_path.glob(".*.part"))
