"""Bookkeeping: identities from content, computed once per run, and what that buys.

References: the files' own bytes (SHA-256 from Python's hashlib, FIPS 180-4),
POSIX file metadata (stat: size, times, inode; the umask, POSIX.1-2017
"umask"), and Luigi's scheduler summary of which tasks ran.  A counting
wrapper around ``os.stat`` and ``Table.read`` measures the bookkeeping's
cost against the number of tasks; the identities and bytes of a reduction
through the run's plan are compared with those of a reduction whose tasks
recompute everything from the files, as every task did before the plan
existed.
"""

import os
import shutil
import stat
import time
import warnings
from pathlib import Path

import pytest

from lightledger.synthetic_data.render import render
from lightledger.tasks import base
from lightledger.tasks.run import reduce_visit

pytestmark = [pytest.mark.slow, pytest.mark.usefixtures("quick_figures")]

N_EXPOSURES = 12


@pytest.fixture(scope="module")
def rendered(tmp_path_factory, short_grid):
    """A 12-exposure scan visit (one raw file per exposure), rendered once, never reduced."""
    root = tmp_path_factory.mktemp("bookkeeping") / "visit"
    short_grid(render("scan-transit", root, seed=7, n_exposures=N_EXPOSURES))
    return root


def _copy(src, dst, *, keep_times=True):
    """Copy a visit folder (cp -r, or cp -rp with ``keep_times``)."""
    shutil.copytree(src, dst, copy_function=shutil.copy2 if keep_times else shutil.copy)
    return Path(dst) / "visit.toml"


def _reduce(visit, **kwargs):
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", RuntimeWarning)
        result = reduce_visit(visit, **kwargs)
    assert result.ok, result.messages
    return result


def _stage_folders(notebook):
    return sorted(p.name for p in Path(notebook).iterdir()
                  if p.is_dir() and not p.name.startswith("."))


class _Counter:
    """Counts os.stat calls on files under given folders, Table.read calls and raw FITS opens."""

    def __init__(self, monkeypatch, folders):
        from astropy.io import fits
        from astropy.table import Table

        self.folders = [str(Path(f).resolve()) for f in folders]
        self.stats = self.tables = self.opens = 0
        real_stat, real_read, real_open = os.stat, Table.read, fits.open

        def counting_stat(path, *args, **kwargs):
            if self._watched(path):
                self.stats += 1
            return real_stat(path, *args, **kwargs)

        def counting_read(*args, **kwargs):
            self.tables += 1
            return real_read(*args, **kwargs)

        def counting_open(name, *args, **kwargs):
            if self._watched(name):
                self.opens += 1
            return real_open(name, *args, **kwargs)

        monkeypatch.setattr(os, "stat", counting_stat)
        monkeypatch.setattr(Table, "read", staticmethod(counting_read))
        monkeypatch.setattr(fits, "open", counting_open)

    def _watched(self, path):
        try:
            text = os.fspath(path)
        except TypeError:
            return False
        if isinstance(text, bytes):
            text = text.decode(errors="replace")
        return any(text.startswith(f) for f in self.folders)


def test_raw_stats_and_table_reads_do_not_grow_with_the_number_of_tasks(rendered, tmp_path,
                                                                        monkeypatch):
    counts = {}
    for chunk_size in (N_EXPOSURES, 2):            # 1 chunk (5 tasks) and 6 chunks (15 tasks)
        visit = _copy(rendered, tmp_path / f"chunks-{chunk_size}")
        watched = [visit.parent / "raw", visit.parent / "calibration"]
        with monkeypatch.context() as patch:
            counter = _Counter(patch, watched)
            result = _reduce(visit, settings=[("calibrate", "chunk_size", chunk_size)],
                             until="extract")
        tasks = len(result.ran)
        counts[chunk_size] = (tasks, counter.stats, counter.tables, counter.opens)
        print(f"chunk_size {chunk_size}: {tasks} tasks ran, {counter.stats} stats of raw and "
              f"reference files, {counter.tables} table reads, {counter.opens} opens of raw and "
              f"reference files")
    (few, stats_few, tables_few, opens_few), (many, stats_many, tables_many, opens_many) = \
        counts[N_EXPOSURES], counts[2]
    assert many >= few + 10                         # the second run really has more tasks
    assert stats_many == stats_few                  # raw files are stat-ed once per run
    assert tables_many == tables_few                # no task re-reads a visit-long table
    # each raw file is opened for its headers once and for its reads once per exposure; the
    # reference files once per process (common practice: cache what does not change)
    assert opens_many == opens_few


def test_the_plan_gives_the_identities_and_bytes_of_a_recomputation_from_the_files(
        rendered, tmp_path, monkeypatch):
    planned = _copy(rendered, tmp_path / "planned")
    recomputed = _copy(rendered, tmp_path / "recomputed")
    first = _reduce(planned, settings=[("calibrate", "chunk_size", 8)])
    with monkeypatch.context() as patch:
        # every task finds no plan and derives visit, identities, exposures and digests from the
        # files, as each task did before the run computed them once
        patch.setattr(base, "_find_plan", lambda *args: None)
        second = _reduce(recomputed, settings=[("calibrate", "chunk_size", 8)])
    assert sorted(first.ran) == sorted(second.ran)
    nb_a, nb_b = planned.parent / "notebook", recomputed.parent / "notebook"
    folders = _stage_folders(nb_a)
    assert folders == _stage_folders(nb_b)
    # the identities are those of the definition, computed from the files without the plan
    config = base.visit_config(recomputed, base.settings_to_text([("calibrate", "chunk_size", 8)]))
    assert folders == sorted(base.stage_dir(config, s).name
                             for s in ("calibrate", "extract", "bin", "detrend"))
    # every product, figures included, has the same bytes (no wall-clock time inside them)
    compared = 0
    for folder in folders:
        for product in sorted((nb_a / folder).iterdir()):
            if product.name.startswith(".") or product.name == base.ENTRY_NAME:
                continue
            assert product.read_bytes() == (nb_b / folder / product.name).read_bytes(), product.name
            compared += 1
    assert compared >= 18


def test_copy_touch_and_a_changed_byte(rendered, tmp_path):
    original = _copy(rendered, tmp_path / "original")
    first = _reduce(original, until="calibrate")
    assert "CalibrateChunk" in first.ran
    notebook = original.parent / "notebook"
    folders = _stage_folders(notebook)

    # cp -r (times not kept): every product is reused, under the same identities
    copy = _copy(original.parent, tmp_path / "copy", keep_times=False)
    first_raw = sorted((original.parent / "raw").glob("*.fits"))[0]
    assert (copy.parent / "raw" / first_raw.name).stat().st_mtime_ns != first_raw.stat().st_mtime_ns
    again = _reduce(copy, until="calibrate")
    assert again.ran == []
    assert _stage_folders(copy.parent / "notebook") == folders

    # a touched raw file is hashed again and re-runs nothing
    raw = sorted((original.parent / "raw").glob("*.fits"))
    os.utime(raw[3], ns=(raw[3].stat().st_atime_ns, raw[3].stat().st_mtime_ns + 10 ** 9))
    base._DIGESTS.clear()                        # as in a new process: the record is read back
    touched = _reduce(original, until="calibrate")
    assert touched.ran == []
    cache = base.digest_cache(notebook)
    assert cache.hashed == 1                     # only the touched file, the others remembered

    # one changed byte in one raw file (a pixel of its last read) changes every identity
    data = bytearray(raw[5].read_bytes())
    data[-3000] ^= 0x01
    raw[5].write_bytes(bytes(data))
    changed = _reduce(original, until="calibrate")
    assert sorted(set(changed.ran)) == ["Calibrate", "CalibrateChunk", "Inventory"]
    assert changed.ran.count("CalibrateChunk") == 1      # 12 exposures in one chunk of 16
    before = base.make_plan(base.visit_config(copy)).identities
    after = base.make_plan(base.visit_config(original)).identities
    assert all(before[s] != after[s] for s in before)


@pytest.mark.parametrize("umask, readable", [(0o022, True), (0o077, False)])
def test_products_follow_the_umask(tmp_path, umask, readable):
    import numpy as np
    from astropy.io import fits
    from astropy.table import Table

    from lightledger.tasks.products import Provenance, save_figure, write_ecsv, write_fits, write_json

    prov = Provenance("calibrate", "1", "0123456789", {"a": 1}, {})
    old = os.umask(umask)
    try:
        import matplotlib
        matplotlib.use("Agg")
        import matplotlib.pyplot as plt

        paths = [tmp_path / "a.fits", tmp_path / "b.ecsv", tmp_path / "c.json", tmp_path / "d.png"]
        write_fits(paths[0], [fits.ImageHDU(np.zeros(3), name="X")], prov)
        write_ecsv(paths[1], Table({"x": [1, 2]}), prov)
        write_json(paths[2], {"x": 1})
        save_figure(plt.figure(figsize=(1, 1)), paths[3])
    finally:
        os.umask(old)
    for path in paths:
        mode = stat.S_IMODE(path.stat().st_mode)
        assert mode == 0o666 & ~umask, (path.name, oct(mode))   # what open(2) gives a new file
        assert bool(mode & stat.S_IRGRP) == readable and bool(mode & stat.S_IROTH) == readable


def test_figures_are_written_with_the_same_bytes_twice(tmp_path):
    """A PNG carries no time of writing (matplotlib's PNG metadata is its version only)."""
    import matplotlib
    matplotlib.use("Agg")
    import matplotlib.pyplot as plt
    import numpy as np

    from lightledger.tasks.products import save_figure

    def draw(path):
        fig, ax = plt.subplots(figsize=(3, 2))
        ax.plot(np.arange(10), np.arange(10) ** 0.5, label="white")
        ax.set_title("a light curve")
        ax.legend()
        return save_figure(fig, path)

    first = draw(tmp_path / "a.png")
    time.sleep(1.1)
    assert draw(tmp_path / "b.png") == first
