"""The lit part of a spectrum and the light of each channel (lightledger.pipeline.lit)."""

import numpy as np
import pytest

from lightledger.pipeline.errors import AllMaskedError, ParameterError
from lightledger.pipeline.lit import channel_light, lit_range


def band_pass(n=200, lo=60, hi=150, edge=3.0, level=1000.0):
    """A band-pass spectrum: two tanh edges (the shape the README's instruments follow)."""
    x = np.arange(n)
    return level * 0.25 * (1 + np.tanh((x - lo) / edge)) * (1 + np.tanh((hi - x) / edge))


def test_lit_range_matches_the_threshold_on_a_smooth_band_pass():
    # For a monotone edge a running median returns the centre value, so the lit
    # pixels are exactly those of the noiseless curve at or above the threshold
    # (definition of the threshold).
    spec = band_pass()
    edges = np.linspace(1.0, 3.0, spec.size + 1)
    lit = lit_range(edges, spec, 0.05)
    expected = np.flatnonzero(spec >= 0.05 * spec.max())
    assert lit.lo == pytest.approx(edges[expected[0]]) and lit.hi == pytest.approx(edges[expected[-1] + 1])
    assert lit.peak == pytest.approx(spec.max())


def test_lit_range_ignores_single_hot_pixels_and_keeps_inner_dark_bands():
    spec = band_pass()
    spec[10] = 1e6                    # hot pixel in the dark end
    spec[100:104] = 0.0               # a saturated absorption band inside the lit part
    spec[120] = np.nan                # a masked pixel
    edges = np.linspace(1.0, 3.0, spec.size + 1)
    lit = lit_range(edges, spec, 0.05)
    assert lit.lo > edges[40] and lit.hi < edges[170]
    assert not lit.lit[10] and not lit.lit[101]
    assert lit.peak == pytest.approx(band_pass().max(), rel=1e-6)
    assert lit_range(edges, spec, 0.0).lo == edges[0]
    with pytest.raises(AllMaskedError):
        lit_range(edges, np.zeros(spec.size), 0.05)
    with pytest.raises(ParameterError, match="threshold"):
        lit_range(edges, spec, 1.5)


def test_channel_light_is_the_mean_light_over_the_peak():
    spec = band_pass()
    spec[5] = 1e6                     # a hot pixel cannot light a dark channel
    edges = np.linspace(1.0, 3.0, spec.size + 1)
    # pixels 0-40 dark; 40-70 a third lit; 70-140 lit; 140-200 a sixth lit
    channels = np.array([1.0, 1.4, 1.7, 2.4, 3.0])
    light = channel_light(edges, spec, channels, band_pass().max())
    assert light[0] < 1e-3
    assert light[1] == pytest.approx(1 / 3, abs=0.03)
    assert light[2] == pytest.approx(1.0, abs=1e-3)
    assert light[3] == pytest.approx(1 / 6, abs=0.03)
