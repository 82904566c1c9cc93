"""Median along one axis of masked data, by comparator networks on short axes.

:func:`masked_median` ignores masked (True = bad) and non-finite elements and
costs one sort of the array: lines of up to :data:`_NETWORK_MAX` elements
(the differences of a ramp) are sorted elementwise by Batcher's odd-even
merge network (:func:`_merge_network`, also used by
:mod:`lightledger.pipeline.rowmedian`), longer ones by :func:`numpy.sort`.

References
----------
Batcher, K. E. 1968, AFIPS Conf. Proc. 32, 307 (sorting networks).
"""

import numpy as np
from numpy.lib.array_utils import normalize_axis_index

__all__ = ["masked_median"]


#: Axes up to this length are sorted by a comparator network in
#: :func:`masked_median`; longer ones by :func:`numpy.sort`.
_NETWORK_MAX = 8


def _merge_network(m):
    """Comparators ``(i, j)``, ``i < j``, of Batcher's odd-even merge sort on ``m`` items.

    Applying ``(a[i], a[j]) <- (min, max)`` for each pair in order sorts any
    sequence of ``m`` items (Batcher 1968).  This iterative form also covers
    ``m`` that are not powers of two; the tests check it on every input of
    zeros and ones, which suffices by the zero-one principle.
    """
    pairs = []
    p = 1
    while p < m:
        k = p
        while k >= 1:
            for j in range(k % p, m - k, 2 * k):
                for i in range(min(k, m - j - k)):
                    if (i + j) // (2 * p) == (i + j + k) // (2 * p):
                        pairs.append((i + j, i + j + k))
            k //= 2
        p *= 2
    return tuple(pairs)


_NETWORKS = {m: _merge_network(m) for m in range(_NETWORK_MAX + 1)}


def _sorted_lanes(lanes):
    """Sort a list of equal-shape arrays elementwise with a comparator network (no NaN)."""
    lanes = list(lanes)
    for i, j in _NETWORKS[len(lanes)]:
        a, b = lanes[i], lanes[j]
        lanes[i] = np.minimum(a, b)
        lanes[j] = np.maximum(a, b)
    return lanes


def masked_median(values, mask, axis=0):
    """Median along one axis, ignoring masked elements (vectorised).

    Elements where ``mask`` is True (bad) are ignored; so are NaN values.
    The inputs are not modified.

    Parameters
    ----------
    values : array_like
        Data.
    mask : array_like of bool, same shape as ``values``
        True = ignore.
    axis : int
        Axis of the median.

    Returns
    -------
    median : ndarray
        Shape of ``values`` without ``axis``; NaN where every element along
        ``axis`` is masked.
    count : ndarray of int
        Number of unmasked elements along ``axis``.

    Notes
    -----
    Masked elements are set to +inf and each line along ``axis`` is sorted
    once; the median is the mean of the middle one or two unmasked elements
    (ranks ``(n - 1) // 2`` and ``n // 2`` of the ``n`` unmasked ones).
    Lines of up to 8 elements (the differences of a ramp) are sorted by
    Batcher's odd-even merge network, at most 19 elementwise min/max pairs
    over the other axes, which is several times faster than
    :func:`numpy.sort` on so short lines; longer lines (and a 1-D input)
    are copied to the last axis and sorted there.
    Either way it costs one sort of the array (faster than
    :func:`numpy.nanmedian` on short axes).

    References
    ----------
    Batcher, K. E. 1968, AFIPS Conf. Proc. 32, 307 (sorting networks).
    """
    v = np.asarray(values, dtype=float)
    bad = np.asarray(mask, dtype=bool) | ~np.isfinite(v)
    axis = normalize_axis_index(axis, v.ndim)
    m = v.shape[axis]
    # count in bytes when the axis is short enough (several times faster than an int sum)
    n = m - bad.view(np.uint8).sum(axis=axis, dtype=np.uint8 if m < 256 else np.intp).astype(np.intp)
    w = np.where(bad, np.inf, v)
    if m == 0:
        return np.full(n.shape, np.nan), n
    if m <= _NETWORK_MAX and v.ndim > 1:
        lanes = _sorted_lanes(np.moveaxis(w, axis, 0))
        # lines without a masked element: ranks (m - 1) // 2 and m // 2
        med = 0.5 * (lanes[(m - 1) // 2] + lanes[m // 2])
        part = np.nonzero(n < m)
        if part[0].size:
            sub = np.stack([lane[part] for lane in lanes])
            med[part] = _middle(sub.T, n[part])
        return med, n
    order = [k for k in range(v.ndim) if k != axis] + [axis]
    s = np.ascontiguousarray(w.transpose(order))  # w is a fresh array: sorted in place
    s.sort(axis=-1)
    med = _middle(s.reshape(-1, m), n.reshape(-1)).reshape(n.shape)
    return med, n


def _middle(s, n):
    """Median of rows of ``s`` (shape (p, m), sorted, +inf last) holding ``n`` values each."""
    rows = np.arange(s.shape[0])
    # ranks (n - 1) // 2 and n // 2 (0 for an empty row, whose result is replaced)
    med = 0.5 * (s[rows, np.maximum(n - 1, 0) >> 1] + s[rows, n >> 1])
    med[n == 0] = np.nan
    return med
