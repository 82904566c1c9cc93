"""Tests of lightledger.pipeline.covariates on synthetic time grids with known orbits."""

import numpy as np
import pytest

from lightledger.pipeline.covariates import (exposure_covariates, orbit_numbers,
                                             running_median_outliers)
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
    assert 10 * 1.3 * MIN * 0.8 < thr < 10 * 1.3 * MIN * 1.2
    orbit2, thr2 = orbit_numbers(start, gap_minutes=10.0)
    np.testing.assert_array_equal(orbit2, truth)
    assert thr2 == pytest.approx(10 * MIN)
    # A continuous stare is one orbit however long its gaps.
    orbit3, _ = orbit_numbers(start, stare=True)
    assert np.all(orbit3 == 0)


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
