"""Running medians along the rows of a frame, by comparator networks.

:func:`_median_filter_rows` is a median filter of an odd width along the
last axis, for the band finding of spatial scans: widths up to
:data:`_FILTER_NETWORK_MAX` select the median by those comparators of Batcher's
odd-even merge network (Batcher 1968) that reach the middle output, run
elementwise on blocks of windows that stay in the
processor's cache; wider windows use :func:`scipy.ndimage.median_filter`.

References
----------
Batcher, K. E. 1968, AFIPS Spring Joint Computer Conference 32, 307,
"Sorting networks and their applications" (from memory).
"""

import numpy as np
from scipy import ndimage

from .maskedmedian import _merge_network

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
