"""The band of rows a spatial scan's source crossed in each read difference.

:func:`find_bands` finds each difference's band from the data (median filter
along the dispersion, row profile, run of rows above a robust threshold);
:func:`_band_models` fits each band a separable model, row profile times
spectrum, against which :func:`lightledger.pipeline.scans.sum_scan` finds
cosmic rays (see its Notes).
"""

import numpy as np

from .errors import ParameterError
from .maskedmedian import masked_median
from .rowmedian import (_FILTER_NETWORK_MAX, _median9_triples, _median_filter_rows,
                        _network_median, _sort3)

__all__ = ["find_bands"]

_MAD_TO_SIGMA = 1.4826  # common practice


#: Columns whose band sum is below this many sigma of a background column's
#: sum hold no spectrum (see :func:`_band_models`).
_SPECTRUM_FLOOR = 5.0
#: Pixels more than this many sigma from the first (median) scale of their
#: column are left out of the column's least-squares scale (see
#: :func:`_band_models`).
_SCALE_CLIP = 4.0


def _pixel_sigma(model, read_var, flat, dark_charge):
    """Noise of a flat-fielded difference whose expected value is ``model``.

    ``sqrt(read_var + max(model flat + dark_charge, 0)) / flat``: read noise
    of two reads plus the Poisson noise of the collected charge, electrons.
    """
    charge = np.maximum(model * flat + dark_charge, 0.0)
    return np.sqrt(read_var + charge) / flat


def _window_median(values, members, width):
    """Running median along the last axis over the member columns of each window.

    ``values`` has shape (n, n_rows, nx) and ``members`` (n, nx).  For each
    member column ``c`` of difference ``k``: the median of
    ``values[k, :, j]`` over the member columns ``j`` among
    ``c - width // 2 .. c + width // 2`` that exist, the mean of the middle
    two for an even count.  Other columns of the result are NaN.  Windows
    of members only, inside the frame, use the comparator network of
    :func:`_median_filter_rows`; the others a sort of their members.
    ``width`` is odd; the inputs are not modified.
    """
    out = _median_filter_rows(values, width)
    kk, cc = np.nonzero(members & (_window_count(members, width) < width))
    if kk.size:
        out[kk, :, cc] = _gathered_median(np.where(members[:, None, :], values, np.nan), kk, cc, width)
    return np.where(members[:, None, :], out, np.nan)


def _window_count(flags, width):
    """Number of True ``flags`` (shape (n, nx)) among the ``width`` columns around each column."""
    nx = flags.shape[1]
    half = width // 2
    count = np.concatenate([np.zeros((flags.shape[0], 1), int), np.cumsum(flags, axis=1)], axis=1)
    idx = np.arange(nx)
    return count[:, np.minimum(idx + half + 1, nx)] - count[:, np.maximum(idx - half, 0)]


def _gathered_median(values, kk, cc, width):
    """Median over the window of ``width`` columns around column ``cc[i]`` of ``values[kk[i]]``.

    NaN values and columns beyond the frame's edges are left out (the mean
    of the middle two for an even count).  Returns shape (len(kk), n_rows).
    """
    n, n_rows, nx = values.shape
    half = width // 2
    padded = np.full((n, n_rows, nx + 2 * half), np.nan)
    padded[:, :, half:half + nx] = values
    windows = np.lib.stride_tricks.sliding_window_view(padded, width, axis=2)[kk, :, cc]
    out = np.empty(windows.shape[:2])
    full = ~np.isnan(windows).any(axis=2)  # all width values present: the network
    if width <= _FILTER_NETWORK_MAX and full.any():
        lanes = np.ascontiguousarray(windows[full].T)  # (width, n_full), this function's own
        if width == 9:
            out[full] = _median9_triples(*(_sort3(*lanes[o:o + 3]) for o in (0, 3, 6)))
        else:
            out[full] = _network_median(list(lanes), [True] * width, lanes.shape[1:])
        rest = ~full
    else:
        rest = np.ones(out.shape, bool)
    if rest.any():
        part = np.sort(windows[rest], axis=1)
        count = width - np.count_nonzero(np.isnan(part), axis=1)  # NaN sort last
        low = np.take_along_axis(part, (np.maximum(count - 1, 0) >> 1)[:, None], axis=1)[:, 0]
        high = np.take_along_axis(part, (count >> 1)[:, None], axis=1)[:, 0]
        out[rest] = np.where(count > 0, 0.5 * (low + high), np.nan)
    return out


def _cut_window_median(values, width):
    """Running median along the last axis of ``width`` columns, windows cut at the frame's edges.

    The same as :func:`_gathered_median` at every column of every row: for
    finite ``values`` the columns whose window lies inside the frame take
    :func:`_median_filter_rows` (the window's middle value), the
    ``width // 2`` columns at each edge a sort of the part of their window
    inside the frame.  Returns a new array of the shape of ``values``
    (n, n_rows, nx).
    """
    n, _, nx = values.shape
    half = width // 2
    if width > _FILTER_NETWORK_MAX or not np.isfinite(values).all():
        kk, cc = np.nonzero(np.ones((n, nx), bool))
        out = np.empty(values.shape)
        out[kk, :, cc] = _gathered_median(values, kk, cc, width)
        return out
    out = _median_filter_rows(values, width)
    if nx <= 2 * width:  # every column near an edge
        edges = [(0, np.r_[0:min(half, nx), max(nx - half, half):nx])]
    else:  # the edge columns' windows lie within 2 half columns of the edge
        edges = [(0, np.arange(half)), (nx - 2 * half, np.arange(half, 2 * half))]
    for start, cols in edges:
        if cols.size:
            part = values[:, :, start:start + 2 * half] if nx > 2 * width else values
            kk, cc = np.repeat(np.arange(n), cols.size), np.tile(cols, n)
            out[kk, :, cc + start] = _gathered_median(part, kk, cc, width)
    return out


def _band_models(d, usable, fill, rows_ok, level, read_var, flat, dark_charge, *, width):
    """Separable model of each read difference inside its band, for the cosmic-ray test.

    Pixels where ``usable`` is False are not used (``fill`` stands in for
    them); rows where ``rows_ok`` is False are not part of the band.  The
    inputs are not modified.

    During one read interval the scanned source paints a band whose charge is,
    above the background ``level``, the product of a row profile and the
    spectrum, ``d(y, x) - level = a(x) p(y, x)``, with ``p`` varying slowly
    along the dispersion (trace tilt, profile width).  The model is built in
    robust steps, none of which assumes that the spectrum is smooth:

    1. ``s(x)``, the sum over the band's rows of each column (above
       ``level``), normalises the columns: ``q = (d - level) / s``; the
       median of ``q`` over the spectrum columns (step 3) among the
       ``width`` columns around each is the profile ``p``.  Sharp spectral
       features are in ``s`` and divide out; a cosmic ray (or a track of
       up to ``width // 2`` pixels along a row) is an outlier of ``q`` in
       its own row, and the low ``q`` of the other pixels of its column is
       an outlier of theirs, so neither enters ``p``.
    2. Each column's scale: ``a0(x)``, the median over the core rows
       (``p`` at least a quarter of its column's peak) of
       ``(d - level) / p``, then the inverse-variance weighted least-squares
       scale ``a(x)`` of the pixels within ``_SCALE_CLIP`` sigma of
       ``a0 p``, so that a cosmic ray or a dead pixel in the column does
       not pull it.  The model is ``level + a p``.
    3. Spectrum columns are those where both ``s`` and the sum of ``fill``
       exceed ``_SPECTRUM_FLOOR`` times the noise of a background column's
       sum, and so do most columns of the window around them (a cosmic ray
       off the spectrum does not make one).  The others (e.g. beyond the
       spectrum's ends) take the profile of the nearest spectrum column,
       are scaled as in step 2, and the running median along the
       dispersion of what that leaves is added (the local background).  A
       difference without any spectrum column is modelled by the running
       median of ``d`` along the dispersion.

    Running medians cut their windows at the frame's edges (the mean of
    the middle two for an even count).

    Parameters
    ----------
    d : ndarray of shape (n, n_rows, nx)
        The band's rows of each flat-fielded difference, electrons.
    usable : ndarray of bool, shape (n, n_rows, nx)
        True = usable pixel (note: not a bad-pixel mask).
    fill : ndarray of shape (n, n_rows, nx)
        A cosmic-ray free stand-in for the differences (their running
        median along the dispersion), electrons: used for unusable pixels
        and to find the columns that hold spectrum.
    rows_ok : ndarray of bool, shape (n, n_rows)
        True for the rows inside each difference's band.
    level : ndarray of shape (n,)
        Background of each difference, electrons per pixel.
    read_var : ndarray of shape (n, n_rows, nx)
        Read-noise variance of a difference before the flat, ``2 s**2``, e-**2.
    flat : ndarray of shape (n, n_rows, nx)
        Flat field (finite, > 0).
    dark_charge : ndarray of shape (n, n_rows, nx)
        Dark charge of each interval (finite), electrons.
    width : int
        Columns of the running medians along the dispersion (odd).

    Returns
    -------
    model : ndarray of shape (n, n_rows, nx)
        Expected differences, electrons (meaningless outside the bands).
    sigma : ndarray of shape (n, n_rows, nx)
        Their pixel noise, :func:`_pixel_sigma` of ``model``, electrons.
    """
    n, n_rows, nx = d.shape
    inside = rows_ok[:, :, None]
    ok = usable & inside
    lev = np.asarray(level, dtype=float)[:, None, None]
    x = np.where(inside, np.where(ok, d, fill) - lev, 0.0)
    s = x.sum(axis=1)
    # noise of a background column's sum: read noise, background and dark charge
    bg_var = np.where(inside, (read_var + np.maximum(lev * flat + dark_charge, 0.0)) / (flat * flat), 0.0)
    col_var = np.sort(bg_var.sum(axis=1), axis=1)
    floor = _SPECTRUM_FLOOR * np.sqrt(0.5 * (col_var[:, (nx - 1) // 2] + col_var[:, nx // 2]))
    floor = np.maximum(floor, 1e-300)[:, None]
    # spectrum columns: both the sum and that of the cosmic-ray free stand-in
    # stand out, in a run of such columns (most of the window's columns)
    s_fill = np.where(inside, fill - lev, 0.0).sum(axis=1)
    strong = np.minimum(s, s_fill) > floor
    strong &= 2 * _window_count(strong, width) > _window_count(np.ones_like(strong), width)
    p = _window_median(x / np.maximum(s, floor)[:, None, :], strong, width)
    # columns without spectrum take the profile of the nearest spectrum column
    cols = np.arange(nx)[None, :]
    left = np.maximum.accumulate(np.where(strong, cols, -nx), axis=1)
    right = np.minimum.accumulate(np.where(strong, cols, 2 * nx)[:, ::-1], axis=1)[:, ::-1]
    near = np.clip(np.where(cols - left <= right - cols, left, right), 0, nx - 1)
    p = np.take_along_axis(p, np.broadcast_to(near[:, None, :], p.shape), axis=2)
    p = np.where(inside, np.nan_to_num(p), 0.0)
    # the scale of each column against its profile
    core = ok & (p >= 0.25 * p.max(axis=1, keepdims=True)) & (p > 0)
    with np.errstate(invalid="ignore", divide="ignore"):
        a0, _ = masked_median(np.where(core, x / np.where(core, p, 1.0), 0.0), ~core, axis=1)
    a0 = np.where(np.isfinite(a0), a0, 0.0)[:, None, :]
    sig0 = _pixel_sigma(a0 * p + lev, read_var, flat, dark_charge)
    keep = ok & (np.abs(x - a0 * p) <= _SCALE_CLIP * sig0)
    w = np.where(keep, p / (sig0 * sig0), 0.0)
    den = np.sum(w * p, axis=1, keepdims=True)
    fit = den > 0
    a = np.where(fit, np.sum(w * x, axis=1, keepdims=True) / np.where(fit, den, 1.0), a0)
    source = a * p
    # columns without spectrum: add the running median of what the profile leaves
    if not strong.all():
        rest = np.nan_to_num(_cut_window_median(x - source, width))
        np.add(source, rest, out=source, where=~strong[:, None, :])
    # differences without any spectrum column: the running median of the difference
    blank = np.flatnonzero(~strong.any(axis=1))
    if blank.size:
        source[blank] = _cut_window_median(x[blank], width)
    model = source + lev
    return model, _pixel_sigma(model, read_var, flat, dark_charge)


def find_bands(diffs, *, valid=None, band_sigma=5.0, pad_rows=3, filter_width=5, fallback_rows=None):
    """Row band that the source crossed in each difference, found from the data.

    Pixels where ``valid`` is False are ignored.  The input is not modified.

    Parameters
    ----------
    diffs : array_like of shape (n_diff, ny, nx)
        Read differences (or frames), electrons.
    valid : array_like of bool, optional
        True = usable pixel (note: not a bad-pixel mask).
    band_sigma : float
        Rows whose profile exceeds the profile's median by this many robust
        sigma (1.4826 MAD over rows) belong to the band.
    pad_rows : int
        Rows added on each side.
    filter_width : int
        Width in columns of the median filter along x applied before the
        collapse (rejects cosmic rays narrower than half of it).
    fallback_rows : tuple of int (row_lo, row_hi), optional
        Band used when nothing stands out; default the whole frame.

    Returns
    -------
    lo, hi : ndarray of int, shape (n_diff,)
        Inclusive padded band edges.
    found : ndarray of bool, shape (n_diff,)
    filtered : ndarray of shape (n_diff, ny, nx)
        The median-filtered differences.
    """
    d = np.asarray(diffs, dtype=float)
    if d.ndim != 3:
        raise ParameterError(f"diffs must have shape (n_diff, ny, nx); got {d.shape}")
    n, ny, nx = d.shape
    ok = np.isfinite(d) if valid is None else (np.asarray(valid, dtype=bool) & np.isfinite(d))
    w = max(int(filter_width), 1)
    # unusable pixels take their row's median (computed only for rows that have one)
    holes = ~ok
    if holes.any():
        kk, yy = np.nonzero(holes.any(axis=2))
        rowmed, _ = masked_median(d[kk, yy], holes[kk, yy], axis=1)
        fill = np.zeros((n, ny))
        fill[kk, yy] = np.nan_to_num(rowmed)
        filled = np.where(ok, d, fill[:, :, None])
    else:
        filled = d
    filt = _median_filter_rows(filled, w)  # in blocks that stay in the processor's cache
    prof = (filt if ok.all() else np.where(ok, filt, 0.0)).sum(axis=2) / np.maximum(ok.sum(axis=2), 1)
    base, _ = masked_median(prof, np.zeros(prof.shape, bool), axis=1)
    mad, _ = masked_median(np.abs(prof - base[:, None]), np.zeros(prof.shape, bool), axis=1)
    scale = np.maximum(_MAD_TO_SIGMA * mad, 1e-12 * np.maximum(np.abs(base), 1.0))
    above = prof > (base + band_sigma * scale)[:, None]
    # close one-row gaps inside the band
    above = above | (np.roll(above, 1, axis=1) & np.roll(above, -1, axis=1))
    peak = np.argmax(np.where(above, prof, -np.inf), axis=1)
    found = above.any(axis=1)
    rows = np.arange(ny)[None, :]
    lo = np.where(~above & (rows < peak[:, None]), rows, -1).max(axis=1) + 1
    hi = np.where(~above & (rows > peak[:, None]), rows, ny).min(axis=1) - 1
    lo = np.clip(lo - int(pad_rows), 0, ny - 1)
    hi = np.clip(hi + int(pad_rows), 0, ny - 1)
    if fallback_rows is None:
        flo, fhi = 0, ny - 1
    else:
        flo, fhi = max(int(fallback_rows[0]), 0), min(int(fallback_rows[1]), ny - 1)
    lo = np.where(found, lo, flo)
    hi = np.where(found, hi, fhi)
    return lo.astype(int), hi.astype(int), found, filt
