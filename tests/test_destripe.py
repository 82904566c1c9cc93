"""Tests of lightledger.pipeline.destripe (row and column 1/f stripes)."""

import numpy as np
import pytest

from lightledger.pipeline.destripe import destripe
from lightledger.pipeline.errors import ParameterError

NY, NX = 100, 180


def one_over_f(rng, n, amplitude):
    """A 1/f noise series of rms ``amplitude``: white noise shaped by 1/sqrt(f) in Fourier space."""
    spec = rng.normal(size=n // 2 + 1) + 1j * rng.normal(size=n // 2 + 1)
    f = np.fft.rfftfreq(n)
    f[0] = f[1]
    series = np.fft.irfft(spec / np.sqrt(f), n)
    return amplitude * series / series.std()


def striped(rng, n_frames=4):
    y = np.arange(NY)[:, None]
    source = 3000.0 * np.exp(-0.5 * ((y - 50.0) / 1.5) ** 2) * np.ones((1, NX))
    truth = 200.0 + source + rng.normal(0.0, 10.0, (n_frames, NY, NX))
    rows = np.array([one_over_f(rng, NY, 30.0) for _ in range(n_frames)])
    cols = np.array([one_over_f(rng, NX, 30.0) for _ in range(n_frames)])
    data = truth + rows[:, :, None] + cols[:, None, :]
    return data, truth


def stripe_power(residual):
    """Power of the row and column means of a residual frame (stack)."""
    return np.mean(residual.mean(axis=-1) ** 2) + np.mean(residual.mean(axis=-2) ** 2)


def test_destriping_lowers_striping_power_tenfold():
    rng = np.random.default_rng(60)
    data, truth = striped(rng)
    src = np.zeros((NY, NX), bool)
    src[44:57] = True
    src[:, :0] = True
    res = destripe(data, src, axes="both")
    # compare with the stripe-free truth; the common offset of a frame cannot be measured
    # without reference pixels (common practice), so remove each frame's mean first
    before = data - truth
    after = res.frames - truth
    before -= before.mean(axis=(1, 2), keepdims=True)
    after -= after.mean(axis=(1, 2), keepdims=True)
    ratio = stripe_power(before) / stripe_power(after)
    print(f"striping power reduced by {ratio:.1f}x")
    assert ratio >= 10.0
    # rows fully inside the source mask cannot be corrected: they keep their stripe
    assert np.all(res.row_offsets[:, 44:57] == 0.0)


def test_level_and_source_kept():
    rng = np.random.default_rng(61)
    data, truth = striped(rng, n_frames=1)
    src = np.zeros((NY, NX), bool)
    src[44:57, 20:160] = True
    res = destripe(data[0], src, axes="rows")
    # the masked median level of the frame is kept (offsets are relative to it)
    assert np.median(res.frames[~src]) == pytest.approx(np.median(data[0][~src]), abs=3.0)
    # source rows are corrected from the columns outside the source
    assert np.all(res.row_offsets[44:57] != 0.0)


def test_not_mutated_and_errors():
    rng = np.random.default_rng(62)
    data, _ = striped(rng, n_frames=2)
    d0 = data.copy()
    destripe(data, np.zeros((NY, NX), bool))
    np.testing.assert_array_equal(data, d0)
    with pytest.raises(ParameterError, match="axes"):
        destripe(data, np.zeros((NY, NX), bool), axes="diagonal")
