"""Tests of lightledger.pipeline.scans (band-masked sums of read differences)."""

import warnings

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
        cover = (res.bits & dq.UNSCANNED) == 0
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
    assert np.all(res.bits[90, 30:32] & dq.UNSCANNED)
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
    assert res.bits[row, 60] & dq.RAMP_BREAK
    assert res.n_cosmic[k] >= 1
    # replaced by the median-filtered value: within 5 sigma of the clean sum at that pixel
    assert abs(res.flux[row, 60] - clean.flux[row, 60]) < 5 * np.sqrt(clean.variance[row, 60])


# --- cosmic rays against sharp spectral features ----------------------------------------


def lines_spectrum(peak=20000.0):
    """Source e-/s per column: a continuum with ends at zero (columns 0-5 and 114-119) and
    eight absorption lines 50-90 % deep, Gaussian sigma 0.5-1 column, two close pairs
    (40.0/43.6 and 71.2/74.8) with a sharp peak between them (an invented spectrum)."""
    x = np.arange(NX)
    spec = peak * (0.6 + 0.4 * np.exp(-0.5 * ((x - NX / 2) / 45.0) ** 2))
    spec *= np.clip((x - 5) / 6.0, 0, 1) * np.clip((NX - 6 - x) / 6.0, 0, 1)
    for centre, depth, sigma in LINES:
        spec *= 1 - depth * np.exp(-0.5 * ((x - centre) / sigma) ** 2)
    return spec


LINES = ((25.3, 0.7, 0.6), (40.0, 0.8, 0.8), (43.6, 0.6, 0.7), (60.5, 0.9, 0.5),
         (71.2, 0.5, 1.0), (74.8, 0.7, 0.6), (90.0, 0.8, 0.9), (100.4, 0.6, 0.7))
#: Columns within about 3 of a line centre (the lines and the peaks between close pairs).
LINE_COLUMNS = np.unique(np.concatenate([np.arange(int(c) - 3, int(c) + 5) for c, _, _ in LINES]))


def scan_charge(spec, v=0.8, y0=15.0, tilt=0.01, width=1.2):
    """Expected charge per difference (n_diff, ny, nx): the spectrum ``spec`` (e-/s per
    column) scanned at v rows/s from row y0 along a trace tilted by ``tilt`` rows per
    column, plus the sky."""
    t = np.arange(NREADS) * DT
    y = np.arange(NY)[:, None]
    centre = y0 + tilt * (np.arange(NX)[None, :] - NX / 2)
    out = []
    for k in range(NREADS - 1):  # loop over reads only
        taus = np.linspace(t[k], t[k + 1], 81)
        p = np.mean([np.exp(-0.5 * ((y - centre - v * tau) / width) ** 2) / (width * np.sqrt(2 * np.pi))
                     for tau in taus], axis=0)
        out.append(p * spec * DT + SKY * DT)
    return np.array(out), t


def test_no_false_jumps_at_narrow_deep_lines():
    from lightledger.pipeline.scans import _median_filter_rows

    spec = lines_spectrum()
    lam, t = scan_charge(spec)
    sigma = np.sqrt(2 * READ_NOISE ** 2 + lam)
    # the test has teeth: at this S/N a running median of 5 columns along the dispersion
    # undercuts the noiseless differences by more than 6 sigma at the sharp peaks
    undercut = (lam - _median_filter_rows(lam, 5)) > 6.0 * sigma
    assert undercut.sum() > 100 and np.isin(np.nonzero(undercut)[2], LINE_COLUMNS).all()
    rng = np.random.default_rng(48)
    n_false = n_pixels = 0
    pulls = []
    for _ in range(8):
        res = sum_scan(draw(rng, lam), t, read_noise=READ_NOISE)
        jump = (res.bits & dq.RAMP_BREAK) != 0
        n_false += np.count_nonzero(jump)
        n_pixels += int(((res.band_hi - res.band_lo + 1) * NX).sum())
        assert not jump[:, LINE_COLUMNS].any()
        pulls.append((res.flux.sum(axis=0) - spec * t[-1]) / np.sqrt(res.variance.sum(axis=0)))
    print(f"false RAMP_BREAK flags {n_false} of {n_pixels} in-band pixel-differences")
    # Monte Carlo: nothing was injected, so every RAMP_BREAK flag is a false alarm (none at the
    # lines, above); the budget is 0.01 % of the in-band pixel-differences, and with the
    # model's residual scatter (about 1.2 sigma) a 6-sigma test expects far fewer
    assert n_false <= 1e-4 * n_pixels
    # Deming et al. 2013: the sum of the differences is the flux, within photon and read
    # noise, column by column at the lines too: unit pulls averaged over 8 draws scatter
    # by 0.35 (4 sigma bound per column, 3 sigma on the mean of the line columns; a
    # replacement of the peaks by a running median, 1-2 % low, is 10 sigma per column here)
    pulls = np.array(pulls)[:, LINE_COLUMNS]
    print(f"line-column pulls: mean {pulls.mean():.3f}, std {pulls.std():.3f}")
    assert np.all(np.abs(pulls.mean(axis=0)) < 4 / np.sqrt(len(pulls)))
    assert abs(pulls.mean()) < 3 / np.sqrt(pulls.size)
    assert 0.8 < pulls.std() < 1.2


#: Shapes of the injected hits: single pixels and short tracks, (row, column) offsets.
TRACKS = {"single": [(0, 0)], "row 2": [(0, 0), (0, 1)], "row 3": [(0, 0), (0, 1), (0, 2)],
          "column 2": [(0, 0), (1, 0)], "column 3": [(0, 0), (1, 0), (2, 0)],
          "column 4": [(0, 0), (1, 0), (2, 0), (3, 0)], "diagonal 3": [(0, 0), (1, 1), (2, 2)]}


def test_cosmic_rays_and_tracks_found_with_few_false_alarms():
    # Anderson & Gordon 2011: completeness and false-alarm rate on injected hits, here
    # single pixels and short tracks of 10-40 sigma of the pixel's own noise, one per
    # difference at a random place in its band, on a smooth spectrum and on the lines
    # spectrum (bounds from the brief: >= 95 % found, false alarms < 0.1 % of the clean
    # in-band pixels)
    rng = np.random.default_rng(49)
    spectra = [lines_spectrum(), mean_charge(0.8, 15.0, flux=3000.0)[2]]
    scenes = [scan_charge(spec) for spec in spectra]
    found = {name: [0, 0] for name in TRACKS}
    n_false = n_pixels = 0
    pulls = []
    for i in range(48):
        lam, t = scenes[i % 2]
        sigma = np.sqrt(2 * READ_NOISE ** 2 + lam)
        reads = draw(rng, lam)
        lo, hi = find_bands(np.diff(reads, axis=0))[:2]  # the bands, for placing the hits
        injected = np.zeros((NY, NX), bool)
        hits = []
        for k in range(NREADS - 1):
            name = list(TRACKS)[rng.integers(len(TRACKS))]
            y0, x0 = rng.integers(lo[k], hi[k] + 1), rng.integers(0, NX - 3)
            pix = [(y0 + a, x0 + b) for a, b in TRACKS[name] if y0 + a < NY]
            if any(injected[q] for q in pix):
                continue
            for q in pix:
                reads[k + 1:, q[0], q[1]] += rng.uniform(10.0, 40.0) * sigma[k][q]
                injected[q] = True
            hits.append((name, k, pix))
        res = sum_scan(reads, t, read_noise=READ_NOISE, background="none")
        jump = (res.bits & dq.RAMP_BREAK) != 0
        for name, k, pix in hits:  # hits inside the band that the run found
            inside = [q for q in pix if res.band_lo[k] <= q[0] <= res.band_hi[k]]
            found[name][0] += sum(bool(jump[q]) for q in inside)
            found[name][1] += len(inside)
        n_false += np.count_nonzero(jump & ~injected)
        n_pixels += int(((res.band_hi - res.band_lo + 1) * NX).sum()) - int(injected.sum())
        # flux of the columns with hits, background included (background="none")
        cols = np.unique(np.nonzero(injected)[1])
        truth = spectra[i % 2][cols] * t[-1] + SKY * DT * (res.band_hi - res.band_lo + 1).sum()
        pulls += list((res.flux[:, cols].sum(axis=0) - truth) / np.sqrt(res.variance[:, cols].sum(axis=0)))
    pulls = np.array(pulls)
    print("found / injected:", {k: f"{a}/{b}" for k, (a, b) in found.items()},
          f"false alarms {n_false} of {n_pixels}; hit-column pulls mean {pulls.mean():.3f} "
          f"std {pulls.std():.3f} ({pulls.size})")
    # Deming et al. 2013: with the hits replaced by the model the columns' sums are the
    # flux within photon and read noise (3 sigma on the mean, unit scatter)
    assert abs(pulls.mean()) < 3 / np.sqrt(pulls.size) and 0.8 < pulls.std() < 1.25
    total = np.sum(list(found.values()), axis=0)
    assert total[1] > 500 and all(b >= 30 for _, b in found.values())
    assert total[0] >= 0.95 * total[1]
    assert all(a >= 0.9 * b for a, b in found.values())
    assert n_false < 1e-3 * n_pixels


@pytest.mark.parametrize("spectrum", ["lines", "smooth"])
def test_cosmic_rays_in_edge_columns_found(spectrum):
    # a hit in the first or last column is an outlier of its own (cut) window, not its
    # median (Anderson & Gordon 2011: detection against the pixel's own noise)
    spec = lines_spectrum() if spectrum == "lines" else mean_charge(0.8, 15.0, flux=3000.0)[2]
    lam, t = scan_charge(spec)
    rng = np.random.default_rng(50)
    for k, col in ((1, 0), (4, NX - 1), (5, 0)):
        reads = draw(rng, lam)
        lo, hi = find_bands(np.diff(reads, axis=0))[:2]
        row = (lo[k] + hi[k]) // 2
        reads[k + 1:, row, col] += 15.0 * np.sqrt(2 * READ_NOISE ** 2 + lam[k, row, col])
        res = sum_scan(reads, t, read_noise=READ_NOISE, background="none")
        assert res.bits[row, col] & dq.RAMP_BREAK, (k, col)
        assert np.count_nonzero(res.bits & dq.RAMP_BREAK) == 1


def test_dead_pixel_in_band_raises_no_jumps():
    # a pixel that collects nothing, not listed as bad, in the band's core at a line's
    # side: the column's scale is a robust fit, so the column's other pixels are not
    # taken for hits (the dead pixel itself is low, not high)
    lam, t = scan_charge(lines_spectrum())
    rng = np.random.default_rng(51)
    for col in (41, 42, 60):
        reads = draw(rng, lam)
        lo, hi = find_bands(np.diff(reads, axis=0))[:2]
        reads[:, (lo[3] + hi[3]) // 2, col] = reads[0, (lo[3] + hi[3]) // 2, col]
        res = sum_scan(reads, t, read_noise=READ_NOISE, background="none")
        assert not (res.bits & dq.RAMP_BREAK).any(), col


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
    for width in (0, 4, 2.5, True, "9"):
        with pytest.raises(ParameterError, match="cr_width"):
            sum_scan(reads, t, read_noise=READ_NOISE, cr_width=width)


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


@pytest.mark.parametrize("width", [3, 5, 7, 9])
def test_median_filter_rows_in_blocks_matches_scipy(width):
    # reference library: scipy.ndimage.median_filter, on frames of more windows than one
    # block of _FILTER_CHUNK, so the block edges and the rows laid end to end are crossed
    from scipy import ndimage

    from lightledger.pipeline.scans import _FILTER_CHUNK, _median_filter_rows

    rng = np.random.default_rng(46)
    frame = np.round(rng.normal(size=(3, 121, 53)), 1)  # ties
    assert frame.size > 2 * _FILTER_CHUNK
    ref = ndimage.median_filter(frame, size=(1, 1, width), mode="nearest")
    np.testing.assert_array_equal(_median_filter_rows(frame, width), ref)


def test_shared_comparison_medians_on_every_zero_one_input():
    # zero-one principle (Knuth, TAOCP vol. 3, sec. 5.3.4, from memory): a network of
    # elementwise min/max that picks the median of every input of zeros and ones picks
    # it of every input; numpy.median is the reference, on all 2**5 and 2**9 inputs
    from lightledger.pipeline.scans import _median5_flat, _median9_triples, _sort3

    for width in (5, 9):
        bits = (np.arange(2 ** width)[:, None] >> np.arange(width)[None, :]) & 1
        values = bits.astype(float)
        ref = np.median(values, axis=1)
        if width == 5:
            # each window of a row laid out as [w0 .. w4]: window 0 of a 5-long run
            got = np.array([_median5_flat(row, 1)[0] for row in values])
        else:
            lanes = values.T
            got = _median9_triples(*(_sort3(*lanes[o:o + 3]) for o in (0, 3, 6)))
        np.testing.assert_array_equal(got, ref)
    # and on random runs with ties, every window of the run
    rng = np.random.default_rng(47)
    run = np.round(rng.normal(size=300), 1)
    windows = np.lib.stride_tricks.sliding_window_view(run, 5)
    np.testing.assert_array_equal(_median5_flat(run, len(windows)), np.median(windows, axis=1))


@pytest.mark.parametrize("width", [1, 3, 5, 9, 11])
@pytest.mark.parametrize("nx", [3, 8, 40])
@pytest.mark.parametrize("with_nan", [False, True])
def test_cut_window_median_matches_slow_reference(width, nx, with_nan):
    # slow reference: numpy.nanmedian of the part of each window inside the frame
    # (NaN values left out, as _gathered_median documents)
    from lightledger.pipeline.scans import _cut_window_median

    rng = np.random.default_rng(48)
    values = np.round(rng.normal(size=(2, 4, nx)), 1)  # ties
    if with_nan:
        values[0, 1, nx // 2] = np.nan
    half = width // 2
    ref = np.empty(values.shape)
    with warnings.catch_warnings():  # a window of NaN only (width 1) has a NaN median
        warnings.simplefilter("ignore", RuntimeWarning)
        for k in range(values.shape[0]):
            for c in range(nx):
                ref[k, :, c] = np.nanmedian(values[k, :, max(c - half, 0):c + half + 1], axis=1)
    np.testing.assert_allclose(_cut_window_median(values, width), ref, rtol=1e-15, atol=0)


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


def _reference_band_model(d, usable, fill, level, read_var, flat, dark_charge, width=9):
    """_band_models' docstring spelled out for one difference's band rows (n_rows, nx):
    column by column, numpy.median over explicit lists of window columns."""
    n_rows, nx = d.shape
    half = width // 2

    def window(c):  # the window's columns that exist
        return list(range(max(c - half, 0), min(c + half + 1, nx)))

    def sigma(m):
        return np.sqrt(read_var + np.maximum(m * flat + dark_charge, 0.0)) / flat

    x = np.where(usable, d, fill) - level
    s = x.sum(axis=0)
    floor = 5.0 * np.sqrt(np.median(((read_var + np.maximum(level * flat + dark_charge, 0.0))
                                     / flat ** 2).sum(axis=0)))
    above = np.minimum(s, (fill - level).sum(axis=0)) > floor
    strong = np.array([above[c] and 2 * above[window(c)].sum() > len(window(c)) for c in range(nx)])
    source = np.zeros((n_rows, nx))
    if not strong.any():
        for c in range(nx):
            source[:, c] = np.median(x[:, window(c)], axis=1)
        return source + level, sigma(source + level)
    q = x / np.maximum(s, floor)
    p = np.zeros((n_rows, nx))
    spectrum_columns = np.nonzero(strong)[0]
    for c in spectrum_columns:
        p[:, c] = np.median(q[:, [j for j in window(c) if strong[j]]], axis=1)
    for c in np.nonzero(~strong)[0]:  # the nearest spectrum column, the left one on a tie
        p[:, c] = p[:, spectrum_columns[np.argmin(np.abs(spectrum_columns - c))]]
    sig = np.empty((n_rows, nx))
    for c in range(nx):
        pc, xc = p[:, c], x[:, c]
        core = usable[:, c] & (pc >= 0.25 * max(pc.max(), 0.0)) & (pc > 0)
        a0 = np.median(xc[core] / pc[core]) if core.any() else 0.0
        charge = np.maximum((a0 * pc + level) * flat[:, c] + dark_charge[:, c], 0.0)
        sig[:, c] = np.sqrt(read_var[:, c] + charge) / flat[:, c]
        keep = usable[:, c] & (np.abs(xc - a0 * pc) <= 4.0 * sig[:, c])
        w = pc[keep] / sig[keep, c] ** 2
        den = np.sum(w * pc[keep])
        source[:, c] = (np.sum(w * xc[keep]) / den if den > 0 else a0) * pc
    resid = x - source
    for c in np.nonzero(~strong)[0]:
        source[:, c] += np.median(resid[:, window(c)], axis=1)
    return source + level, sigma(source + level)


def test_band_models_match_slow_reference():
    # _band_models on all differences at once against the column-by-column reference
    # above, on bands of different heights with spectrum ends, a line 100 % deep (a
    # column without spectrum inside it), unusable pixels, hits and tracks, a dead pixel,
    # and one difference without any spectrum
    from scipy import ndimage

    from lightledger.pipeline.scans import _band_models

    rng = np.random.default_rng(52)
    n, height, nx = 4, 16, 50
    heights = [16, 12, 14, 16]
    cols = np.arange(nx)
    spec = 30000.0 * np.clip((cols - 6) / 5.0, 0, 1) * np.clip((nx - 8 - cols) / 5.0, 0, 1)
    spec *= (1 - 0.7 * np.exp(-0.5 * ((cols - 20.4) / 0.7) ** 2)) * np.where(cols == 31, 0.0, 1.0)
    rows = np.arange(height)[:, None] - 7.5 - 0.02 * (cols - nx / 2)
    prof = np.exp(-0.5 * (rows / 3.0) ** 2)
    prof /= prof.sum(axis=0)
    lam = 20.0 + prof[None] * spec[None, None, :] * np.array([1.0, 0.9, 1.1, 0.0])[:, None, None]
    d = rng.poisson(lam) + rng.normal(0, 20.0, lam.shape)
    d[0, 7, 12] += 3000.0
    d[1, 5, 22:25] += 2500.0
    d[2, 3:7, 40] += 800.0
    d[0, 8, 27] = 0.0
    usable = rng.random(d.shape) > 0.03
    fill = ndimage.median_filter(d, size=(1, 1, 5), mode="nearest")
    rows_ok = np.arange(height)[None, :] < np.array(heights)[:, None]
    level = np.array([19.0, 21.0, 20.5, 20.0])
    read_var = np.full(d.shape, 2 * 14.0 ** 2)
    flat = rng.uniform(0.9, 1.1, d.shape)
    dark = rng.uniform(0.0, 2.0, d.shape)
    args = [a.copy() for a in (d, usable, fill, rows_ok, level, read_var, flat, dark)]
    model, sigma = _band_models(d, usable, fill, rows_ok, level, read_var, flat, dark, width=9)
    for a, b in zip(args, (d, usable, fill, rows_ok, level, read_var, flat, dark)):
        np.testing.assert_array_equal(a, b)  # inputs not modified
    for k in range(n):
        h = heights[k]
        ref_m, ref_s = _reference_band_model(d[k, :h], usable[k, :h], fill[k, :h], level[k],
                                             read_var[k, :h], flat[k, :h], dark[k, :h])
        np.testing.assert_allclose(model[k, :h], ref_m, rtol=1e-10, atol=1e-9, err_msg=str(k))
        np.testing.assert_allclose(sigma[k, :h], ref_s, rtol=1e-10, atol=0, err_msg=str(k))
    # and the model does what it is for: the hits stand out, the clean pixels do not
    z = (d - model) / sigma
    assert z[0, 7, 12] > 20 and np.all(z[1, 5, 22:25] > 20) and np.all(z[2, 3:7, 40] > 15)
    clean = usable & rows_ok[:, :, None]
    clean[0, 7, 12] = clean[0, 8, 27] = False
    clean[1, 5, 22:25] = clean[2, 3:7, 40] = False
    assert z[clean].max() < 5.0


def _reference_sum_scan(r, t, s, sat, dark, flat, bad, background, destripe, pad_rows=3,
                        cr_threshold=6.0, clip_sigma=3.0, smooth_columns=9):
    """sum_scan's Notes on whole (n_diff, ny, nx) cubes: every pixel of every difference
    at once (the band model one difference at a time, by the slow reference above),
    numpy.nanmedian for the background level of each difference."""
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
    in_rows = (rows >= lo[:, None]) & (rows <= hi[:, None])
    dark_ok = np.where(np.isfinite(dark), dark, 0.0)
    model = np.zeros(d.shape)
    sigma = np.ones(d.shape)
    for k in range(n_reads - 1):  # the band model on each band's rows
        band = slice(lo[k], hi[k] + 1)
        level = np.median(filt[k][~in_rows[k]].mean(axis=1)) if (~in_rows[k]).any() else 0.0
        model[k, band], sigma[k, band] = _reference_band_model(
            d[k, band], usable[k, band], filt[k, band], level, 2.0 * s2[band], fl[band],
            dark_ok[band] * dt[k])
    charge = np.maximum(model * fl + dark * dt, 0.0)
    hit = in_band & usable & ((d - model) > cr_threshold * sigma)
    d = np.where(hit, model, d)
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
            bits[rej] |= dq.SKY_CLIPPED
    levels = np.array([np.nanmedian(b) for b in bk])
    flux = np.where(take, d - bk, 0.0).sum(axis=0)
    prev = np.concatenate([np.zeros((1, ny, nx), bool), take[:-1]])
    runs = (take & ~prev).sum(axis=0)
    var = (2.0 * s2 * runs + np.where(take, charge, 0.0).sum(axis=0)) / fl**2 + \
        np.where(take, bv, 0.0).sum(axis=0)
    covered = in_band.any(axis=0)
    var = np.where(covered, var, 2.0 * s2 / fl**2)
    bits[~covered] |= dq.UNSCANNED
    bits[hit.any(axis=0)] |= dq.RAMP_BREAK
    bits[satc.any(axis=0)] |= dq.OVERFILLED
    bits[covered & ~take.any(axis=0)] |= dq.NO_SLOPE
    bits[~finite.all(axis=0) | ~flat_ok | ~np.isfinite(dark)] |= dq.INVALID_VALUE
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
    assert res.n_cosmic.sum() > 0 and (res.bits & dq.OVERFILLED).any()
    assert np.all((res.band_lo[[2, 5]] <= 45) & (res.band_hi[[2, 5]] >= 45))
    for name, want in ref.items():
        got = getattr(res, name)
        if got.dtype.kind == "f":
            np.testing.assert_allclose(got, want, rtol=1e-12, atol=0, err_msg=name)
        else:
            np.testing.assert_array_equal(got, want, err_msg=name)
