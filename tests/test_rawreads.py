"""Reads that cannot be trusted, and light curves that cannot be trusted.

Saturation at the level itself: electronics that clip write the level, so a
read equal to it is saturated (common practice).  Clipped and wrapped reads
follow from the storage: a floating-point read of a noisy pixel never repeats
exactly, and integer storage of 2**bits values wraps a value that exceeds it
to value - 2**bits (the C and FITS integer conventions).  The ramps below are
built by hand so that each answer is known exactly.
"""

import numpy as np

from lightledger.pipeline import mask as dq
from lightledger.pipeline.calibrate import calibrate_exposure
from lightledger.pipeline.plausibility import assess_fits
from lightledger.pipeline.rawreads import (ReadSummary, clipped_reads, summarize_exposures,
                                           summarize_reads, untrusted_reads, wrapped_reads)

BIAS, SAT = 1000.0, 30000.0


def _ramps(rng, n_reads=6, shape=(8, 12), rate=2000.0):
    """Cumulative reads (ADU) growing by ``rate`` per read with 5 ADU of read noise."""
    steps = np.arange(n_reads, dtype=float)[:, None, None] * rate
    return BIAS + steps + rng.normal(0.0, 5.0, (n_reads,) + shape)


def _calibrate(reads, **extra):
    ny, nx = reads.shape[1:]
    return calibrate_exposure(reads, np.arange(reads.shape[0]) * 10.0, bias_adu=BIAS,
                              dark_rate=0.0, flat=None, nonlinearity=None, bad_pixels=None,
                              gain=1.0, read_noise=5.0, saturation_adu=SAT, scan_velocity=0.0,
                              background_method="none", **extra)


def test_a_read_at_the_saturation_level_is_saturated():
    reads = _ramps(np.random.default_rng(1))
    reads[3:, 2, 5] = BIAS + SAT          # clipped exactly at the level from read 3 on
    reads[4:, 6, 7] = BIAS + SAT - 0.5    # just below: not saturated
    cal = _calibrate(reads)
    assert cal.bits[2, 5] & dq.OVERFILLED
    assert not cal.bits[6, 7] & dq.OVERFILLED
    # the saturated pixel keeps the slope of its three clean reads: 2000 ADU per read
    assert abs(cal.flux[2, 5] / 50.0 - 2000.0 / 10.0) < 1.0


def test_an_exposure_clipped_after_its_first_read_is_saturated_everywhere():
    reads = _ramps(np.random.default_rng(2))
    reads[1:] = reads[0]                  # every read after the first repeats it
    assert clipped_reads(reads).all()
    summary = summarize_reads(reads, bias=BIAS, saturation=SAT)
    assert summary.n_usable == 0 and summary.n_clipped == summary.n_pixels
    cal = _calibrate(reads, detect_clipping=True)
    assert np.all(cal.bits & dq.OVERFILLED) and np.all(cal.bits & dq.NO_SLOPE)
    # a noisy exposure has no clipped read at all
    assert not clipped_reads(_ramps(np.random.default_rng(3))).any()


def test_clipping_at_a_ceiling_below_the_saturation_level():
    reads = _ramps(np.random.default_rng(4), rate=6000.0)
    ceiling = BIAS + 20000.0              # the electronics clip below the profile's level
    top = reads >= ceiling
    reads[top] = ceiling
    assert np.array_equal(clipped_reads(reads), top)
    cal = _calibrate(reads, detect_clipping=True)
    assert np.all(cal.bits[top.any(axis=0)] & dq.OVERFILLED)
    assert abs(np.median(cal.flux) / 50.0 - 6000.0 / 10.0) < 2.0


def test_integer_storage_that_wrapped_around():
    rng = np.random.default_rng(5)
    reads = np.round(_ramps(rng, rate=15000.0))     # true values reach 76000 ADU
    stored = np.mod(reads, 65536.0)                  # what unsigned 16-bit storage keeps
    expected = np.cumsum(reads >= 65536.0, axis=0) > 0
    assert np.array_equal(wrapped_reads(stored, 65536.0), expected)
    assert not wrapped_reads(stored, 0.0).any()      # floating-point storage never wraps
    assert np.array_equal(untrusted_reads(stored, bias=BIAS, saturation=1e9, span=65536.0),
                          expected)
    assert summarize_reads(stored, bias=BIAS, saturation=1e9, span=65536.0).n_wrapped == 96


def _summary_pixel_by_pixel(reads, bias, saturation, span, level):
    """The slow, obvious reference of a read summary: every pixel's ramp walked read by read."""
    n_reads, ny, nx = reads.shape
    counts = dict(n_not_finite=0, n_saturated=0, n_clipped=0, n_wrapped=0, n_usable=0)
    untrusted_from = []
    for y in range(ny):
        for x in range(nx):
            ramp = [float(v) for v in reads[:, y, x]]
            finite = [np.isfinite(v) for v in ramp]
            top = max([v for v, f in zip(ramp, finite) if f], default=-np.inf)
            at = [f and v == top for v, f in zip(ramp, finite)]
            clip = any(at[k] and at[k + 1] for k in range(n_reads - 1)) \
                and (level is None or top >= level)
            sat = [v - bias >= saturation for v in ramp]
            wrap = [span > 0 and k > 0 and ramp[k] - ramp[k - 1] < -0.5 * span for k in range(n_reads)]
            bad, first_bad = False, n_reads
            wrapped_here = False
            for k in range(n_reads):
                wrapped_here |= wrap[k]
                if sat[k] or (clip and at[k]) or wrapped_here:
                    bad = True
                if bad and first_bad == n_reads:
                    first_bad = k
            good = sum(1 for k in range(n_reads) if finite[k] and k < first_bad)
            counts["n_not_finite"] += not any(finite)
            counts["n_saturated"] += any(sat)
            counts["n_clipped"] += clip
            counts["n_wrapped"] += wrapped_here
            counts["n_usable"] += good >= 2
            if any(finite):
                untrusted_from.append(first_bad)
    first = max(untrusted_from) if untrusted_from else n_reads
    return ReadSummary(n_pixels=ny * nx, first_untrusted=first, **counts)


def test_a_block_of_exposures_is_summarised_as_each_alone_pixel_by_pixel():
    # every kind of read at once, exposure by exposure: NaN and infinite reads, saturation,
    # a clip below the level, integer wrap-around, an exposure saturated from read 2 on
    rng = np.random.default_rng(11)
    block = np.stack([np.round(_ramps(rng, n_reads=5, shape=(6, 7), rate=9000.0)) for _ in range(4)])
    block[0, 2:, 1, 1] = np.nan
    block[0, :, 2, 2] = np.inf
    block[1, :, 3, :] = np.nan
    block[1, 3:, 0, 0] = block[1, 3, 0, 0]                 # a clip
    block[2] = np.mod(block[2], 32768.0)                   # wraps from about read 3 on
    block[3, 2:] = BIAS + SAT + 5.0                        # saturated everywhere from read 2
    for span, level in ((0.0, None), (32768.0, BIAS + 0.5 * SAT)):
        got = summarize_exposures(block.astype(np.float32), bias=BIAS, saturation=SAT,
                                  span=span, clip_level=level)
        for i in range(block.shape[0]):
            want = _summary_pixel_by_pixel(block[i], BIAS, SAT, span, level)
            assert got[i] == want, (i, span)
            assert summarize_reads(block[i], bias=BIAS, saturation=SAT, span=span,
                                   clip_level=level) == want


def test_light_curves_that_cannot_be_trusted():
    # white: depth -1.0 with a 3000 ppm error (the degenerate fit of a visit inside its event);
    # a channel whose residuals are 10 times the noise; a sound channel; a channel not fitted
    q = assess_fits([-1.0, 0.012, 0.012, np.nan], [0.003, 0.0002, 0.0002, np.nan],
                    [0.0003, 0.003, 0.0003, np.nan], [0.0003, 0.0003, 0.0003, np.nan])
    assert q.unphysical.tolist() == [True, False, False, False]
    assert q.noisy.tolist() == [False, True, False, False]
    assert "negative beyond 3 times its error" in q.reasons[0]
    assert "10.0 times" in q.reasons[1]
    assert q.reasons[2] == q.reasons[3] == ""
    assert assess_fits([1.2], [0.01], [1e-4], [1e-4]).unphysical.tolist() == [True]
    # negative within its errors is noise, not unphysical
    assert assess_fits([-0.0004], [0.0002], [1e-4], [1e-4]).unphysical.tolist() == [False]
