"""Tests of lightledger.pipeline.covariates on synthetic time grids with known orbits."""

import numpy as np
import pytest

from lightledger.pipeline.covariates import (exposure_covariates, orbit_numbers,
                                             running_median_outliers, shortest_orbit_period,
                                             split_orbits)
from lightledger.pipeline.errors import ParameterError

MIN = 1.0 / 1440.0


def _leo_grid(n_orbits=5, cadence_min=1.3, visible_min=50.0, period_min=96.0, jitter=0.0, seed=0):
    """Start times of a low-Earth-orbit visit: about 50 min of visibility per 96 min
    orbit (REFERENCES.md, facts of the trade, common practice)."""
    rng = np.random.default_rng(seed)
    starts, truth = [], []
    for o in range(n_orbits):
        t = o * period_min + np.arange(0.0, visible_min, cadence_min)
        t = t + rng.uniform(-jitter, jitter, t.size)
        starts.append(t)
        truth.append(np.full(t.size, o))
    return 2461000.0 + np.concatenate(starts) * MIN, np.concatenate(truth)


@pytest.mark.parametrize("jitter", [0.0, 0.2])
def test_orbit_numbers_on_grid_with_gaps(jitter):
    start, truth = _leo_grid(jitter=jitter, seed=3)
    orbit, thr = orbit_numbers(start)
    np.testing.assert_array_equal(orbit, truth)
    # the threshold lies between the longest cadence interval and the shortest gap
    dt = np.diff(start)
    assert dt[truth[1:] == truth[:-1]].max() < thr < dt[truth[1:] != truth[:-1]].min()
    assert split_orbits(start).note == ""
    orbit2, thr2 = orbit_numbers(start, gap_minutes=10.0)
    np.testing.assert_array_equal(orbit2, truth)
    assert thr2 == pytest.approx(10 * MIN)
    # A continuous stare is one orbit however long its gaps.
    orbit3, _ = orbit_numbers(start, stare=True)
    assert np.all(orbit3 == 0)


def _spread_grid(n_orbits, per_orbit, *, visible_min=63.0, period_min=95.6, exposure_min=1.4,
                 jitter_s=0.0, seed=0):
    """Start times of a low-Earth-orbit scan with few exposures spread evenly over each
    visibility window (a 63-min window of a 95.6-min orbit: about 33 min occulted;
    common practice for low orbits, numbers from memory)."""
    rng = np.random.default_rng(seed)
    step = (visible_min - exposure_min) / (per_orbit - 1)
    t = (np.arange(n_orbits)[:, None] * period_min + step * np.arange(per_orbit)[None, :]).ravel()
    t = t + rng.uniform(-jitter_s, jitter_s, t.size) / 60.0
    return 2461000.0 + t * MIN, np.repeat(np.arange(n_orbits), per_orbit)


def _from_intervals(intervals_min):
    return 2461000.0 + np.r_[0.0, np.cumsum(intervals_min)] * MIN


@pytest.mark.parametrize("per_orbit", [4, 5, 6, 9])
@pytest.mark.parametrize("jitter_s", [0.0, 3.0])
def test_sparse_visits_split_into_their_orbits(per_orbit, jitter_s):
    # Few exposures per orbit: the gap (about 34 min start to start) is only 1.7-5 times
    # the cadence (the old rule, 10 x the median interval, merged the visit into one orbit).
    start, truth = _spread_grid(5, per_orbit, jitter_s=jitter_s, seed=per_orbit)
    split = split_orbits(start)
    np.testing.assert_array_equal(split.orbit, truth)
    assert split.n_orbits == 5 and split.rule == "intervals" and split.note == ""
    assert orbit_numbers(start, gap_factor=10.0)[0].max() == 0     # what used to happen


def test_gaps_barely_longer_than_the_cadence_split_with_a_note():
    # Three exposures per orbit: 30.8 min apart within, 34 min across the gaps. Two sharp
    # populations, so the split is right, but a gap 10 % longer than the cadence is ambiguous.
    start, truth = _spread_grid(5, 3, jitter_s=2.0, seed=4)
    split = split_orbits(start)
    np.testing.assert_array_equal(split.orbit, truth)
    assert "ambiguous" in split.note and "30.8 min" in split.note


def test_two_exposures_per_orbit_cannot_be_told_and_say_so():
    # The spacing within an orbit (61.6 min) exceeds the gap (34 min): as many long
    # intervals as short ones, no rule on times alone can say which are the gaps.
    start, _ = _spread_grid(5, 2)
    split = split_orbits(start)
    assert split.n_orbits == 1 and "cannot tell" in split.note
    # the note reaches the covariates (and from there the bin entry's warnings)
    assert exposure_covariates(start).orbit_note == split.note


def test_buffer_dumps_stay_within_their_orbits():
    # Dense orbits with a buffer dump (an interval twice the cadence) after every 6th
    # exposure, and a skipped orbit in a sparse visit (common practice).
    cadence, orbit_dt, truth = 3.4, [], []
    for k in range(5):
        inside = np.full(17, cadence)
        inside[[5, 11]] = 2.0 * cadence
        orbit_dt += list(inside) + ([95.6 - inside.sum()] if k < 4 else [])
        truth += [k] * 18
    split = split_orbits(_from_intervals(orbit_dt))
    np.testing.assert_array_equal(split.orbit, truth)
    assert split.note == ""
    assert 2.0 * cadence * MIN < split.threshold < (95.6 - 61.0) * MIN
    # a sparse visit that skips one orbit: the doubled gap does not hide the ordinary ones
    sparse, truth = [], []
    for k in range(5):
        sparse += [12.2] * 5 + ([(191.2 if k == 2 else 95.6) - 61.0] if k < 4 else [])
        truth += [k] * 6
    split = split_orbits(_from_intervals(sparse))
    np.testing.assert_array_equal(split.orbit, truth)
    assert split.note == ""


def test_alternating_scan_directions_are_one_cadence():
    # Forward and reverse scans with different resets: two interval lengths within orbits.
    dt, truth = [], []
    for k in range(4):
        dt += list(np.tile([2.0, 3.2], 9)[:17]) + ([95.6 - 44.0] if k < 3 else [])
        truth += [k] * 18
    split = split_orbits(_from_intervals(dt))
    np.testing.assert_array_equal(split.orbit, truth)
    assert split.note == ""


def test_one_orbit_stays_one_orbit():
    # A single orbit (or a stare) has no occultation gap: jitter and buffer dumps do not split it.
    rng = np.random.default_rng(2)
    assert split_orbits(_from_intervals(3.4 + rng.uniform(-0.05, 0.05, 19))).n_orbits == 1
    assert split_orbits(_from_intervals([1.0, 1.01, 1.05])).n_orbits == 1
    assert split_orbits(_from_intervals([2.0])).n_orbits == 1
    one = np.full(19, 3.4)
    # a dump early in the orbit: the "second orbit" would last longer than the first's
    # spacing, impossible for occultations -> one orbit, with a note
    early = one.copy()
    early[4] = 5.1
    split = split_orbits(_from_intervals(early))
    assert split.n_orbits == 1 and "longer than the spacing" in split.note
    # dumps splitting the orbit evenly: "orbits" 27 min apart are shorter than any Earth
    # orbit, so the split carries a note
    even = one.copy()
    even[[4, 12]] = 8.5
    split = split_orbits(_from_intervals(even))
    assert "shorter than any orbit around the Earth" in split.note
    # intervals with no break at all
    smooth = np.geomspace(1.0, 3.0, 20)
    split = split_orbits(_from_intervals(smooth))
    assert split.n_orbits == 1
    assert split_orbits(_from_intervals(smooth), stare=True).rule == "stare"


def test_shortest_earth_orbit_period():
    # Kepler's third law at the Earth's equatorial radius: about 84.5 min (from memory).
    assert shortest_orbit_period() * 1440.0 == pytest.approx(84.49, abs=0.05)


def test_gap_overrides_are_checked():
    start, truth = _spread_grid(3, 6)
    np.testing.assert_array_equal(split_orbits(start, gap_minutes=20.0).orbit, truth)
    assert split_orbits(start, gap_minutes=20.0).rule == "minutes"
    with pytest.raises(ParameterError, match="gap_minutes"):
        split_orbits(start, gap_minutes=0.0)
    with pytest.raises(ParameterError, match="gap_factor"):
        split_orbits(start, gap_factor=1.0)


def test_covariate_columns():
    start, truth = _leo_grid(n_orbits=3)
    mid = start + 0.4 * MIN
    before = start.copy()
    cov = exposure_covariates(start, mid)
    np.testing.assert_array_equal(start, before)  # input not modified (STYLE.md)
    assert cov.n_orbits == 3
    first = np.flatnonzero(cov.first_in_orbit)
    np.testing.assert_array_equal(first, np.flatnonzero(np.diff(np.r_[-1, truth]) != 0))
    # Orbit time: measured from the orbit's first start, evaluated at mid time.
    np.testing.assert_allclose(cov.orbit_time[first], 0.4 * MIN, atol=1e-9)
    np.testing.assert_allclose(cov.orbit_time, mid - start[first][truth], atol=1e-12)
    np.testing.assert_allclose(cov.visit_time, mid - start[0], atol=1e-12)
    np.testing.assert_array_equal(cov.first_orbit, truth == 0)
    assert set(cov.columns()) == {"orbit", "orbit_time", "visit_time", "first_orbit",
                                  "first_in_orbit", "flux_outlier"}
    with pytest.raises(ParameterError, match="start_time"):
        exposure_covariates(start[::-1])


def test_flux_drop_flagged_robustly():
    # Injection-recovery: a sudden 3% loss of white flux in two exposures is found
    # against a running median; the transit-like smooth dip and the per-orbit ramps are not.
    rng = np.random.default_rng(11)
    start, truth = _leo_grid(n_orbits=4)
    t = (start - start[0]) / MIN
    cov0 = exposure_covariates(start)
    smooth = 1 - 0.01 * np.exp(-0.5 * ((t - 200.0) / 30.0) ** 2)
    ramp = 1 - 0.004 * np.exp(-cov0.orbit_time / (5 * MIN))
    white = 1e7 * smooth * ramp * (1 + 2e-4 * rng.normal(size=t.size))
    hit = np.array([17, 90])
    white[hit] *= 0.97
    white[55] = np.nan
    cov = exposure_covariates(start, white_flux=white, outlier_side="low")
    expected = np.zeros(t.size, bool)
    expected[hit] = True
    expected[55] = True  # non-finite counts as an outlier (mask contract)
    np.testing.assert_array_equal(cov.flux_outlier, expected)
    # Both sides: a 3% jump up is flagged too.
    white2 = white.copy()
    white2[60] *= 1.03
    out2 = running_median_outliers(white2, cov.orbit, side="both")
    assert out2[60] and out2[hit].all()
    with pytest.raises(ParameterError, match="window"):
        running_median_outliers(white, window=4)
