"""One BLAS thread per process unless the user sets a thread count (common practice for
process-parallel numpy: the standard OpenBLAS/OpenMP environment variables)."""

import os
import subprocess
import sys

from lightledger.tasks.cli import BLAS_THREAD_VARIABLES, one_blas_thread


def test_sets_one_thread_only_when_the_user_did_not():
    env = {}
    assert one_blas_thread(env) is True
    assert all(env[name] == "1" for name in BLAS_THREAD_VARIABLES)
    mine = {"OMP_NUM_THREADS": "3"}
    assert one_blas_thread(mine) is False and mine == {"OMP_NUM_THREADS": "3"}


def test_command_line_sets_it_before_numpy_loads():
    env = {k: v for k, v in os.environ.items() if k not in BLAS_THREAD_VARIABLES}
    code = ("import sys, lightledger.tasks.cli as c, os; "
            "print('numpy' in sys.modules, os.environ['OPENBLAS_NUM_THREADS'])")
    out = subprocess.run([sys.executable, "-c", code], env=env, capture_output=True, text=True,
                         check=True).stdout.split()
    assert out == ["False", "1"]
