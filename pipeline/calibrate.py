"""One exposure from raw reads (ADU) to a calibrated frame of electrons.

:func:`calibrate_exposure` chains the kernels of this package in the order
the detector asks for: bias, gain, saturation (in ADU above bias), non-linearity,
zero read, optional destriping (staring: the 1/f readout stream and column
offsets measured outside a two-dimensional source mask found from the
exposure), slope fit (staring) or band-masked difference sum (scan), dark,
flat, bad pixels and background.  It does no file I/O; the
caller passes reference arrays already cut to the subarray
(:func:`lightledger.pipeline.detector.cut_subarray`).
"""

from dataclasses import dataclass

import numpy as np

from . import mask as dq
from .background import estimate_background, source_mask_from_rows, trace_source_mask
from .destripe import destripe as _destripe
from .detector import linearize
from .errors import ParameterError
from .ramps import fit_ramps
from .rawreads import clipped_reads, wrapped_reads
from .scans import find_bands, sum_scan

__all__ = ["CalibratedExposure", "calibrate_exposure", "RAMP_METHODS", "BACKGROUND_METHODS",
           "DESTRIPE_MODES"]

#: Allowed values of ``ramp_method``.
RAMP_METHODS = ("fit", "diff")
#: Allowed values of ``background_method`` ("2d" for staring only, "constant" for scans only).
BACKGROUND_METHODS = ("rowcol", "2d", "constant", "none")
#: Allowed values of ``destripe``.
DESTRIPE_MODES = ("off", "differences", "frame")


@dataclass(frozen=True)
class CalibratedExposure:
    """A calibrated exposure; arrays have shape (ny, nx).

    Attributes
    ----------
    flux : ndarray of float64
        Electrons collected from read 0 to the last read (staring: rate times
        ``integration_time``), dark and background subtracted, divided by the
        flat.  NaN where no value could be formed (NO_SLOPE, INVALID_VALUE).
    variance : ndarray of float64
        Variance of ``flux``, e-**2, including the background estimate's.
    bits : ndarray of uint16
        Project flags (:mod:`lightledger.pipeline.mask`).
    background : ndarray of float64
        Background subtracted from each pixel, e-.
    background_level : float
        Median of ``background``, e- per pixel (scans: over pixels covered by
        a band).
    integration_time : float
        Seconds from the zero read to the last read.
    mid_time_offset : float
        Seconds after the zero read: mean time of the reads used (median over
        usable pixels for staring).
    flag_counts : dict of str to int
        :func:`lightledger.pipeline.mask.count_by_flag` of ``bits``.
    """

    flux: np.ndarray
    variance: np.ndarray
    bits: np.ndarray
    background: np.ndarray
    background_level: float
    integration_time: float
    mid_time_offset: float
    flag_counts: dict


def _value(x, unit, name):
    """Strip an astropy Quantity to ``unit``; plain numbers pass through."""
    if x is None:
        return None
    if hasattr(x, "unit"):
        import astropy.units as u
        try:
            return np.asarray(x.to_value(u.Unit(unit)), dtype=float)
        except u.UnitConversionError:
            raise ParameterError(f"{name} must be in units convertible to {unit}; got {x.unit}") from None
    return np.asarray(x, dtype=float)


def _frame(x, shape, name, default):
    if x is None:
        return np.full(shape, default, dtype=float)
    a = np.asarray(x, dtype=float)
    try:
        return np.broadcast_to(a, shape)
    except ValueError:
        raise ParameterError(f"{name} must be a scalar or have shape {shape}; got {a.shape}") from None


def calibrate_exposure(reads_adu, read_times, *, bias_adu, dark_rate, flat,
                       nonlinearity, bad_pixels, gain, read_noise,
                       saturation_adu, scan_velocity, source_rows=None,
                       ramp_method="fit", background_method="rowcol",
                       destripe="off", jump_threshold=5.0, weighting="optimal",
                       max_jumps=3, source_pad=3, destripe_axes="both",
                       background_options=None, scan_options=None, source_mask=None,
                       mask_options=None, destripe_options=None, detect_clipping=False,
                       clip_level=None, storage_span=0.0):
    """Calibrate one raw exposure of cumulative reads into electrons per pixel.

    Mask contract: pixels with a nonzero ``bad_pixels`` value get LISTED_BAD
    (their values are still computed); NaN or infinite raw values or reference
    values give INVALID_VALUE; pixels with no usable difference give NO_SLOPE
    and NaN flux and variance.  Pixels with any of
    :data:`lightledger.pipeline.mask.UNUSABLE_FLAGS` and the source rows are left
    out of the background estimate; bad, saturated and source pixels (a
    two-dimensional mask: trace rows x source columns) are left out of the
    destriping estimate.  The inputs are not modified.

    Parameters
    ----------
    reads_adu : array_like of shape (n_reads, ny, nx)
        Raw cumulative reads, ADU; read 0 right after reset.
    read_times : array_like of shape (n_reads,)
        Seconds after the zero read (``read_times[0]`` = 0), strictly increasing.
    bias_adu : float or array_like of shape (ny, nx)
        Reset level, ADU.
    dark_rate : float or array_like of shape (ny, nx), or None
        Dark current, e-/s (None = 0).  Not flat-fielded.
    flat : array_like of shape (ny, nx), or None
        Flat field evaluated at each pixel (mean about 1; None = 1).
    nonlinearity : array_like of shape (K, ny, nx), or None
        Coefficient cube C of :func:`lightledger.pipeline.detector.linearize`.
    bad_pixels : array_like of int or bool, shape (ny, nx), or None
        Nonzero = unusable.
    gain : float
        Electrons per ADU.
    read_noise : float or array_like of shape (ny, nx)
        Electrons per read.
    saturation_adu : float or array_like of shape (ny, nx), or None
        Saturation level, ADU above bias; reads at or above it are dropped
        (electronics that clip write the level itself).
    scan_velocity : float
        Rows per second; 0 = staring (slope fit), otherwise spatial scan
        (:func:`lightledger.pipeline.scans.sum_scan`).
    source_rows : tuple of int (row_lo, row_hi), optional
        Guess of the trace rows for the source masks (padded by
        ``source_pad``).  Without it the rows are found from the data with
        :func:`lightledger.pipeline.scans.find_bands`.  For scans it is the
        fallback band.
    ramp_method : {"fit", "diff"}
        Staring: up-the-ramp fit with ``weighting`` (see
        :func:`lightledger.pipeline.ramps.fit_ramps`), or the sum of read
        differences.  Both reject jumps.
    background_method : {"rowcol", "2d", "constant", "none"}
        Staring: "rowcol" or "2d" of
        :func:`lightledger.pipeline.background.estimate_background`.  Scans:
        "rowcol" or "constant", applied per difference.
    destripe : {"off", "differences", "frame"}
        Remove 1/f read noise (:func:`lightledger.pipeline.destripe.destripe`,
        by default the readout-stream model with column offsets) from each
        read difference before the fit, or from the final staring frame.
        Scans accept "off" and "differences" (row and column medians in
        :func:`lightledger.pipeline.scans.sum_scan`).
    jump_threshold : float
        Jump threshold in sigma (staring).
    weighting : {"optimal", "unweighted"}
        Slope weights for ``ramp_method="fit"``.
    max_jumps : int
        Jumps removed per pixel at most.
    source_pad : int
        Rows added on each side of the source rows in the background mask.
    destripe_axes : {"rows", "columns", "both"}
        Which stripes :func:`destripe` removes.
    background_options, scan_options : dict, optional
        Extra keyword options passed to ``estimate_background`` and
        ``sum_scan``.
    source_mask : array_like of bool, shape (ny, nx), optional
        Staring: the source pixels (True) to leave out of destriping and
        background, e.g. one mask for a whole visit.  Default: found from the
        exposure when destriping, by
        :func:`lightledger.pipeline.background.trace_source_mask` on the last
        read minus the zero read, with the source rows as the guess; the
        background then also leaves out the padded source rows.
    mask_options : dict, optional
        Extra keyword options passed to ``trace_source_mask`` (``n_sigma``,
        ``row_pad``, ``column_pad``, ``min_run``, ``pixel_sigma``,
        ``grow_sigma``, ``grow_width``); defaults here ``row_pad=1`` and
        ``grow_sigma=2.0``, so that neither the profile's wing next to the
        detected rows nor the spectrum's faint ends are used to measure the
        stripes.
    destripe_options : dict, optional
        Extra keyword options passed to ``destripe`` for staring exposures;
        default ``{"method": "stream", "smoothing": "gap"}`` (the stream
        model, its smoothness measured at the rows it bridges across the
        trace; ``"median"`` gives row and column medians; ``smoothing``,
        ``clip``, ``iterations``, ``min_pixels``).
    detect_clipping : bool, optional
        Also drop, like saturated reads, reads that repeat their pixel's top
        value exactly (a clip; :func:`lightledger.pipeline.rawreads.clipped_reads`
        with ``clip_level``) and reads after an integer-storage wrap-around
        (:func:`lightledger.pipeline.rawreads.wrapped_reads` with
        ``storage_span`` ADU).  Off by default: noiseless test ramps of zero
        flux repeat their value.

    Returns
    -------
    CalibratedExposure

    Raises
    ------
    ParameterError
        Wrong shapes, non-positive gain, negative read noise or an unknown
        option value.
    AllMaskedError
        Nothing is left for the background estimate.

    Notes
    -----
    Electrons above bias ``e = (read - bias) gain`` are linearised, then taken
    relative to read 0.  Staring: ``flux = (rate - dark) T / flat`` with
    ``T = t_last - t_0``; ``var flux = var(rate) T**2 / flat**2`` (the slope's
    read and Poisson variance, :func:`fit_ramps`), plus the background
    estimate's variance after the background is subtracted.  The dark and flat
    references are taken as exact, and so is the destriping pattern (its own
    estimation noise, a few per cent of a pixel's variance, is not added; see
    :func:`lightledger.pipeline.destripe.destripe`).  Scans: see
    :func:`sum_scan`.

    References
    ----------
    Fixsen, D. J., et al. 2000, PASP 112, 1350 (slope weights).
    Anderson, R. E., & Gordon, K. D. 2011, PASP 123, 1237 (jumps).
    Deming, D., et al. 2013, ApJ 774, 95 (scans).
    """
    if ramp_method not in RAMP_METHODS:
        raise ParameterError(f"ramp_method must be one of {RAMP_METHODS}; got {ramp_method!r}")
    if background_method not in BACKGROUND_METHODS:
        raise ParameterError(f"background_method must be one of {BACKGROUND_METHODS}; got {background_method!r}")
    if destripe not in DESTRIPE_MODES:
        raise ParameterError(f"destripe must be one of {DESTRIPE_MODES}; got {destripe!r}")
    if weighting not in ("optimal", "unweighted"):
        raise ParameterError(f"weighting must be 'optimal' or 'unweighted'; got {weighting!r}")

    r = _value(reads_adu, "adu", "reads_adu")
    if r.ndim != 3 or r.shape[0] < 2:
        raise ParameterError(f"reads_adu must have shape (n_reads >= 2, ny, nx); got {r.shape}")
    n_reads, ny, nx = r.shape
    shape = (ny, nx)
    t, g, rn = detector_numbers(read_times, n_reads, gain, read_noise)
    v = float(_value(scan_velocity, "1 / s", "scan_velocity"))
    if not np.isfinite(v):
        raise ParameterError(f"scan_velocity must be a finite number of rows/s (0 = staring); got {scan_velocity}")
    scanning = v != 0.0
    if scanning and background_method == "2d":
        raise ParameterError("background_method='2d' is for staring exposures; use 'rowcol', 'constant' or 'none' for scans")
    if not scanning and background_method == "constant":
        raise ParameterError("background_method='constant' is for scans; use 'rowcol', '2d' or 'none' for staring")
    if scanning and destripe == "frame":
        raise ParameterError("destripe='frame' is for staring exposures; use 'off' or 'differences' for scans")

    bias, dark, fl, badref, nl, ref_bad = reference_frames(
        shape, bias_adu=bias_adu, dark_rate=dark_rate, flat=flat, bad_pixels=bad_pixels,
        nonlinearity=nonlinearity)

    above = r - bias
    saturated = None
    if saturation_adu is not None:
        sat_level = _frame(_value(saturation_adu, "adu", "saturation_adu"), shape, "saturation_adu", np.inf)
        with np.errstate(invalid="ignore"):
            saturated = above >= sat_level
    if detect_clipping:
        untrusted = clipped_reads(r, clip_level) | wrapped_reads(r, storage_span)
        saturated = untrusted if saturated is None else saturated | untrusted
    e = linearize(above * g, nl)
    e = e - e[0]
    fl_safe = np.where(np.isfinite(fl) & (fl > 0), fl, 1.0)

    # source mask: the given rows, or rows found from the data
    if source_rows is None:
        lo, hi, found, _ = find_bands(np.nan_to_num(e[-1:] - e[:1]), pad_rows=source_pad)
        rows = (int(lo[0]), int(hi[0])) if found[0] else None
        smask = source_mask_from_rows(shape, rows)
    else:
        rows = tuple(source_rows)
        smask = source_mask_from_rows(shape, rows, pad=source_pad)
    # destriping mask: two-dimensional, from the caller or from the exposure itself
    dmask = None
    if source_mask is not None:
        dmask = np.asarray(source_mask, dtype=bool)
        if dmask.shape != shape:
            raise ParameterError(f"source_mask must have shape {shape}; got {dmask.shape}")
        smask = dmask
    elif destripe != "off" and not scanning:
        # one row beyond the detected trace rows holds the profile's wing, and the spectrum's
        # faint ends continue beyond the single-column detection: light left there enters the
        # stripe estimate and is bridged into the trace rows (a deficit of the source flux)
        mopts = {"row_pad": 1, "grow_sigma": 2.0}
        mopts.update(mask_options or {})
        raw_bad = badref | ref_bad | ~np.all(np.isfinite(e), axis=0)
        dmask = trace_source_mask(np.nan_to_num(e[-1] - e[0]), rows=rows, mask=raw_bad, **mopts).mask
        smask = smask | dmask
    dopts = {"method": "stream", "smoothing": "gap"}
    dopts.update(destripe_options or {})

    bopts = dict(background_options or {})
    if scanning:
        sopts = dict(scan_options or {})
        sopts.setdefault("fallback_rows", None if source_rows is None else rows)
        res = sum_scan(e, t, read_noise=rn, saturated=saturated, dark_rate=dark, flat=fl, bad=badref | ref_bad,
                       background=background_method,
                       destripe=destripe_axes if destripe == "differences" else "off", **sopts)
        flux, var = res.flux, res.variance
        bits = res.bits.copy()
        bkg = res.background_map
        covered = (bits & dq.UNSCANNED) == 0
        level = float(np.median(bkg[covered])) if covered.any() else 0.0
        mid = float(np.mean(t))
    else:
        sat_any = np.zeros(shape, bool) if saturated is None else np.any(saturated, axis=0)
        if destripe == "differences":
            d = np.diff(e, axis=0)
            ds = _destripe(d, dmask, axes=destripe_axes, mask=badref | ref_bad | sat_any, **dopts)
            e = np.concatenate([np.zeros((1, ny, nx)), np.cumsum(ds.frames, axis=0)], axis=0)
        fit = fit_ramps(e, t, read_noise=rn, saturated=saturated,
                        weighting=weighting if ramp_method == "fit" else "sum",
                        jump_threshold=jump_threshold, max_jumps=max_jumps)
        T = float(t[-1])
        flux = (fit.rate - dark) * T / fl_safe
        var = fit.rate_variance * (T / fl_safe) ** 2
        bits = fit.bits.copy()
        bits[ref_bad] |= dq.INVALID_VALUE
        flux = np.where(ref_bad, np.nan, flux)
        var = np.where(ref_bad, np.nan, var)
        if destripe == "frame":
            flux = _destripe(flux, dmask, axes=destripe_axes,
                             mask=badref | sat_any | dq.to_boolean(bits), **dopts).frames
        if background_method == "none":
            bkg = np.zeros(shape)
            level = 0.0
        else:
            est = estimate_background(flux, mask=badref | dq.to_boolean(bits), source_mask=smask,
                                      method=background_method, **bopts)
            bkg = est.background
            level = est.level
            flux = flux - bkg
            var = var + est.variance
            bits |= est.bits
        usable = ~dq.to_boolean(bits) & ~badref
        mt = fit.mean_read_time[usable]
        mid = float(np.median(mt)) if mt.size else float(np.mean(t))
    bits[badref] |= dq.LISTED_BAD
    return CalibratedExposure(flux=flux, variance=var, bits=bits, background=bkg,
                              background_level=level, integration_time=float(t[-1]),
                              mid_time_offset=mid, flag_counts=dq.count_by_flag(bits))


def reference_frames(shape, *, bias_adu, dark_rate, flat, bad_pixels, nonlinearity):
    """Broadcast and check the reference frames of one subarray.

    Parameters
    ----------
    shape : tuple of int
        ``(ny, nx)`` of the subarray.
    bias_adu, dark_rate, flat, bad_pixels, nonlinearity
        As in :func:`calibrate_exposure` (scalars, frames or `None`).

    Returns
    -------
    bias : ndarray, ADU
    dark : ndarray, electron / s
    flat : ndarray
    listed_bad : ndarray of bool
        Pixels the bad-pixel list names.
    nonlinearity : ndarray of shape (K, ny, nx) or None
    unusable : ndarray of bool
        Pixels whose references are not finite, or whose flat is not positive.
    """
    ny, nx = shape
    bias = _frame(_value(bias_adu, "adu", "bias_adu"), shape, "bias_adu", 0.0)
    dark = _frame(_value(dark_rate, "electron / s", "dark_rate"), shape, "dark_rate", 0.0)
    fl = _frame(flat, shape, "flat", 1.0)
    badref = np.zeros(shape, bool) if bad_pixels is None else \
        np.asarray(_frame(bad_pixels, shape, "bad_pixels", 0)) != 0
    nl = None
    if nonlinearity is not None:
        nl = np.asarray(nonlinearity, dtype=float)
        if nl.ndim == 2:
            nl = nl[None]
        if nl.shape[1:] != shape and nl.ndim == 3:
            raise ParameterError(f"nonlinearity must have shape (K, {ny}, {nx}); got {nl.shape}")
    unusable = ~np.isfinite(bias) | ~np.isfinite(dark) | ~np.isfinite(fl) | (fl <= 0)
    if nl is not None:
        unusable |= ~np.all(np.isfinite(nl), axis=0)
    return bias, dark, fl, badref, nl, unusable


def detector_numbers(read_times, n_reads, gain, read_noise):
    """Check the read times, gain and read noise of a ramp of ``n_reads`` reads.

    Returns
    -------
    t : ndarray, s
        Read times since the first read.
    gain : float, electron / ADU
    read_noise : float or ndarray, electron per read
    """
    t = _value(read_times, "s", "read_times")
    if t.shape != (n_reads,) or not np.all(np.isfinite(t)) or np.any(np.diff(t) <= 0):
        raise ParameterError(f"read_times must be finite, strictly increasing, shape ({n_reads},)")
    t = t - t[0]
    g = float(_value(gain, "electron / adu", "gain"))
    if not (np.isfinite(g) and g > 0):
        raise ParameterError(f"gain must be a finite number > 0 electrons per ADU; got {gain}")
    rn = _value(read_noise, "electron", "read_noise")
    if np.any(~np.isfinite(rn)) or np.any(rn < 0):
        raise ParameterError("read_noise must be finite and >= 0 electrons per read")
    return t, g, rn
