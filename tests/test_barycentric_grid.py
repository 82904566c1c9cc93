"""BJD_TDB from a coarse grid against the direct computation with astropy.

Reference: astropy's Time.tdb and Time.light_travel_time (through
lightledger.pipeline.timing.barycentric_times), evaluated at every instant;
Eastman, Siverd & Gaudi 2010 define BJD_TDB.  The requirement is agreement
within 1 ms over a visit; the observer's own term of a low Earth orbit
reaches +-23 ms (7000 km / c), so a wrong sign or frame would fail it.
"""

import numpy as np
import pytest
from astropy.time import Time, TimeDelta

from lightledger.pipeline.errors import ParameterError
from lightledger.pipeline.timing import barycentric_times, interpolated_barycentric_times
from lightledger.synthetic_data.timing import observer_position

MS = 1e-3


def _seconds(a, b):
    return np.abs(np.asarray(a) - np.asarray(b)) * 86400.0


def test_low_earth_orbit_visit_within_a_millisecond():
    # five 96-minute orbits with the observer's Earth-fixed position at every exposure
    start = Time("2023-05-17T03:12:40", scale="utc")
    mid = start + TimeDelta(np.sort(np.concatenate(
        [k * 5736.0 + np.linspace(0, 2900, 18) for k in range(5)])), format="sec")
    geo = observer_position(mid, altitude_km=550.0, inclination_deg=28.5)
    direct = barycentric_times(mid, 214.3712, 23.8127, obsgeo_m=geo)
    fast = interpolated_barycentric_times(mid, 214.3712, 23.8127, obsgeo_m=geo)
    assert np.max(_seconds(fast.bjd_tdb, direct.bjd_tdb)) < 1 * MS
    # the light travel time carries the full precision (no 2.5e6-day offset): microseconds
    assert np.max(np.abs(fast.light_travel_s - direct.light_travel_s)) < 0.01 * MS
    np.testing.assert_array_equal(fast.mjd_utc, direct.mjd_utc)
    # the observer's term matters at this level: leaving it out is tens of ms off
    centre = interpolated_barycentric_times(mid, 214.3712, 23.8127)
    assert np.max(np.abs(centre.light_travel_s - direct.light_travel_s)) > 10 * MS


def test_twelve_day_stare_across_a_leap_second():
    # from the geocentre, across the leap second at the end of 2016 (IERS Bulletin C 52)
    start = Time("2016-12-25T00:00:00", scale="utc")
    mid = start + TimeDelta(np.arange(0, 12 * 86400.0, 600.0), format="sec")
    direct = barycentric_times(mid, 61.0428, -47.3315)
    fast = interpolated_barycentric_times(mid, 61.0428, -47.3315, step_s=3600.0)
    assert np.max(_seconds(fast.bjd_tdb, direct.bjd_tdb)) < 1 * MS
    assert np.max(np.abs(fast.light_travel_s - direct.light_travel_s)) < 0.01 * MS


def test_one_instant_and_bad_input():
    t = Time(["2024-02-09T11:05:00"], scale="utc")
    direct = barycentric_times(t, 10.0, 20.0)
    fast = interpolated_barycentric_times(t, 10.0, 20.0)
    assert _seconds(fast.bjd_tdb, direct.bjd_tdb)[0] < 1 * MS
    with pytest.raises(ParameterError, match="step_s"):
        interpolated_barycentric_times(t, 10.0, 20.0, step_s=0.0)
    with pytest.raises(ParameterError, match="obsgeo_m"):
        interpolated_barycentric_times(t, 10.0, 20.0, obsgeo_m=np.zeros((2, 3)))
    with pytest.raises(ParameterError, match="dec_deg"):
        interpolated_barycentric_times(t, 10.0, 95.0)
