"""Sizes of rendered visits: orbits and exposures (lightledger.synthetic_data.sizes).

Checks against the scenario's own schedule rules (common practice for a
low-Earth orbit: exposures only inside each orbit's visibility window) and the
command line's contract (one-line error, exit status 2).
"""

import numpy as np
import pytest
from astropy.io import fits

from lightledger.pipeline.errors import ParameterError
from lightledger.synthetic_data import model as vm
from lightledger.synthetic_data.scenarios import get_scenario
from lightledger.synthetic_data.sizes import (MAX_ORBITS, MAX_STARE_EXPOSURES, exposure_range,
                                              max_per_orbit, resolve_size)
from lightledger.tasks.cli import main


def test_forty_orbits_fill_forty_visibility_windows():
    # The scan keeps its default exposures per orbit; every exposure lies inside the
    # visibility window of its orbit, one orbit period apart (the schedule's own rule).
    sc, n = resolve_size(get_scenario("scan-transit"), n_orbits=40)
    assert sc.n_orbits == 40 and n == 40 * 18
    model = vm.build_visit(sc, seed=0, n_exposures=n)
    assert np.array_equal(np.unique(model.orbit), np.arange(40))
    since = model.start - model.orbit * sc.orbit_period
    assert since.min() >= 0 and (since + model.exposure_time).max() <= sc.visibility + 1e-6
    assert np.all(np.diff(model.start) > model.exposure_time)
    # the event sits in the middle orbit, inside the visit
    assert model.bjd_tdb[0] < model.t0 < model.bjd_tdb[-1]


def test_limits_follow_the_visibility_window():
    sc = get_scenario("scan-transit")
    xpos = (sc.n_reads - 1) * sc.read_interval
    per = max_per_orbit(sc)
    # per exposure XPOSURE plus at least 10 s of overhead must fit in the window
    assert (per - 1) * (xpos + 10.0) + xpos <= sc.visibility < per * (xpos + 10.0) + xpos
    assert exposure_range(sc, 30) == (60, 30 * per)
    assert resolve_size(sc, n_orbits=30, n_exposures=30 * per)[1] == 30 * per
    with pytest.raises(ParameterError, match=f"from 60 to {30 * per}"):
        resolve_size(sc, n_orbits=30, n_exposures=30 * per + 1)
    with pytest.raises(ParameterError, match=f"1 to {MAX_ORBITS}"):
        resolve_size(sc, n_orbits=0)
    stare = get_scenario("stare-eclipse")
    assert resolve_size(stare, n_exposures=10000)[1] == 10000
    assert MAX_STARE_EXPOSURES >= 10000 and MAX_ORBITS >= 40
    with pytest.raises(ParameterError, match="orbiting scenarios only"):
        resolve_size(stare, n_orbits=3)
    with pytest.raises(ParameterError, match="from 2 to"):
        resolve_size(stare, n_exposures=1)


def test_simulate_takes_orbits(tmp_path, capsys):
    assert main(["simulate", "scan-transit", str(tmp_path / "v"), "--orbits", "2",
                 "--exposures", "4", "--seed", "3"]) == 0
    with fits.open(tmp_path / "v" / "truth.fits") as hdul:
        assert list(hdul["EXPOSURES"].data["orbit"]) == [0, 0, 1, 1]
    assert len(list((tmp_path / "v" / "raw").glob("*.fits"))) == 4
    capsys.readouterr()
    assert main(["simulate", "stare-eclipse", str(tmp_path / "w"), "--orbits", "2"]) == 2
    err = capsys.readouterr().err.strip().splitlines()
    assert len(err) == 1 and "orbiting scenarios only" in err[0]
    assert not (tmp_path / "w").exists()


def test_help_states_the_ranges(capsys):
    with pytest.raises(SystemExit):
        main(["simulate", "--help"])
    out = capsys.readouterr().out
    assert f"--orbits 1 to {MAX_ORBITS}" in out
    assert f"--exposures 2 to {MAX_STARE_EXPOSURES}" in out
