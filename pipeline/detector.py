"""Detector reference arrays: subarray cut-outs, flat fields and non-linearity.

Pure functions on arrays; the caller reads the reference files.  Every
function returns a new array and never modifies its inputs.

Conventions (the project's raw layout, version 1): dispersion along x (the
last numpy axis), spatial along y; reference arrays are full-detector size and
are cut to the subarray of an exposure with :func:`cut_subarray`.
"""

import numpy as np

from .errors import ParameterError

__all__ = ["cut_subarray", "flat_from_cube", "linearize"]


def cut_subarray(ref, origin_xy, shape):
    """Cut a full-detector reference array to an exposure's subarray.

    No mask is involved; NaN values are copied as they are.  The input is not
    modified; the result is a new contiguous array.

    Parameters
    ----------
    ref : array_like of shape (..., full_rows, full_columns)
        Reference array (bias in ADU, dark in e-/s, flat, a coefficient cube
        with the coefficient index first, bad-pixel flags).  Leading axes are
        kept.
    origin_xy : tuple of int (x0, y0)
        Full-detector column and row of the subarray's pixel [0, 0] (the raw
        header's SUBORIGX, SUBORIGY).
    shape : tuple of int (ny, nx)
        Subarray shape, rows and columns.

    Returns
    -------
    sub : ndarray of shape (..., ny, nx)
        ``ref[..., y0:y0 + ny, x0:x0 + nx]`` as a copy, same dtype.

    Raises
    ------
    ParameterError
        If the subarray does not lie inside ``ref`` or the arguments are not
        two integers each.
    """
    ref = np.asarray(ref)
    if ref.ndim < 2:
        raise ParameterError(f"ref must have at least 2 dimensions (rows, columns); got shape {ref.shape}")
    try:
        x0, y0 = (int(v) for v in origin_xy)
        ny, nx = (int(v) for v in shape)
    except (TypeError, ValueError):
        raise ParameterError("origin_xy and shape must each be two integers: (x0, y0) and (ny, nx)") from None
    full_ny, full_nx = ref.shape[-2:]
    if x0 < 0 or y0 < 0 or ny < 1 or nx < 1 or y0 + ny > full_ny or x0 + nx > full_nx:
        raise ParameterError(
            f"subarray origin_xy={(x0, y0)} shape={(ny, nx)} does not fit in a reference of "
            f"{full_ny} rows x {full_nx} columns; need 0 <= x0, x0 + nx <= {full_nx}, 0 <= y0, y0 + ny <= {full_ny}")
    return np.ascontiguousarray(ref[..., y0:y0 + ny, x0:x0 + nx]).copy()


def flat_from_cube(cube, wavelength_um, wavelength_range):
    """Evaluate a flat-field polynomial cube at each column's wavelength.

    ``flat(y, x) = sum_k F[k, y, x] w(x)**k`` with
    ``w = (lambda - lambda_min) / (lambda_max - lambda_min)`` and ``lambda`` the
    wavelength of column ``x``.  No mask is involved; NaN coefficients give a
    NaN flat at that pixel.  The inputs are not modified.

    Parameters
    ----------
    cube : array_like of shape (n_coefficients, ny, nx), or (ny, nx)
        Coefficients F[k] of increasing power of ``w`` (dimensionless).  A 2-D
        array is taken as an already evaluated flat and returned as a float
        copy.
    wavelength_um : array_like of shape (nx,)
        Wavelength of each column, micrometres.
    wavelength_range : tuple of float (lambda_min, lambda_max)
        Micrometres; the normalisation of ``w`` (the instrument profile's
        ``[flat] wavelength_range``).

    Returns
    -------
    flat : ndarray of shape (ny, nx), float64
        Dimensionless flat (mean about 1).

    Raises
    ------
    ParameterError
        If the shapes disagree or ``lambda_max <= lambda_min``.

    Notes
    -----
    Evaluated by Horner's rule, one pass per coefficient plane (vectorised
    over pixels).  Wavelengths outside the range are extrapolated, as the
    polynomial is defined everywhere.
    """
    cube = np.asarray(cube, dtype=float)
    if cube.ndim == 2:
        return cube.copy()
    if cube.ndim != 3 or cube.shape[0] < 1:
        raise ParameterError(f"cube must have shape (n_coefficients, ny, nx) or (ny, nx); got {cube.shape}")
    lam = np.asarray(wavelength_um, dtype=float)
    if lam.shape != (cube.shape[2],):
        raise ParameterError(f"wavelength_um must have shape (nx,) = ({cube.shape[2]},); got {lam.shape}")
    try:
        lo, hi = (float(v) for v in wavelength_range)
    except (TypeError, ValueError):
        raise ParameterError("wavelength_range must be two floats (lambda_min, lambda_max) in um") from None
    if not hi > lo:
        raise ParameterError(f"wavelength_range must have lambda_max > lambda_min; got {(lo, hi)}")
    w = (lam - lo) / (hi - lo)
    flat = cube[-1].copy()
    for k in range(cube.shape[0] - 2, -1, -1):
        flat *= w
        flat += cube[k]
    return flat


def linearize(e, coeffs):
    """Correct non-linear charge to linear charge.

    ``linear = e * (1 + sum_{k=1..K} C[k-1] * e**k)`` with ``e`` the electrons
    above bias as read (the project's reference-file convention).  No mask is
    involved; NaN in ``e`` or ``C`` gives NaN.  The inputs are not modified.

    Parameters
    ----------
    e : array_like of shape (..., ny, nx)
        Electrons above bias as read (``(read_adu - bias_adu) * gain``); any
        leading axes (e.g. reads) broadcast against ``coeffs``.
    coeffs : array_like of shape (K, ny, nx) or (K,), or None
        Coefficient planes C[0] .. C[K-1], units e-**-k.  ``None`` or K = 0
        returns a float copy of ``e``.

    Returns
    -------
    linear : ndarray, float64, shape of ``e`` broadcast with ``coeffs[0]``
        Linearised electrons.

    Raises
    ------
    ParameterError
        If ``coeffs`` does not broadcast against ``e``.

    Notes
    -----
    Horner's rule: ``p = C[K-1]; p = p * e + C[k-1]`` down to ``k = 1``; then
    ``linear = e * (1 + e * p)``.  The uncertainty of the correction itself is
    not propagated (the reference is taken as exact); the noise of ``e`` scales
    by the local derivative, ``d linear / d e = 1 + sum_k (k + 1) C[k-1] e**k``,
    which is within a few per cent of 1 for realistic detectors and is not
    applied to the variances downstream.
    """
    e = np.asarray(e, dtype=float)
    if coeffs is None:
        return e.copy()
    c = np.asarray(coeffs, dtype=float)
    if c.shape[0] == 0:
        return e.copy()
    try:
        np.broadcast_shapes(e.shape, c.shape[1:])
    except ValueError:
        raise ParameterError(
            f"coeffs of shape {c.shape} (K, ny, nx) does not broadcast against e of shape {e.shape}") from None
    p = np.broadcast_to(c[-1], np.broadcast_shapes(e.shape, c.shape[1:])).copy()
    for k in range(c.shape[0] - 2, -1, -1):
        p *= e
        p += c[k]
    return e * (1.0 + e * p)
