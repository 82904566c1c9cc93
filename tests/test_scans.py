"""Tests of lightledger.pipeline.scans (band-masked sums of read differences)."""

import numpy as np
import pytest

from lightledger.pipeline import mask as dq
from lightledger.pipeline.errors import ParameterError
from lightledger.pipeline.scans import find_bands, sum_scan

READ_NOISE = 14.0  # e- per read (REFERENCES.md, facts of the trade, from memory)
NREADS, DT, NY, NX = 8, 10.0, 100, 120
SKY = 1.0  # e-/s per pixel


def mean_charge(v, y0, flux=300.0, width=1.2):
    """Expected charge per difference (n_diff, ny, nx) of a PSF moving at v rows/s."""
    t = np.arange(NREADS) * DT
    y = np.arange(NY)[:, None]
    spec = flux * np.exp(-0.5 * ((np.arange(NX) - NX / 2) / 40.0) ** 2)
    out = []
    for k in range(NREADS - 1):  # loop over reads only
        taus = np.linspace(t[k], t[k + 1], 81)
        p = np.mean([np.exp(-0.5 * ((y - y0 - v * tau) / width) ** 2) / (width * np.sqrt(2 * np.pi))
                     for tau in taus], axis=0)
        out.append(p * spec * DT + SKY * DT)
    return np.array(out), t, spec


def draw(rng, lam):
    inc = rng.poisson(lam)
    q = np.concatenate([np.zeros((1,) + lam.shape[1:]), np.cumsum(inc, axis=0)])
    return q + rng.normal(0.0, READ_NOISE, q.shape)


@pytest.mark.parametrize("v, y0", [(0.8, 15.0), (-0.8, 85.0)])
def test_sum_recovers_injected_flux_forward_and_reverse(v, y0):
    lam, t, spec = mean_charge(v, y0)
    truth = spec.sum() * t[-1]
    rng = np.random.default_rng(40)
    pulls = []
    for _ in range(6):
        res = sum_scan(draw(rng, lam), t, read_noise=READ_NOISE)
        cover = (res.bits & dq.OUTSIDE_BAND) == 0
        pulls.append((res.flux.sum() - truth) / np.sqrt(res.variance[cover].sum()))
        # bands found from the data move with the scan direction and hold the PSF centre
        centre = y0 + v * 0.5 * (t[1:] + t[:-1])
        assert np.all((res.band_lo <= centre) & (centre <= res.band_hi))
        assert np.all(np.sign(np.diff(res.band_lo)) == np.sign(v))
        # background per difference: sky rate x interval (10 e-) within 1 e-; the
        # per-column estimate from ~80 rows has an error of about 0.5 e- before smoothing
        assert np.all(np.abs(res.background - SKY * DT) < 1.0)
    pulls = np.array(pulls)
    print(f"v={v}: pulls of the summed flux {np.round(pulls, 2)}")
    # Deming et al. 2013: the sum recovers the flux within photon (+read) noise; a 4-sigma
    # bound on each draw and a 3-sigma bound on their mean (flux lost in PSF wings beyond
    # the padded band is < 1e-4 of the total for these settings)
    assert np.all(np.abs(pulls) < 4)
    assert abs(pulls.mean()) < 3 / np.sqrt(pulls.size)


def test_cosmic_ray_outside_band_leaves_sum_unchanged():
    lam, t, _ = mean_charge(0.8, 15.0)
    rng = np.random.default_rng(41)
    reads = draw(rng, lam)
    clean = sum_scan(reads, t, read_noise=READ_NOISE)
    hit = reads.copy()
    hit[4:, 90, 30:32] += 5000.0  # hit between read 3 and 4, far from the band then
    k = 3
    assert not (clean.band_lo[k] <= 90 <= clean.band_hi[k])
    res = sum_scan(hit, t, read_noise=READ_NOISE)
    # row 90 is never crossed by the scan, so it stays outside every band
    assert np.all(res.bits[90, 30:32] & dq.OUTSIDE_BAND)
    sigma = np.sqrt(clean.variance)
    # Deming et al. 2013: differences masked to the band reject hits outside it; the only
    # change allowed is through the clipped background (a tiny fraction of a sigma)
    assert np.max(np.abs(res.flux - clean.flux) / sigma) < 0.05
    assert res.flux.sum() == pytest.approx(clean.flux.sum(), abs=0.01 * np.sqrt(clean.variance.sum()))


def test_cosmic_ray_inside_band_replaced_and_flagged():
    lam, t, _ = mean_charge(0.8, 15.0)
    rng = np.random.default_rng(42)
    reads = draw(rng, lam)
    clean = sum_scan(reads, t, read_noise=READ_NOISE)
    k = 2
    row = int(0.5 * (clean.band_lo[k] + clean.band_hi[k]))
    hit = reads.copy()
    hit[k + 1:, row, 60] += 8000.0
    res = sum_scan(hit, t, read_noise=READ_NOISE)
    assert res.bits[row, 60] & dq.JUMP
    assert res.n_cosmic[k] >= 1
    # replaced by the median-filtered value: within 5 sigma of the clean sum at that pixel
    assert abs(res.flux[row, 60] - clean.flux[row, 60]) < 5 * np.sqrt(clean.variance[row, 60])


def test_find_bands_noiseless_band():
    d = np.zeros((2, 40, 30))
    d[0, 10:14] = 100.0
    d[1, 20:23] = 100.0
    lo, hi, found, _ = find_bands(d + np.random.default_rng(43).normal(0, 1, d.shape), pad_rows=2)
    np.testing.assert_array_equal(lo, [8, 18])
    np.testing.assert_array_equal(hi, [15, 24])
    assert found.all()


def test_inputs_not_mutated_and_errors():
    lam, t, _ = mean_charge(0.8, 15.0)
    reads = draw(np.random.default_rng(44), lam)
    r0 = reads.copy()
    sum_scan(reads, t, read_noise=READ_NOISE, background="constant", destripe="rows")
    np.testing.assert_array_equal(reads, r0)
    with pytest.raises(ParameterError, match="background"):
        sum_scan(reads, t, read_noise=READ_NOISE, background="2d")
