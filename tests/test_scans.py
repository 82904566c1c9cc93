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


# --- fast kernels against slow references ----------------------------------------------


@pytest.mark.parametrize("width", range(1, 13))
@pytest.mark.parametrize("nx", [1, 2, 4, 37])
def test_median_filter_rows_matches_scipy(width, nx):
    # reference library: scipy.ndimage.median_filter with a (1, width) window, edges repeated
    from scipy import ndimage

    from lightledger.pipeline.scans import _median_filter_rows

    rng = np.random.default_rng(45)
    frame = np.round(rng.normal(size=(6, nx)), 1)  # ties
    ref = ndimage.median_filter(frame, size=(1, width), mode="nearest")
    np.testing.assert_array_equal(_median_filter_rows(frame, width), ref)


def _reference_find_bands(d, ok, band_sigma, pad_rows, width, fallback):
    """find_bands spelled out: numpy.median per row, scipy's filter, a walk out from the peak."""
    from scipy import ndimage

    n, ny, nx = d.shape
    filled = d.copy()
    for k in range(n):
        for y in range(ny):
            good = ok[k, y]
            fill = np.median(d[k, y][good]) if good.any() else 0.0
            filled[k, y][~good] = fill
    filt = ndimage.median_filter(filled, size=(1, 1, width), mode="nearest") if width > 1 else filled
    lo, hi, found = np.zeros(n, int), np.zeros(n, int), np.zeros(n, bool)
    for k in range(n):
        prof = np.array([filt[k, y][ok[k, y]].sum() / max(ok[k, y].sum(), 1) for y in range(ny)])
        base = np.median(prof)
        # robust sigma = 1.4826 MAD (common practice), floored as documented
        scale = max(1.4826 * np.median(np.abs(prof - base)), 1e-12 * max(abs(base), 1.0))
        above = prof > base + band_sigma * scale
        above = above | (np.roll(above, 1) & np.roll(above, -1))  # one-row gaps closed
        if not above.any():
            lo[k], hi[k] = fallback
            continue
        found[k] = True
        peak = int(np.argmax(np.where(above, prof, -np.inf)))
        a = b = peak
        while a - 1 >= 0 and above[a - 1]:
            a -= 1
        while b + 1 < ny and above[b + 1]:
            b += 1
        lo[k], hi[k] = max(a - pad_rows, 0), min(b + pad_rows, ny - 1)
    return lo, hi, found, filt


@pytest.mark.parametrize("width", [1, 3, 5, 6, 11])
def test_find_bands_matches_slow_reference(width):
    rng = np.random.default_rng(46)
    n, ny, nx = 4, 40, 33
    d = rng.normal(0.0, 3.0, (n, ny, nx))
    for k in range(3):  # a band in three differences, none in the last
        d[k, 8 + 6 * k:13 + 6 * k] += 60.0
    d[rng.random(d.shape) < 0.03] = np.nan
    d[1, 12, 5] = np.inf
    d[0, 20, 3:9] += 400.0  # a short streak outside the band
    valid = rng.random(d.shape) > 0.05
    valid[2, 30] = False  # a row with no usable pixel
    d0 = d.copy()
    lo, hi, found, filt = find_bands(d, valid=valid, band_sigma=5.0, pad_rows=2, filter_width=width,
                                     fallback_rows=(5, 30))
    ok = valid & np.isfinite(d)
    rlo, rhi, rfound, rfilt = _reference_find_bands(d, ok, 5.0, 2, width, (5, 30))
    np.testing.assert_array_equal(d, d0)
    np.testing.assert_allclose(filt, rfilt, rtol=1e-12, atol=1e-12)
    np.testing.assert_array_equal(found, rfound)
    np.testing.assert_array_equal(lo, rlo)
    np.testing.assert_array_equal(hi, rhi)
    assert found[:3].all() and not found[3]


def _reference_sum_scan(r, t, s, sat, dark, flat, bad, background, destripe, pad_rows=3,
                        cr_threshold=6.0, clip_sigma=3.0, smooth_columns=9):
    """sum_scan's Notes on whole (n_diff, ny, nx) cubes: every pixel of every difference
    at once, numpy.nanmedian for the background level of each difference."""
    from lightledger.pipeline.background import clipped_mean, estimate_background
    from lightledger.pipeline.destripe import destripe as destripe_frames

    n_reads, ny, nx = r.shape
    dt = np.diff(t)[:, None, None]
    s2 = np.full((ny, nx), s * s)
    flat_ok = np.isfinite(flat) & (flat > 0)
    fl = np.where(flat_ok, flat, 1.0)
    finite = np.isfinite(r)
    satc = np.logical_or.accumulate(sat, axis=0)
    good = finite & ~satc
    valid = good[1:] & good[:-1] & np.isfinite(dark) & flat_ok
    d = np.where(valid, (np.diff(np.where(finite, r, 0.0), axis=0) - dark * dt) / fl, 0.0)
    usable = valid & ~bad
    lo, hi, found, filt = find_bands(d, valid=usable, pad_rows=pad_rows)
    rows = np.arange(ny)
    in_band = np.broadcast_to(((rows >= lo[:, None]) & (rows <= hi[:, None]))[:, :, None], d.shape)
    if destripe != "off":
        ds = destripe_frames(d, in_band.copy(), axes=destripe, mask=~usable)
        d = np.where(valid, ds.frames, 0.0)
        filt = filt - ds.row_offsets[:, :, None] - ds.column_offsets[:, None, :]
    charge = np.maximum(filt * fl + dark * dt, 0.0)
    with np.errstate(invalid="ignore", divide="ignore"):
        hit = in_band & usable & ((d - filt) > cr_threshold * np.sqrt(2.0 * s2 + charge) / fl)
    d = np.where(hit, filt, d)
    take = in_band & valid
    bk = np.zeros(d.shape)
    bv = np.zeros(d.shape)
    bits = np.zeros((ny, nx), dq.MASK_DTYPE)
    for k in range(n_reads - 1):  # the estimators take one frame
        if background == "rowcol":
            est = estimate_background(d[k], mask=~usable[k], source_mask=in_band[k], method="rowcol",
                                      sigma=clip_sigma, smooth_columns=smooth_columns)
            bk[k], bv[k] = est.background, est.variance
            bits |= est.bits
        elif background == "constant":
            out = usable[k] & ~in_band[k]
            mean, vmean, kept = clipped_mean(d[k][out], np.zeros(out.sum(), bool), sigma=clip_sigma)
            bk[k], bv[k] = mean, vmean
            rej = np.zeros((ny, nx), bool)
            rej[out] = ~kept
            bits[rej] |= dq.BACKGROUND_OUTLIER
    levels = np.array([np.nanmedian(b) for b in bk])
    flux = np.where(take, d - bk, 0.0).sum(axis=0)
    prev = np.concatenate([np.zeros((1, ny, nx), bool), take[:-1]])
    runs = (take & ~prev).sum(axis=0)
    var = (2.0 * s2 * runs + np.where(take, charge, 0.0).sum(axis=0)) / fl**2 + \
        np.where(take, bv, 0.0).sum(axis=0)
    covered = in_band.any(axis=0)
    var = np.where(covered, var, 2.0 * s2 / fl**2)
    bits[~covered] |= dq.OUTSIDE_BAND
    bits[hit.any(axis=0)] |= dq.JUMP
    bits[satc.any(axis=0)] |= dq.SATURATED
    bits[covered & ~take.any(axis=0)] |= dq.SHORT_RAMP
    bits[~finite.all(axis=0) | ~flat_ok | ~np.isfinite(dark)] |= dq.NOT_FINITE
    return dict(flux=flux, variance=var, bits=bits, band_lo=lo, band_hi=hi, band_found=found,
                background=levels, background_map=np.where(take, bk, 0.0).sum(axis=0),
                n_cosmic=hit.sum(axis=(1, 2)))


@pytest.mark.parametrize("background, destripe", [("rowcol", "off"), ("constant", "off"),
                                                  ("none", "off"), ("rowcol", "rows")])
def test_sum_scan_matches_whole_cube_reference(background, destripe):
    # the per-difference loop restricted to each band's rows against the same formulas on
    # whole cubes, on reads with NaNs, saturation, bad pixels, a dark, a flat with bad
    # values and cosmic rays inside and outside the bands
    lam, t, _ = mean_charge(0.8, 15.0)
    rng = np.random.default_rng(47)
    reads = draw(rng, lam)
    hits = rng.random(reads.shape) < 0.002
    reads += np.cumsum(np.where(hits, rng.uniform(500.0, 8000.0, reads.shape), 0.0), axis=0)
    reads[rng.random(reads.shape) < 0.002] = np.nan
    # with 12 rows of padding row 45 is inside the bands of differences 2 to 5; a lost
    # read 4 drops differences 3 and 4 there, so those pixels are summed in two runs
    reads[4, 45, 20:30] = np.nan
    sat = reads > 4500.0
    sat[3:, 50, 60] = True
    dark = rng.uniform(0.0, 0.2, (NY, NX))
    dark[7, 8] = np.nan
    flat = rng.uniform(0.9, 1.1, (NY, NX))
    flat[9, 10], flat[11, 12] = 0.0, np.nan
    bad = rng.random((NY, NX)) < 0.01
    args = (reads.copy(), t.copy(), sat.copy(), dark.copy(), flat.copy(), bad.copy())
    res = sum_scan(reads, t, read_noise=READ_NOISE, saturated=sat, dark_rate=dark, flat=flat, bad=bad,
                   background=background, destripe=destripe, pad_rows=12)
    for a, b in zip((reads, t, sat, dark, flat, bad), args):
        np.testing.assert_array_equal(a, b)  # inputs not modified
    ref = _reference_sum_scan(reads, t, READ_NOISE, sat, dark, flat, bad, background, destripe,
                              pad_rows=12)
    assert res.n_cosmic.sum() > 0 and (res.bits & dq.SATURATED).any()
    assert np.all((res.band_lo[[2, 5]] <= 45) & (res.band_hi[[2, 5]] >= 45))
    for name, want in ref.items():
        got = getattr(res, name)
        if got.dtype.kind == "f":
            np.testing.assert_allclose(got, want, rtol=1e-12, atol=0, err_msg=name)
        else:
            np.testing.assert_array_equal(got, want, err_msg=name)
