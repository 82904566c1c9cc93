"""End to end: a scan visit with few exposures per orbit gets its orbits right.

The forward model spreads each orbit's exposures over a 63-min visibility
window of a 95.6-min orbit, so with few exposures per orbit the occultation
gap (about 34 min start to start) is only a few times the cadence.  The bin
stage's orbit numbers are compared with the truth the forward model wrote
(``truth.fits``; the reducer never reads it).
"""

import json
import warnings

import numpy as np
import pytest
from astropy.table import Table

pytestmark = pytest.mark.slow


def _reduce(outdir, n_exposures, until=None, settings=()):
    from lightledger.synthetic_data.render import render
    from lightledger.tasks.run import reduce_visit

    visit = render("scan-transit", outdir, seed=3, n_exposures=n_exposures)
    with warnings.catch_warnings():
        warnings.simplefilter("error", RuntimeWarning)
        result = reduce_visit(visit, until=until, settings=settings, workers=1)
    assert result.ok, "\n".join(result.messages)
    return visit, result


def _bin_folder(outdir):
    (folder,) = sorted((outdir / "notebook").glob("bin-*"))
    return folder


def test_sparse_scan_orbits_match_the_truth(tmp_path):
    # 5 orbits of 5 exposures: 15.4 min apart within an orbit, 34 min across a gap.
    # The former rule (3 x the median interval = 46 min) merged them into one orbit.
    visit, result = _reduce(tmp_path, 25, until="bin")
    lc = Table.read(_bin_folder(tmp_path) / "lightcurves.fits", hdu="LIGHTCURVES")
    truth = Table.read(tmp_path / "truth.fits", hdu="EXPOSURES")
    np.testing.assert_array_equal(np.asarray(lc["orbit"]), np.asarray(truth["orbit"]))
    np.testing.assert_array_equal(np.flatnonzero(lc["first_in_orbit"]), 5 * np.arange(5))
    entry = json.loads((_bin_folder(tmp_path) / "entry.json").read_text())
    assert entry["metrics"]["orbits"] == 5
    assert not any("orbit" in line for line in entry.get("warnings", []))
    assert not any("orbit" in line for line in result.flags)


def test_ambiguous_orbits_warn_and_yield_to_the_observer(tmp_path):
    # 3 exposures per orbit: 30.8 min within, 34 min across: split right, with a warning
    # in the bin entry and on the console; the observer's threshold silences it.
    visit, result = _reduce(tmp_path, 15, until="bin")
    folder = _bin_folder(tmp_path)
    lc = Table.read(folder / "lightcurves.fits", hdu="LIGHTCURVES")
    truth = Table.read(tmp_path / "truth.fits", hdu="EXPOSURES")
    np.testing.assert_array_equal(np.asarray(lc["orbit"]), np.asarray(truth["orbit"]))
    entry = json.loads((folder / "entry.json").read_text())
    (line,) = [w for w in entry["warnings"] if w.startswith("orbits:")]
    assert "ambiguous" in line and "bin.orbit_gap_minutes" in line
    assert any("bin.orbit_gap_minutes" in flag for flag in result.flags)

    from lightledger.tasks.run import reduce_visit

    again = reduce_visit(visit, until="bin", settings=[("bin", "orbit_gap_minutes", 32.0)])
    assert again.ok and not any("orbit" in flag for flag in again.flags)
    entry = json.loads((again.final.parent / "entry.json").read_text())
    assert entry["metrics"]["orbit gap threshold (min)"] == 32.0
