"""Two reducers sharing one central Luigi scheduler (luigid) split the work.

Reference: Luigi's central scheduler, which hands each pending task to one
worker at a time (Luigi documentation, "Using the Central Scheduler"). Two
command-line reducers of the same visit, started together against one
``luigid`` on loopback, must both finish and the chunk tasks must not run
twice.
"""

import json
import os
import shutil
import socket
import subprocess
import sys
import time
from pathlib import Path

import pytest

from lightledger.synthetic_data.render import render

pytestmark = pytest.mark.slow

def _luigid():
    """The central scheduler installed with this interpreter's luigi, else one on PATH.

    A virtual environment's console scripts sit beside its interpreter
    (``sys.executable``'s folder), which need not be on PATH.
    """
    beside = Path(sys.executable).parent / "luigid"
    if beside.is_file() and os.access(beside, os.X_OK):
        return str(beside)
    return shutil.which("luigid")


LUIGID = _luigid()


def _free_port():
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        return s.getsockname()[1]


@pytest.mark.skipif(LUIGID is None, reason="luigid is neither beside the interpreter nor on PATH")
def test_two_reducers_share_a_central_scheduler(tmp_path, short_grid):
    visit = short_grid(render("scan-transit", tmp_path / "visit", seed=6, n_exposures=20))
    port = _free_port()
    (tmp_path / "log").mkdir()
    daemon = subprocess.Popen([LUIGID, "--port", str(port), "--address", "127.0.0.1",
                               "--logdir", str(tmp_path / "log"),
                               "--state-path", str(tmp_path / "state.pickle")],
                              stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL)
    try:
        deadline = time.monotonic() + 30
        while True:
            try:
                socket.create_connection(("127.0.0.1", port), timeout=1).close()
                break
            except OSError:
                assert time.monotonic() < deadline, "luigid did not start"
                time.sleep(0.2)
        command = [sys.executable, "-m", "lightledger.tasks.cli", "reduce", str(visit),
                   "--scheduler-host", "127.0.0.1", "--scheduler-port", str(port),
                   "--set", "calibrate.chunk_size=4"]
        runs = [subprocess.Popen(command, stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True)
                for _ in range(2)]
        outputs = [r.communicate(timeout=600) for r in runs]
    finally:
        daemon.terminate()
        daemon.wait(timeout=30)
    for run, (out, err) in zip(runs, outputs):
        assert run.returncode == 0, err
        assert out.strip().splitlines()[-1].endswith("detrended.fits")
    ran = {}
    for _, err in outputs:
        line = next((l for l in err.splitlines() if l.startswith(("ran: ", "nothing to run"))), "")
        for part in line.removeprefix("ran: ").split(", "):
            if part and part[0].isdigit():
                n, family = part.split(" ", 1)
                ran[family] = ran.get(family, 0) + int(n)
    # Every task ran exactly once across the two reducers.
    assert ran == {"Inventory": 1, "CalibrateChunk": 5, "Calibrate": 1, "ExtractReference": 1,
                   "ExtractChunk": 5, "Extract": 1, "Bin": 1, "Detrend": 1}, ran
    notebook = visit.parent / "notebook"
    frames = sorted(notebook.glob("calibrate-*/frames-*.fits"))
    assert len(frames) == 5                                   # 20 exposures in chunks of 4
    entries = json.loads((notebook / "notebook.json").read_text())["entries"]
    assert sorted(e["stage"] for e in entries) == ["bin", "calibrate", "detrend", "extract"]
