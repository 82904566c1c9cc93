"""A chunk of exposures from raw reads to calibrated frames, calibrated as arrays.

:func:`calibrate_chunk` gives, for every exposure of a chunk, what
:func:`lightledger.pipeline.calibrate.calibrate_exposure` (the slow,
obviously correct reference, one exposure at a time) gives, computed for
blocks of exposures at once.  For staring exposures every step is one
operation over the block: bias, saturation, clipped and wrapped reads,
non-linearity and the zero read on a (reads, exposures, rows, columns) cube;
the up-the-ramp fit (:func:`lightledger.pipeline.ramps.fit_ramps`, which
treats pixels independently) on the block seen as one tall frame of
``exposures x rows`` rows; the source masks by
:func:`lightledger.pipeline.tracemasks.trace_source_masks`; the sky by the
column model of :func:`lightledger.pipeline.background.estimate_background`
with the clipped column means of the whole block in one call.  Only the
destriping keeps a loop over the exposures of a block: its smoother's
tridiagonal factorisation belongs to each exposure's own source mask.
Scanned exposures, and options this form does not cover (``"2d"``
background, ``"frame"`` destriping, a given source mask, source rows found
from the data), are calibrated one at a time by the reference.

The numbers are the reference's: the same operations on the same values,
with sums over the pixels of a row or column taken in another order in a few
places (the sky's boxcar, the trace masks' means), which changes them by a
few parts in 1e16.  The tests compare the two on rendered visits.

Cost, for blocks of :data:`BLOCK` exposures: the fixed cost of the numpy
calls is paid once per block instead of once per exposure; memory is a few
float64 copies of a block's reads.
"""

from dataclasses import dataclass

import numpy as np

from . import mask as dq
from .calibrate import (BACKGROUND_METHODS, RAMP_METHODS, _frame, _value, calibrate_exposure,
                        detector_numbers, reference_frames)
from .clipping import _clipped_mean_columns
from .destripe import destripe as _destripe
from .detector import linearize
from .errors import AllMaskedError, ParameterError
from .ramps import fit_ramps
from .rawreads import clipped_reads, wrapped_reads
from .sourcemask import source_mask_from_rows
from .tracemasks import trace_source_masks

__all__ = ["CalibratedChunk", "ExposureSetup", "calibrate_chunk", "BLOCK"]

#: Exposures calibrated together (a block's reads and their float64 copies stay within a few MB
#: for frames of 10^4 pixels; larger frames take fewer).
BLOCK = 16
#: Pixel-reads of float64 per block at most (about 6 MB).
BLOCK_VALUES = 800_000


@dataclass(frozen=True)
class ExposureSetup:
    """What differs from exposure to exposure in :func:`calibrate_chunk`.

    Attributes
    ----------
    read_times : tuple of float
        Seconds after the zero read.
    scan_velocity : float
        Rows per second; 0 = staring.
    source_rows : tuple of int or None
        ``source_rows`` of :func:`calibrate_exposure`.
    destripe : str
        ``destripe`` of :func:`calibrate_exposure`.
    clip_level : float, array or None
        ``clip_level`` of :func:`calibrate_exposure` (``detect_clipping`` is on
        when the chunk says so).
    storage_span : float
        ``storage_span`` of :func:`calibrate_exposure`.
    scan_options : dict or None
        ``scan_options`` of :func:`calibrate_exposure`.
    """

    read_times: tuple
    scan_velocity: float = 0.0
    source_rows: tuple | None = None
    destripe: str = "off"
    clip_level: object = None
    storage_span: float = 0.0
    scan_options: dict | None = None

    def key(self):
        """Exposures with equal keys are calibrated in one block."""
        level = self.clip_level
        level_key = None if level is None else id(level)
        return (tuple(self.read_times), float(self.scan_velocity),
                None if self.source_rows is None else tuple(self.source_rows), self.destripe,
                level_key, float(self.storage_span),
                tuple(sorted((self.scan_options or {}).items())))


@dataclass(frozen=True)
class CalibratedChunk:
    """Calibrated exposures of a chunk; per-pixel arrays have shape (n, ny, nx).

    Attributes
    ----------
    flux, variance : ndarray of float32
        As :class:`~lightledger.pipeline.calibrate.CalibratedExposure`, stored
        in float32 (7 significant digits, far below any pixel's noise).
    bits : ndarray of uint16
    background_level, integration_time, mid_time_offset : ndarray of float, shape (n,)
    flag_counts : dict of str to ndarray of int, shape (n,)
        Pixels carrying each flag, per exposure.
    """

    flux: np.ndarray
    variance: np.ndarray
    bits: np.ndarray
    background_level: np.ndarray
    integration_time: np.ndarray
    mid_time_offset: np.ndarray
    flag_counts: dict


def calibrate_chunk(reads_adu, setups, *, bias_adu, dark_rate, flat, nonlinearity, bad_pixels,
                    gain, read_noise, saturation_adu, ramp_method="fit",
                    background_method="rowcol", jump_threshold=5.0, weighting="optimal",
                    max_jumps=3, source_pad=3, destripe_axes="both", detect_clipping=False,
                    background_options=None, mask_options=None, destripe_options=None,
                    progress=None):
    """Calibrate a chunk of raw exposures, as :func:`calibrate_exposure` does each of them.

    Mask contract and every keyword as in
    :func:`~lightledger.pipeline.calibrate.calibrate_exposure`, for every
    exposure; what differs between exposures is in ``setups``.  The inputs
    are not modified.

    Parameters
    ----------
    reads_adu : array_like of shape (n, n_reads, ny, nx)
        Raw cumulative reads of each exposure, ADU (float32 is kept as is).
    setups : sequence of ExposureSetup
        One per exposure.
    progress : callable, optional
        ``progress(done)``: exposures done so far, after each block.

    Returns
    -------
    CalibratedChunk

    Raises
    ------
    ParameterError, AllMaskedError
        As the reference.
    """
    r = np.asarray(reads_adu)
    if r.dtype not in (np.float32, np.float64):
        r = r.astype(float)
    if r.ndim != 4 or r.shape[1] < 2:
        raise ParameterError(f"reads_adu must have shape (n, n_reads >= 2, ny, nx); got {r.shape}")
    n, n_reads, ny, nx = r.shape
    if len(setups) != n:
        raise ParameterError(f"setups must hold one ExposureSetup per exposure ({n}); got {len(setups)}")
    for name, value, allowed in (("ramp_method", ramp_method, RAMP_METHODS),
                                 ("background_method", background_method, BACKGROUND_METHODS)):
        if value not in allowed:
            raise ParameterError(f"{name} must be one of {allowed}; got {value!r}")
    common = dict(bias_adu=bias_adu, dark_rate=dark_rate, flat=flat, nonlinearity=nonlinearity,
                  bad_pixels=bad_pixels, gain=gain, read_noise=read_noise,
                  saturation_adu=saturation_adu, ramp_method=ramp_method,
                  background_method=background_method, jump_threshold=jump_threshold,
                  weighting=weighting, max_jumps=max_jumps, source_pad=source_pad,
                  destripe_axes=destripe_axes, detect_clipping=detect_clipping,
                  background_options=background_options, mask_options=mask_options,
                  destripe_options=destripe_options)
    flux = np.empty((n, ny, nx), np.float32)
    var = np.empty((n, ny, nx), np.float32)
    bits = np.empty((n, ny, nx), dq.MASK_DTYPE)
    level, itime, mid = np.empty(n), np.empty(n), np.empty(n)
    counts = {name: np.zeros(n, np.int64) for name in dq.FLAGS}
    groups = {}
    for i, s in enumerate(setups):
        groups.setdefault(s.key(), []).append(i)
    size = max(1, min(BLOCK, BLOCK_VALUES // max(n_reads * ny * nx, 1)))
    done = 0
    for members in groups.values():
        setup = setups[members[0]]
        fast = _fast_path(setup, common)
        step = size if fast else 1
        for start in range(0, len(members), step):
            idx = members[start:start + step]
            if fast:
                out = _staring_block(r[idx], setup, **common)
            else:
                out = _one_by_one(r[idx], setup, common)
            f, v, b, lv, it, mt = out
            flux[idx], var[idx], bits[idx] = f, v, b
            level[idx], itime[idx], mid[idx] = lv, it, mt
            for name, value in dq.FLAGS.items():
                counts[name][idx] = np.count_nonzero((b & value).reshape(len(idx), -1), axis=1)
            done += len(idx)
            if progress is not None:
                progress(done)
    return CalibratedChunk(flux=flux, variance=var, bits=bits, background_level=level,
                           integration_time=itime, mid_time_offset=mid, flag_counts=counts)


def _fast_path(setup, common):
    """True when the block form covers these options (else the reference, one at a time)."""
    return (setup.scan_velocity == 0.0 and setup.source_rows is not None
            and setup.destripe in ("off", "differences")
            and common["background_method"] in ("rowcol", "none")
            and not (common["background_options"] or {}).get("row_order")
            and common["weighting"] in ("optimal", "unweighted"))


def _one_by_one(r, setup, common):
    """The reference for each exposure of ``r`` (n, n_reads, ny, nx)."""
    n = r.shape[0]
    outs = [calibrate_exposure(r[i], np.asarray(setup.read_times), scan_velocity=setup.scan_velocity,
                               source_rows=setup.source_rows, destripe=setup.destripe,
                               scan_options=setup.scan_options, clip_level=setup.clip_level,
                               storage_span=setup.storage_span, **common) for i in range(n)]
    return (np.stack([o.flux for o in outs]), np.stack([o.variance for o in outs]),
            np.stack([o.bits for o in outs]), np.array([o.background_level for o in outs]),
            np.array([o.integration_time for o in outs]), np.array([o.mid_time_offset for o in outs]))


def _staring_block(raw, setup, *, bias_adu, dark_rate, flat, nonlinearity, bad_pixels, gain,
                   read_noise, saturation_adu, ramp_method, background_method, jump_threshold,
                   weighting, max_jumps, source_pad, destripe_axes, detect_clipping,
                   background_options, mask_options, destripe_options):
    """:func:`calibrate_exposure` of every staring exposure of ``raw`` (n, n_reads, ny, nx) at once.

    Follows the reference step by step (see its code); arrays carry the block's
    exposures on the axis after the reads.
    """
    n, n_reads, ny, nx = raw.shape
    shape = (ny, nx)
    t, g, rn = detector_numbers(np.asarray(setup.read_times), n_reads, gain, read_noise)
    bias, dark, fl, badref, nl, ref_bad = reference_frames(
        shape, bias_adu=bias_adu, dark_rate=dark_rate, flat=flat, bad_pixels=bad_pixels,
        nonlinearity=nonlinearity)

    # reads first, then exposures: the block is one tall frame of n * ny rows for the
    # per-pixel steps
    above = np.empty((n_reads, n, ny, nx))
    np.subtract(raw.transpose(1, 0, 2, 3), bias, out=above)
    saturated = None
    if saturation_adu is not None:
        sat_level = _frame(_value(saturation_adu, "adu", "saturation_adu"), shape, "saturation_adu", np.inf)
        with np.errstate(invalid="ignore"):
            saturated = above >= sat_level
    if detect_clipping:
        untrusted = clipped_reads(raw, setup.clip_level) | wrapped_reads(raw, setup.storage_span)
        untrusted = untrusted.transpose(1, 0, 2, 3)
        saturated = untrusted.copy() if saturated is None else saturated | untrusted
    above *= g
    e = linearize(above, nl)
    del above
    e -= e[0].copy()
    fl_safe = np.where(np.isfinite(fl) & (fl > 0), fl, 1.0)

    rows = tuple(setup.source_rows)
    smask = np.broadcast_to(source_mask_from_rows(shape, rows, pad=source_pad), (n, ny, nx))
    dmask = None
    if setup.destripe != "off":
        mopts = {"row_pad": 1, "grow_sigma": 2.0}
        mopts.update(mask_options or {})
        raw_bad = (badref | ref_bad)[None] | ~np.all(np.isfinite(e), axis=0)
        dmask = trace_source_masks(np.nan_to_num(e[-1] - e[0]), rows=rows, mask=raw_bad, **mopts).mask
        smask = smask | dmask
    sat_any = np.zeros((n, ny, nx), bool) if saturated is None else np.any(saturated, axis=0)
    if setup.destripe == "differences":
        dopts = {"method": "stream", "smoothing": "gap"}
        dopts.update(destripe_options or {})
        d = np.diff(e, axis=0)
        e[0] = 0.0
        for i in range(n):           # each exposure's smoother has its own factorisation
            ds = _destripe(d[:, i], dmask[i], axes=destripe_axes, mask=badref | ref_bad | sat_any[i],
                           **dopts)
            np.cumsum(ds.frames, axis=0, out=e[1:, i])
    tall = (n_reads, n * ny, nx)
    rn_tall = rn if rn.ndim == 0 else np.tile(np.broadcast_to(rn, shape), (n, 1))
    fit = fit_ramps(e.reshape(tall), t, read_noise=rn_tall,
                    saturated=None if saturated is None else saturated.reshape(tall),
                    weighting=weighting if ramp_method == "fit" else "sum",
                    jump_threshold=jump_threshold, max_jumps=max_jumps)
    del e
    T = float(t[-1])
    rate = fit.rate.reshape(n, ny, nx)
    flux = (rate - dark) * T / fl_safe
    var = fit.rate_variance.reshape(n, ny, nx) * (T / fl_safe) ** 2
    bits = fit.bits.reshape(n, ny, nx).copy()
    bits[:, ref_bad] |= dq.INVALID_VALUE
    flux[:, ref_bad] = np.nan
    var[:, ref_bad] = np.nan
    if background_method == "none":
        level = np.zeros(n)
    else:
        bopts = dict(background_options or {})
        bkg, bvar, bbits, level = _rowcol_backgrounds(
            flux, badref[None] | ((bits & dq.UNUSABLE_FLAGS) != 0), smask,
            sigma=bopts.get("sigma", 3.0), maxiters=bopts.get("maxiters", 5),
            smooth_columns=bopts.get("smooth_columns", 9))
        flux -= bkg
        var += bvar
        bits |= bbits
    usable = ((bits & dq.UNUSABLE_FLAGS) == 0) & ~badref
    mean_t = fit.mean_read_time.reshape(n, ny, nx)
    mid = np.empty(n)
    for i in range(n):
        mt = mean_t[i][usable[i]]
        mid[i] = float(np.median(mt)) if mt.size else float(np.mean(t))
    bits[:, badref] |= dq.LISTED_BAD
    return flux, var, bits, level, np.full(n, float(t[-1])), mid


def _rowcol_backgrounds(images, mask, source_mask, *, sigma, maxiters, smooth_columns):
    """``estimate_background(method="rowcol")`` of each frame of ``images`` (n, ny, nx) at once.

    Returns the background maps, their variances, the SKY_CLIPPED bits and
    the levels, as the reference gives them for each frame.
    """
    n, ny, nx = images.shape
    bad = ~np.isfinite(images) | mask
    offered = ~bad
    bad = bad | source_mask
    offered &= ~bad
    if not offered.reshape(n, -1).any(axis=1).all():
        raise AllMaskedError("estimate_background: every pixel is masked by mask or source_mask")
    # the clipped means of every column of every frame in one call: columns are independent
    x = np.ascontiguousarray(images.transpose(1, 0, 2)).reshape(ny, n * nx)
    b = np.ascontiguousarray(bad.transpose(1, 0, 2)).reshape(ny, n * nx)
    mean, var_mean, kept = _clipped_mean_columns(x, b, sigma, maxiters)
    mean, var_mean = mean.reshape(n, nx), var_mean.reshape(n, nx)
    kept = kept.reshape(ny, n, nx).transpose(1, 0, 2)
    if not np.isfinite(mean).any(axis=1).all():
        raise AllMaskedError("estimate_background: no unmasked pixel in any column; "
                             "loosen source_mask or mask")
    col, col_var = _boxcar_fill(mean, var_mean, smooth_columns)
    for i in np.flatnonzero(~np.isfinite(col).all(axis=1)):
        # columns beyond the reach of the boxcar: nearest estimated column
        good = np.flatnonzero(np.isfinite(col[i]))
        idx = good[np.clip(np.searchsorted(good, np.arange(nx)), 0, good.size - 1)]
        col[i], col_var[i] = col[i][idx], col_var[i][idx]
    srt = np.sort(col, axis=1)
    level = 0.5 * (srt[:, (nx - 1) // 2] + srt[:, nx // 2])
    bkg = np.broadcast_to(col[:, None, :], (n, ny, nx))
    bvar = np.broadcast_to(col_var[:, None, :], (n, ny, nx))
    bits = (offered & ~kept).view(np.uint8).astype(dq.MASK_DTYPE)
    bits *= dq.MASK_DTYPE(dq.SKY_CLIPPED)
    return bkg, bvar, bits, level


def _boxcar_fill(values, variances, width):
    """The reference's boxcar (``np.convolve`` "same", NaN skipped) along each row of 2-D arrays."""
    ok = np.isfinite(values) & np.isfinite(variances)
    v = np.where(ok, values, 0.0)
    e = np.where(ok, variances, 0.0)
    w = max(int(width), 1)
    n, m = v.shape
    lead = (w - 1) // 2                  # np.convolve "same": the window ends lead columns on
    cnt, sv, se = (np.zeros((n, m)) for _ in range(3))
    for src, dst in ((ok.astype(float), cnt), (v, sv), (e, se)):
        padded = np.zeros((n, m + w - 1))
        padded[:, w - 1 - lead:w - 1 - lead + m] = src
        for k in range(w):
            dst += padded[:, k:k + m]
    with np.errstate(invalid="ignore", divide="ignore"):
        return sv / cnt, se / cnt ** 2
