"""Spatial scans: band-masked sums of consecutive read differences.

During a spatial scan the source moves along the rows while the detector is
read non-destructively.  Each difference of consecutive reads holds the
charge collected during one interval, which falls in a band of rows that the
source crossed then.  Keeping only that band in each difference and summing
rejects most of the background and most cosmic rays (Deming et al. 2013).

The band of each difference is found from the data, not assumed: the
difference is median-filtered along the dispersion axis (which removes
single-pixel cosmic rays), collapsed along x into a row profile, and the run
of rows above ``band_sigma`` robust sigma of that profile around its peak,
padded by ``pad_rows``, is the band.  Forward and reverse scans are handled
alike.

Cosmic rays inside a band are found against a separable model of the band,
row profile times spectrum, fitted to each difference on its own (see
:func:`sum_scan` Notes): unlike the neighbouring columns of the difference,
it predicts the sharp lines of the spectrum and the peaks between them.

Cost: one median filter and a few sorts of the difference cube,
O(n_reads ny nx), the filter's elementwise min/max run in blocks that stay
in the processor's cache; the band models of all differences at once, on
the band's rows (two running medians of ``cr_width`` columns, by min/max
over shifted copies except within ``cr_width // 2`` columns of the frame's
edges and of the spectrum's ends, and one sort of each column's band
rows), O(n_reads n_band_rows nx cr_width); then a Python loop
runs over differences only, each step on one difference (the cosmic-ray
test and the sums on the band's rows only), so that the work arrays stay in
the processor's cache.  The background estimate of each difference is most
of the time.
"""

from dataclasses import dataclass

import numpy as np
from scipy import ndimage

from . import mask as dq
from .background import clipped_mean, estimate_background
from .destripe import destripe as _destripe
from .errors import ParameterError
from .ramps import _merge_network, masked_median

__all__ = ["ScanSum", "sum_scan", "find_bands", "SCAN_BACKGROUNDS", "SCAN_DESTRIPE"]

#: Allowed values of ``background`` in :func:`sum_scan`.
SCAN_BACKGROUNDS = ("rowcol", "constant", "none")
#: Allowed values of ``destripe`` in :func:`sum_scan`.
SCAN_DESTRIPE = ("off", "rows", "columns", "both")

_MAD_TO_SIGMA = 1.4826  # common practice


@dataclass(frozen=True)
class ScanSum:
    """Result of :func:`sum_scan`.

    Attributes
    ----------
    flux : ndarray of shape (ny, nx), float64
        Electrons collected from read 0 to the last read inside the bands,
        dark and background subtracted, flat-fielded (0 outside every band).
    variance : ndarray of shape (ny, nx), float64
        Variance of ``flux``, e-**2 (see :func:`sum_scan` Notes).
    bits : ndarray of shape (ny, nx), uint16
        UNSCANNED, RAMP_BREAK (a cosmic ray was replaced), OVERFILLED, INVALID_VALUE,
        NO_SLOPE (covered by a band but by no usable difference),
        SKY_CLIPPED (clipped from some difference's background).
    band_lo, band_hi : ndarray of shape (n_reads - 1,), int
        First and last row (inclusive, padded) of each difference's band.
    band_found : ndarray of shape (n_reads - 1,), bool
        False where no band stood out and the fallback band was used.
    background : ndarray of shape (n_reads - 1,), float64
        Median background level of each difference, e- per pixel.
    background_map : ndarray of shape (ny, nx), float64
        Background subtracted from each pixel's flux, e-.
    n_cosmic : ndarray of shape (n_reads - 1,), int
        Cosmic-ray pixels replaced in each difference's band.
    """

    flux: np.ndarray
    variance: np.ndarray
    bits: np.ndarray
    band_lo: np.ndarray
    band_hi: np.ndarray
    band_found: np.ndarray
    background: np.ndarray
    background_map: np.ndarray
    n_cosmic: np.ndarray


#: Widths up to this use the comparator network in :func:`_median_filter_rows`.
_FILTER_NETWORK_MAX = 9


def _selection_plan(m, rank):
    """Comparators of the merge network that reach output ``rank``, as (i, j, min?, max?).

    Walking the network backwards from wire ``rank`` keeps the comparators
    whose result is still needed, and of each only the half (min to wire
    ``i``, max to wire ``j``) that is; what is left selects the element of
    that rank from any ``m`` inputs.
    """
    need, plan = {rank}, []
    for i, j in reversed(_merge_network(m)):
        want_min, want_max = i in need, j in need
        if want_min or want_max:
            plan.append((i, j, want_min, want_max))
            need |= {i, j}
    return tuple(plan[::-1])


#: Windows per block in :func:`_median_filter_rows` (work arrays of 64 KiB).
_FILTER_CHUNK = 8192

_SELECTION_PLANS = {w: _selection_plan(w, w // 2) for w in range(1, _FILTER_NETWORK_MAX + 1)}


def _network_median(lanes, owned, shape):
    """Elementwise median (rank ``len(lanes) // 2``) of equal-shape NaN-free arrays.

    ``lanes`` holds at most ``_FILTER_NETWORK_MAX`` arrays; those marked in
    ``owned`` may be overwritten, the others (e.g. views of the caller's
    input) are only read.  The selection network of ``len(lanes)`` inputs
    (:func:`_selection_plan`) is applied with elementwise min/max into
    work arrays of ``shape``.
    """
    width = len(lanes)
    lanes, owned, spare = list(lanes), list(owned), []

    def buffer():
        return spare.pop() if spare else np.empty(shape)

    for i, j, want_min, want_max in _SELECTION_PLANS[width]:
        a, b = lanes[i], lanes[j]
        if want_min and want_max:
            lo = np.minimum(a, b, out=buffer())
            hi = np.maximum(a, b, out=b if owned[j] else buffer())
            if owned[i]:
                spare.append(a)
            lanes[i], lanes[j] = lo, hi
            owned[i] = owned[j] = True
        elif want_min:
            lanes[i] = np.minimum(a, b, out=a if owned[i] else buffer())
            owned[i] = True
        else:
            lanes[j] = np.maximum(a, b, out=b if owned[j] else buffer())
            owned[j] = True
    out = lanes[width // 2]
    return out if owned[width // 2] else np.array(out)


def _med3(x, y, z):
    """Elementwise median of three arrays (4 min/max); new array."""
    lo = np.minimum(x, y)
    hi = np.maximum(x, y)
    np.minimum(hi, z, out=hi)
    return np.maximum(lo, hi, out=hi)


def _sort3(a, b, c):
    """Elementwise sort of three arrays (3 comparators); new arrays lo, mid, hi."""
    lo = np.minimum(a, b)
    hi = np.maximum(a, b)
    mid = np.minimum(hi, c)
    np.maximum(hi, c, out=hi)
    low = np.minimum(lo, mid)
    np.maximum(lo, mid, out=mid)
    return low, mid, hi


def _median9_triples(t0, t1, t2):
    """Elementwise median of nine values given as three sorted triples (lo, mid, hi).

    With the rows of the 3 x 3 array of the nine values sorted, and then its
    columns, the median is the median of the anti-diagonal: the greatest of
    the lows, the median of the mids and the least of the highs (Paeth 1990,
    "Median finding on a 3 x 3 grid", Graphics Gems, from memory; the tests
    check it on every input of zeros and ones); 12 min/max given the
    triples.
    """
    low = np.maximum(np.maximum(t0[0], t1[0]), t2[0])
    high = np.minimum(np.minimum(t0[2], t1[2]), t2[2])
    return _med3(low, _med3(t0[1], t1[1], t2[1]), high)


def _median5_flat(flat, n_out):
    """Median of ``flat[i:i + 5]`` for ``i < n_out`` (1-D, NaN-free); new array.

    Of five values, two sorted pairs ``a0 <= a1``, ``b0 <= b1`` and ``e``,
    ``min(a0, b0)`` is the least of four and ``max(a1, b1)`` the greatest,
    so dropping both (one not above the median, one not below) leaves the
    median as the median of ``max(a0, b0)``, ``min(a1, b1)`` and ``e``.
    The sorted pairs of neighbouring values are shared by the windows, so
    each output takes 8 elementwise min/max instead of the network's 12.
    """
    pair_lo = np.minimum(flat[:n_out + 2], flat[1:n_out + 3])
    pair_hi = np.maximum(flat[:n_out + 2], flat[1:n_out + 3])
    u = np.maximum(pair_lo[:n_out], pair_lo[2:n_out + 2])
    v = np.minimum(pair_hi[:n_out], pair_hi[2:n_out + 2])
    return _med3(u, v, flat[4:n_out + 4])


def _median9_flat(flat, n_out):
    """Median of ``flat[i:i + 9]`` for ``i < n_out`` (1-D, NaN-free); new array.

    The sorted triple of each run of three values is shared by the three
    windows that hold it (:func:`_median9_triples`): 18 elementwise min/max
    per output instead of the network's 40.
    """
    tri = _sort3(flat[:n_out + 6], flat[1:n_out + 7], flat[2:n_out + 8])
    return _median9_triples(*([t[o:o + n_out] for t in tri] for o in (0, 3, 6)))


def _median_filter_rows(frame, width):
    """Running median of ``width`` columns along the last axis, edges repeated.

    The same as ``scipy.ndimage.median_filter(frame, size=(1, width),
    mode="nearest")`` (rank ``width // 2`` of the window, which for an even
    width starts ``width // 2`` columns to the left) for NaN-free input:
    the window's shifted copies are combined by elementwise min/max (a
    selection network, with comparisons shared between neighbouring windows
    for widths 5 and 9) instead of a per-pixel selection.  The padded rows
    are laid end to end, so that every min/max runs over one contiguous
    run of memory; the windows that straddle two rows are computed and
    dropped.  Widths above ``_FILTER_NETWORK_MAX`` use scipy.  Returns a
    new array.
    """
    if width <= 1:
        return np.array(frame, dtype=float)
    if width > _FILTER_NETWORK_MAX:
        return ndimage.median_filter(frame, size=(1,) * (frame.ndim - 1) + (width,), mode="nearest")
    nx = frame.shape[-1]
    if np.size(frame) == 0:
        return np.empty(np.shape(frame))
    left = width // 2
    padded = np.concatenate([np.repeat(frame[..., :1], left, axis=-1), frame,
                             np.repeat(frame[..., -1:], width - 1 - left, axis=-1)], axis=-1)
    flat = padded.reshape(-1)
    n_out = flat.size - (width - 1)  # window i covers flat[i:i + width]
    med = np.empty(n_out)
    for start in range(0, n_out, _FILTER_CHUNK):  # blocks of windows: work arrays stay in cache
        stop = min(start + _FILTER_CHUNK, n_out)
        part = flat[start:stop + width - 1]
        if width == 5:
            med[start:stop] = _median5_flat(part, stop - start)
        elif width == 9:
            med[start:stop] = _median9_flat(part, stop - start)
        else:
            lanes = [part[j:j + stop - start] for j in range(width)]  # views of the shifted copies
            med[start:stop] = _network_median(lanes, [False] * width, (stop - start,))
    # row r, column c is window r * (nx + width - 1) + c
    n_rows = flat.size // (nx + width - 1)
    rows = np.lib.stride_tricks.as_strided(med, shape=(n_rows, nx),
                                           strides=((nx + width - 1) * med.itemsize, med.itemsize),
                                           writeable=False)
    return np.array(rows).reshape(frame.shape)


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


def sum_scan(reads, read_times, *, read_noise, saturated=None, dark_rate=None, flat=None,
             bad=None, band_sigma=5.0, pad_rows=3, filter_width=5, cr_threshold=6.0,
             cr_width=9, background="rowcol", clip_sigma=3.0, smooth_columns=9, destripe="off",
             source_columns=None, fallback_rows=None):
    """Flux of a spatially scanned exposure from band-masked read differences.

    Mask contract: ``bad`` (True = unusable pixel) and non-finite pixels are
    left out of the band profiles and background estimates (their flux is
    still summed; the caller flags them); reads flagged in ``saturated``
    (True = above saturation) and every later read are dropped with the
    differences they enter.  The inputs are not modified.

    Parameters
    ----------
    reads : array_like of shape (n_reads, ny, nx)
        Cumulative reads, electrons, linearised.
    read_times : array_like of shape (n_reads,)
        Seconds, strictly increasing.
    read_noise : float or array_like of shape (ny, nx)
        Electrons per read.
    saturated : array_like of bool, shape (n_reads, ny, nx), optional
    dark_rate : float or array_like of shape (ny, nx), optional
        Dark current, e-/s; ``dark_rate * dt`` is taken from each difference.
    flat : array_like of shape (ny, nx), optional
        Flat field (mean about 1); each dark-subtracted difference is divided
        by it.
    bad : array_like of bool, shape (ny, nx), optional
    band_sigma, pad_rows, filter_width, fallback_rows
        Band finding, see :func:`find_bands` (its filtered differences also
        stand in for unusable pixels in the band model).
    cr_threshold : float
        A usable pixel inside the band more than this many sigma (its own
        noise, from the model) above the band's separable model is a cosmic
        ray and is replaced by the model (see Notes).
    cr_width : int
        Columns (odd) of the running medians along the dispersion in the
        band model: tracks of up to ``cr_width // 2`` pixels along a row
        stay out of the band's profile.
    background : {"rowcol", "constant", "none"}
        Background of each difference from its out-of-band pixels: a
        smoothed per-column clipped mean ("rowcol", see
        :func:`lightledger.pipeline.background.estimate_background`), one
        clipped mean ("constant"), or nothing.
    clip_sigma, smooth_columns
        Background clipping threshold and column boxcar width.
    destripe : {"off", "rows", "columns", "both"}
        Stripes removed from each difference before the background, measured
        outside the band (and outside ``source_columns`` when given).
    source_columns : tuple of int (col_lo, col_hi), optional
        Columns of the spectrum; with it the destriping mask covers only the
        band's rows within these columns, so rows inside the band are also
        corrected.

    Returns
    -------
    ScanSum

    Raises
    ------
    ParameterError
        Wrong shapes or unknown option values.

    Notes
    -----
    Cosmic rays.  Inside its band each difference is modelled as
    ``m(y, x) = L + a(x) p(y, x)`` (:func:`_band_models`): ``L`` is the
    median of the row means of the difference's out-of-band rows, ``a(x)``
    the column's scale (which carries the spectrum, with its sharp lines)
    and ``p(y, x)`` the band's row profile, a running median along the
    dispersion of the columns normalised by their sums.  A pixel is a hit
    where ``d - m > cr_threshold sqrt(2 s**2 + max(m f + D dt, 0)) / f`` (``s``
    the read noise, ``f`` the flat, ``D dt`` the dark charge), and is
    replaced by ``m``.  The spectrum enters only through ``a(x)``, fitted to
    the column itself, so sharp lines and the peaks between them are
    predicted; a running median of the difference along the dispersion
    would undercut those peaks and take them for hits.

    For pixel ``p`` the flux is ``F = sum_k b_k (d_k - D dt_k) / f - B_k``
    with ``b_k`` = 1 inside difference ``k``'s band, ``D`` the dark rate,
    ``f`` the flat and ``B_k`` the background estimate.  Variance:

    * read noise: ``sum_k b_k d_k`` telescopes within each run of
      consecutive in-band differences to ``r_end - r_start``, so each run
      contributes ``2 s**2``: ``var_read = 2 s**2 n_runs / f**2``;
    * Poisson: the charge of the included intervals,
      ``sum_k b_k max(m_k f + D dt_k, 0) / f**2`` with ``m_k`` the band
      model (cosmic-ray free) of difference ``k``;
    * background: ``sum_k b_k var(B_k)``.

    Pixels outside every band have flux 0 and are given the variance of one
    read difference, ``2 s**2 / f**2``, so that no pixel has zero variance.

    References
    ----------
    Deming, D., et al. 2013, ApJ 774, 95.
    """
    if background not in SCAN_BACKGROUNDS:
        raise ParameterError(f"background must be one of {SCAN_BACKGROUNDS}; got {background!r}")
    if destripe not in SCAN_DESTRIPE:
        raise ParameterError(f"destripe must be one of {SCAN_DESTRIPE}; got {destripe!r}")
    try:
        width_ok = (not isinstance(cr_width, bool) and float(cr_width).is_integer()
                    and cr_width >= 1 and int(cr_width) % 2 == 1)
    except (TypeError, ValueError):
        width_ok = False
    if not width_ok:
        raise ParameterError(f"cr_width must be an odd integer >= 1 column; got {cr_width!r}")
    cr_width = int(cr_width)
    r = np.asarray(reads, dtype=float)
    if r.ndim != 3 or r.shape[0] < 2:
        raise ParameterError(f"reads must have shape (n_reads >= 2, ny, nx); got {r.shape}")
    n_reads, ny, nx = r.shape
    t = np.asarray(read_times, dtype=float)
    if t.shape != (n_reads,) or not np.all(np.isfinite(t)) or np.any(np.diff(t) <= 0):
        raise ParameterError(f"read_times must be finite, strictly increasing, shape ({n_reads},)")
    dt = np.diff(t)
    s2 = np.broadcast_to(np.asarray(read_noise, dtype=float) ** 2, (ny, nx))
    dark = np.zeros((ny, nx)) if dark_rate is None else np.broadcast_to(np.asarray(dark_rate, float), (ny, nx))
    fl = np.ones((ny, nx)) if flat is None else np.broadcast_to(np.asarray(flat, float), (ny, nx))
    badpx = np.zeros((ny, nx), bool) if bad is None else np.broadcast_to(np.asarray(bad, bool), (ny, nx))
    flat_ok = np.isfinite(fl) & (fl > 0)
    fl_safe = np.where(flat_ok, fl, 1.0)

    finite = np.isfinite(r)
    good = finite.copy()
    sat_px = np.zeros((ny, nx), bool)
    if saturated is not None:
        sat = np.array(saturated, dtype=bool)  # a copy: the input is not modified
        if sat.shape != r.shape:
            raise ParameterError(f"saturated must have the shape of reads {r.shape}; got {sat.shape}")
        for k in range(1, n_reads):  # a read after a saturated one is saturated too
            np.logical_or(sat[k - 1], sat[k], out=sat[k])
        sat_px = sat[-1]
        good &= ~sat
    valid = good[1:] & good[:-1] & np.isfinite(dark) & flat_ok
    n_diff = n_reads - 1
    rz = r if finite.all() else np.where(finite, r, 0.0)
    d = np.empty((n_diff, ny, nx))
    all_valid = bool(valid.all())
    for k in range(n_diff):  # (r_k+1 - r_k - D dt_k) / f, 0 where unusable
        dk = np.subtract(rz[k + 1], rz[k], out=d[k])
        dk -= dark * dt[k]
        dk /= fl_safe
        if not all_valid:
            np.copyto(dk, 0.0, where=~valid[k])
    usable = valid & ~badpx

    lo, hi, found, filt = find_bands(d, valid=usable, band_sigma=band_sigma, pad_rows=pad_rows,
                                     filter_width=filter_width, fallback_rows=fallback_rows)
    rows = np.arange(ny)
    in_band_rows = (rows[None, :] >= lo[:, None]) & (rows[None, :] <= hi[:, None])  # (n_diff, ny)
    in_band = np.broadcast_to(in_band_rows[:, :, None], d.shape)

    if destripe != "off":
        smask = in_band.copy()
        if source_columns is not None:
            cols = np.arange(nx)
            incol = (cols >= int(source_columns[0])) & (cols <= int(source_columns[1]))
            smask = smask & incol[None, None, :]
        ds = _destripe(d, smask, axes=destripe, mask=~usable)
        d = np.where(valid, ds.frames, 0.0)
        filt = filt - ds.row_offsets[:, :, None] - ds.column_offsets[:, None, :]
    # the band model of every difference at once, on the band's rows; its
    # background level is the median of the out-of-band rows' means of the
    # filtered difference (0 without any)
    level, _ = masked_median(filt.mean(axis=2), in_band_rows, axis=1)
    level = np.nan_to_num(level)
    dark_ok = np.where(np.isfinite(dark), dark, 0.0)
    height = int(np.max(hi - lo)) + 1
    brow = np.minimum(lo[:, None] + np.arange(height)[None, :], ny - 1)  # (n_diff, height)
    kidx = np.arange(n_diff)[:, None]
    dark_b = dark_ok[brow] * dt[:, None, None]
    model_b, sigma_b = _band_models(d[kidx, brow], usable[kidx, brow], filt[kidx, brow],
                                    brow <= hi[:, None], level, 2.0 * s2[brow], fl_safe[brow], dark_b,
                                    width=cr_width)

    # One difference at a time; the band of difference k is the run of rows
    # lo[k] .. hi[k], so the per-pixel work is done on those rows only.
    bkg_map = np.zeros((ny, nx))
    bkg_var = np.zeros((ny, nx))
    contrib = np.zeros((ny, nx))
    pois = np.zeros((ny, nx))
    runs = np.zeros((ny, nx), dtype=int)
    levels = np.zeros(n_diff)
    n_cosmic = np.zeros(n_diff, dtype=int)
    bits = np.zeros((ny, nx), dtype=dq.MASK_DTYPE)
    hit_any = np.zeros((ny, nx), bool)
    take_any = np.zeros((ny, nx), bool)
    prev = np.zeros((ny, nx), bool)
    prev_band = slice(0, 0)
    for k in range(n_diff):
        band = slice(int(lo[k]), int(hi[k]) + 1)
        dk, fl_k = d[k, band], fl_safe[band]
        # cosmic rays inside the band, against the band's separable model
        nb = int(hi[k] - lo[k]) + 1
        model, sigma = model_b[k, :nb], sigma_b[k, :nb]
        charge = np.maximum(model * fl_k + dark_b[k, :nb], 0.0)
        hit = usable[k, band] & ((dk - model) > cr_threshold * sigma)
        np.copyto(dk, model, where=hit)  # d is this function's own array
        n_cosmic[k] = np.count_nonzero(hit)
        hit_any[band] |= hit

        inb = in_band[k]
        if background == "none":
            bk = np.zeros((ny, nx))
            bv = np.zeros((ny, nx))
            levels[k] = 0.0
        elif background == "rowcol":
            est = estimate_background(d[k], mask=~usable[k], source_mask=inb, method="rowcol",
                                      sigma=clip_sigma, smooth_columns=smooth_columns)
            bk, bv = est.background, est.variance
            bits |= est.bits
            levels[k] = est.level  # the median of bk
        else:
            out = usable[k] & ~inb
            mean, vmean, kept = clipped_mean(d[k][out], np.zeros(int(out.sum()), bool), axis=0,
                                             sigma=clip_sigma)
            bk = np.full((ny, nx), float(mean))
            bv = np.full((ny, nx), float(vmean))
            rej = np.zeros((ny, nx), bool)
            rej[out] = ~kept
            bits[rej] |= dq.SKY_CLIPPED
            levels[k] = float(mean)  # the median of a constant map
        take = valid[k, band]
        contrib[band] += np.where(take, dk - bk[band], 0.0)
        bkg_map[band] += np.where(take, bk[band], 0.0)
        bkg_var[band] += np.where(take, bv[band], 0.0)
        pois[band] += np.where(take, charge, 0.0)
        # runs of consecutive differences that enter the sum, per pixel (prev: the
        # previous difference's take, False outside its band)
        runs[band] += take & ~prev[band]
        take_any[band] |= take
        prev[prev_band] = False
        prev[band] = take
        prev_band = band

    var = (2.0 * s2 * runs + pois) / fl_safe ** 2 + bkg_var
    covered = np.broadcast_to(in_band_rows.any(axis=0)[:, None], (ny, nx))
    var = np.where(covered, var, 2.0 * s2 / fl_safe ** 2)

    bits[~covered] |= dq.UNSCANNED
    bits[hit_any] |= dq.RAMP_BREAK
    bits[sat_px] |= dq.OVERFILLED
    bits[covered & ~take_any] |= dq.NO_SLOPE
    bits[~finite.all(axis=0) | ~flat_ok | ~np.isfinite(dark)] |= dq.INVALID_VALUE
    return ScanSum(flux=contrib, variance=var, bits=bits, band_lo=lo, band_hi=hi, band_found=found,
                   background=levels, background_map=bkg_map, n_cosmic=n_cosmic)
