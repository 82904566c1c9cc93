"""The bin task's filling of pixels that are bad in every exposure.

A linear interpolation between finite neighbours is the reference (numpy.interp).
"""

import numpy as np

from lightledger.tasks.lightcurves import _bridge


def test_bridge_interpolates_interior_and_holds_ends():
    values = np.array([np.nan, 2.0, np.nan, np.nan, 8.0, np.nan])
    np.testing.assert_allclose(_bridge(values), [2.0, 2.0, 4.0, 6.0, 8.0, 8.0])


def test_bridge_leaves_finite_values_and_inputs_alone():
    values = np.array([1.0, 3.0, 5.0])
    out = _bridge(values)
    np.testing.assert_array_equal(out, values)
    assert out is not values
    assert np.all(_bridge(np.full(3, np.nan)) == 0.0)
