"""Running sums and ors along a short axis, done plane by plane.

numpy's ``accumulate`` and ``cumsum`` along an axis that is not the last
visit the elements one at a time: over the reads of a ramp (a few to a few
tens) they are 10 to 200 times slower than one vectorised operation per
plane.  These helpers loop over the short axis and operate on whole planes
(every pixel of every exposure at once), with the same result: sums are
added in the same order, so the values are those of :func:`numpy.cumsum`
to the bit.
"""

import numpy as np

__all__ = ["running_or", "running_sum"]


def running_or(a, axis=0, *, out=None):
    """``numpy.logical_or.accumulate(a, axis)`` one plane at a time.

    Parameters
    ----------
    a : array_like of bool
    axis : int
        The (short) axis along which each element is or-ed with every
        element before it.
    out : ndarray of bool, optional
        Where to write (may be ``a`` itself).

    Returns
    -------
    ndarray of bool, shape of ``a``
    """
    a = np.asarray(a, dtype=bool)
    res = a.copy() if out is None else out
    if res is not a:
        np.copyto(res, a)
    r = np.moveaxis(res, axis, 0)
    for k in range(1, r.shape[0]):
        np.logical_or(r[k], r[k - 1], out=r[k])
    return res


def running_sum(a, axis=0, *, dtype=None):
    """``numpy.cumsum(a, axis, dtype)`` one plane at a time (identical values).

    Parameters
    ----------
    a : array_like
    axis : int
        The (short) axis of the running sum.
    dtype : numpy dtype, optional
        Of the result (default that of ``a``).

    Returns
    -------
    ndarray, shape of ``a``
    """
    res = np.array(a, dtype=dtype, copy=True)
    r = np.moveaxis(res, axis, 0)
    for k in range(1, r.shape[0]):
        np.add(r[k], r[k - 1], out=r[k])
    return res
