"""Sigma-clipped means along an axis, vectorised, with the error of the mean.

:func:`clipped_mean` clips about the median with a MAD-based sigma (common
practice) on ranks of one sort per line; the sky estimators
(:mod:`lightledger.pipeline.background`) and the scan sums use it.
"""

import numpy as np

__all__ = ["clipped_mean"]

_MAD_TO_SIGMA = 1.4826  # normal distribution: sigma = 1.4826 MAD (common practice)


def clipped_mean(data, mask, *, axis=0, sigma=3.0, maxiters=5):
    """Sigma-clipped mean along an axis, vectorised, with the error of the mean.

    Elements where ``mask`` is True (bad), and non-finite elements, are
    ignored; the inputs are not modified.  Clipping about the median with a
    MAD-based sigma (1.4826 MAD; common practice): an element is rejected
    where ``|x - median| > sigma * 1.4826 * MAD``, repeated up to
    ``maxiters`` times or until no element is rejected.

    Parameters
    ----------
    data : array_like
        Values, any unit.
    mask : array_like of bool, same shape as ``data``
        True = ignore.
    axis : int, keyword-only
        Axis of the mean.
    sigma : float, keyword-only
        Clipping threshold, in MAD-based sigma.
    maxiters : int, keyword-only
        Largest number of clipping passes.

    Returns
    -------
    mean, var_mean : ndarray
        Shape of ``data`` without ``axis``, the unit of ``data`` (squared for
        ``var_mean``).  Mean of the kept elements (NaN where none is kept)
        and its variance ``std**2 / n``, with ``std`` the sample standard
        deviation of the ``n`` kept elements (NaN where fewer than 2 are
        kept).
    kept : ndarray of bool
        Shape of ``data``; True where an element entered the mean.

    Notes
    -----
    Cost: one sort of ``data`` along ``axis`` and a few passes over it,
    O(N log m) for N elements and lines of m along ``axis``.  Each line is
    sorted once and the clipping is done on ranks.  The kept elements of a
    line are always a contiguous range ``[lo, hi)`` of its sorted values,
    because each pass keeps the values inside an interval about the median
    (and ``|x - med|`` computed in floating point is monotone on either side
    of ``med``, so equal values share their fate).  The median of the range
    is the mean of ranks ``lo + (n - 1) // 2`` and ``lo + n // 2``.  The MAD
    needs the k-th smallest of the deviations ``d_i = |x_i - med|``, which
    decrease and then increase along the sorted range; the k + 1 smallest of
    them are then the deviations of k + 1 consecutive sorted values, and the
    largest deviation of such a window is at one of its two ends, so

        d_(k) = min over i of max(med - x_i, x_(i+k) - med),

    a minimum over windows that needs no second sort.  The values rejected by
    a pass are the ends of the range where ``med - x > T`` or ``x - med > T``
    (``T = sigma * 1.4826 * MAD``), so a pass counts them to move ``lo`` and
    ``hi``.  A line whose range did not move has converged and is not
    computed again.  The medians, MADs and kept elements are those of the
    direct method (two sorts of the kept elements per pass), to the bit;
    the mean and variance are the direct method's sums over the kept
    elements in their order along ``axis``, so they agree with it to float
    rounding (to the bit for a 2-D array and ``axis=0``).  Rows along
    ``axis`` that are masked in every line are dropped before the sort.
    For 100 x 180 values along axis 0: about 0.5 ms, half the time of the
    direct method.

    The same clipped statistics are computed by astropy's
    ``sigma_clipped_stats`` with ``cenfunc="median"`` and
    ``stdfunc="mad_std"`` (the tests compare the two).
    """
    x = np.asarray(data, dtype=float)
    bad = np.asarray(mask, dtype=bool) | ~np.isfinite(x)
    return _clipped_mean(x, bad, axis, sigma, maxiters)


def _clipped_mean(x, bad, axis, sigma, maxiters):
    """:func:`clipped_mean` of float ``x`` with ``bad`` that already holds the non-finite values."""
    if x.ndim == 2 and axis in (0, -2):
        return _clipped_mean_columns(x, bad, sigma, maxiters)
    xl = np.moveaxis(x, axis, 0)
    m = xl.shape[0]
    x2 = xl.reshape(m, -1)
    b2 = np.moveaxis(bad, axis, 0).reshape(m, -1)
    xc, bc, _ = _drop_empty_rows(x2, b2)
    vlo, vhi, _ = _kept_bounds(xc, bc, sigma, maxiters)
    vlo = np.expand_dims(vlo.reshape(xl.shape[1:]), axis)
    vhi = np.expand_dims(vhi.reshape(xl.shape[1:]), axis)
    keep = (x >= vlo) & (x <= vhi) & ~bad
    n = keep.sum(axis=axis)
    xs = np.where(keep, x, 0.0)
    with np.errstate(invalid="ignore", divide="ignore"):
        mean = xs.sum(axis=axis) / n
        dev = np.where(keep, x - np.expand_dims(mean, axis), 0.0)
        var = (dev ** 2).sum(axis=axis) / (n - 1)
        var_mean = np.where(n >= 2, var / n, np.nan)
    return np.where(n > 0, mean, np.nan), var_mean, keep


def _clipped_mean_columns(x, bad, sigma, maxiters):
    """:func:`_clipped_mean` along axis 0 of a 2-D array, on the rows that hold a usable value."""
    m, p = x.shape
    xc, bc, rows = _drop_empty_rows(x, bad)
    vlo, vhi, n = _kept_bounds(xc, bc, sigma, maxiters)
    keep = xc >= vlo
    keep &= xc <= vhi
    keep &= ~bc
    # the sums of the direct method, in the same order: a dropped row adds only zeros
    buf = np.where(keep, xc, 0.0)
    with np.errstate(invalid="ignore", divide="ignore"):
        mean = buf.sum(axis=0) / n
        np.subtract(xc, mean, out=buf)
        np.copyto(buf, 0.0, where=~keep)
        np.square(buf, out=buf)
        var = buf.sum(axis=0) / (n - 1)
        var_mean = np.where(n >= 2, var / n, np.nan)
    if rows is not None:
        full = np.zeros((m, p), dtype=bool)
        full[rows] = keep
        keep = full
    return np.where(n > 0, mean, np.nan), var_mean, keep


def _drop_empty_rows(x, bad):
    """``x``, ``bad`` (2-D) without the rows that are bad in every column, and those rows' selector."""
    if x.shape[0] == 0 or x.shape[1] == 0:
        return x, bad, None
    rows = ~bad.all(axis=1)
    if rows.all():
        return x, bad, None
    return x[rows], bad[rows], rows


def _kept_bounds(x, bad, sigma, maxiters):
    """Smallest and largest kept value and count of kept values of each column of ``x`` (2-D).

    ``bad`` holds the non-finite values.  A column with no kept value gets
    (+inf, -inf, 0).
    """
    m, p = x.shape
    ngood = m - bad.sum(axis=0)
    L = int(ngood.max()) if m and p else 0
    # sorted columns, bad values (+inf) last, then +inf rows up to the last row that the
    # MAD search reads (row L + L // 2)
    S = np.empty((max(m, L + L // 2 + 1), p))
    np.copyto(S[:m], x)
    np.copyto(S[:m], np.inf, where=bad)
    S[m:] = np.inf
    S[:m].sort(axis=0)
    lo, hi = _clip_ranks(S, L, ngood, float(sigma), int(maxiters))
    n = np.maximum(hi - lo, 0)
    ok = n > 0
    cols = np.arange(p)
    vlo = np.where(ok, S[np.minimum(lo, S.shape[0] - 1), cols], np.inf)
    vhi = np.where(ok, S[np.maximum(hi - 1, 0), cols], -np.inf)
    return vlo, vhi, n


def _clip_ranks(S, L, ngood, sigma, maxiters):
    """Kept rank range ``[lo, hi)`` of each column of the sorted ``S`` after the clipping passes.

    ``S`` (rows, p), C order: each column sorted, +inf from row ``ngood`` on,
    at least ``L + L // 2 + 1`` rows with ``L = max(ngood)``.  A pass reads,
    for each moving column ``j`` with ``n_j`` kept values, the rows
    ``lo_j + t`` and ``lo_j + k1_j + t`` (``k1_j = (n_j - 1) // 2``,
    ``t = 0 .. n_j // 2 + 1``, the last row read is at most ``L + L // 2``)
    through a strided view of ``S``.
    """
    p = S.shape[1]
    step = S.itemsize
    narrow = S.shape[0] < 256  # counts fit in uint8 (several times faster sums)
    lo = np.zeros(p, dtype=np.intp)
    hi = ngood.astype(np.intp)
    act = np.flatnonzero(hi)  # columns still moving
    add, minimum = np.add.reduce, np.minimum.reduce
    for _ in range(maxiters):
        if act.size == 0:
            break
        l, h = lo[act], hi[act]
        n = h - l
        k1 = (n - 1) >> 1
        lk = l + k1
        odd = (n & 1).astype(bool)
        # windows of k1 + 1 (and k1 + 2) consecutive kept values start at rows l + t,
        # t = 0 .. nb - 1 (nb = max of n - k1 = n // 2 + 1): rows l + t and l + k1 + t of
        # column j are elements (t, l_j p + j) and (t, (l_j + k1_j) p + j) of this view of S
        nb = int(n.max()) // 2 + 1
        view = np.ndarray((nb + 1, (int(lk.max()) + 1) * p), dtype=S.dtype, buffer=S,
                          strides=(p * step, step))
        upper = view[:, lk * p + act]
        med = np.where(odd, upper[0], upper[1])  # ranks (n - 1) // 2 and n // 2
        med += upper[0]
        med *= 0.5
        upper -= med                                # S[l + k1 + t] - med
        lower = view[:-1, l * p + act]
        np.subtract(med, lower, out=lower)          # med - S[l + t]
        # windows reaching row h or beyond (values rejected before, or +inf) lie above the
        # median and end on a value >= S[h - 1]: none beats the last window inside the range
        f = np.maximum(lower, upper[:-1])
        d1 = minimum(f, axis=0)                     # rank k1 of |x - med|
        np.maximum(lower, upper[1:], out=f)
        mad = minimum(f, axis=0)                    # rank k1 + 1
        np.copyto(mad, d1, where=odd)               # odd n: ranks (n - 1) // 2 = n // 2
        mad += d1
        mad *= 0.5
        thr = sigma * (_MAD_TO_SIGMA * mad)
        c_lo, c_hi = lower > thr, upper > thr
        if narrow:
            c_lo = add(c_lo.view(np.uint8), axis=0, dtype=np.uint8)
            c_hi = add(c_hi.view(np.uint8), axis=0, dtype=np.uint8)
        else:
            c_lo, c_hi = add(c_lo, axis=0, dtype=np.intp), add(c_hi, axis=0, dtype=np.intp)
        # lower > thr: the new low rejections (values above med give lower <= 0).
        # upper > thr: the new high rejections, a run ending at row h - 1; if there is one,
        # the nb + 1 - (n - k1) rows from h on (larger values) count too, else the count
        # is at most those rows and min keeps hi (also for a NaN or infinite thr).  A
        # negative thr (sigma < 0) counts every row up to the median as low and every row
        # after it as high: the range empties, as every value is rejected.
        lo_new = l + c_lo
        hi_new = np.minimum(h, (lk + (nb + 1)) - c_hi)
        moved = (lo_new != l) | (hi_new != h)
        lo[act] = lo_new
        hi[act] = hi_new
        act = act[moved & (hi_new > lo_new)]
    return lo, hi
