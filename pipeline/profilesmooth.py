"""Smoothing kernels of a spatial profile along the dispersion axis.

Weighted Legendre polynomials per row with rejection, running medians, and
the joint fit of polynomials along detector rows and along a frame that
follows a tilted trace (4-tap cubic convolution, Keys 1981); see
:mod:`lightledger.pipeline.spatialprofile` for the method and its accuracy.

References
----------
Horne, K. 1986, PASP 98, 609.
Marsh, T. R. 1989, PASP 101, 1032.
Keys, R. 1981, IEEE Trans. ASSP 29, 1153 (citation from memory).
"""

import numpy as np
from numpy.polynomial import legendre
from scipy import sparse

from .maskedmedian import masked_median

# --------------------------------------------------------------------------
# profile smoothing kernels
# --------------------------------------------------------------------------

def _polynomial_smooth(y, w, order, threshold, n_iter):
    """Weighted Legendre fit along the last axis, with rejection.

    ``y`` and ``w`` (inverse variance, 0 = unused) have shape (..., n); the
    fit is independent for every leading index.  Returns the model.
    """
    n = y.shape[-1]
    basis = legendre.legvander(np.linspace(-1.0, 1.0, n), order)  # (n, K)
    w = w.copy()
    k = basis.shape[1]
    eye = np.eye(k)
    for _ in range(n_iter + 1):
        normal = np.matmul(basis.T * w[..., np.newaxis, :], basis)   # (..., K, K)
        rhs = np.matmul(basis.T, (w * y)[..., np.newaxis])[..., 0]   # (..., K)
        scale = np.trace(normal, axis1=-2, axis2=-1)[..., None, None]
        # a tiny ridge keeps rows without data solvable (their model is 0)
        normal = normal + eye * (1e-12 * scale + 1e-300)
        coef = np.linalg.solve(normal, rhs[..., np.newaxis])[..., 0]
        model = coef @ basis.T
        chi2 = (y - model) ** 2 * w
        bad = chi2 > threshold ** 2
        if not bad.any():
            break
        w[bad] = 0.0
    return model


def _median_smooth(y, w, window):
    """Running median along the last axis over pixels with ``w > 0``.

    The median of each window ignores the other pixels (as ``numpy.nanmedian``
    would, with the same result) through :func:`.maskedmedian.masked_median`, which
    sorts windows of up to 8 pixels by a comparator network: several times
    faster than ``nanmedian`` on the 7-pixel screening window.
    """
    half = window // 2
    vals = np.where(w > 0, y, np.nan)
    pad = [(0, 0)] * (vals.ndim - 1) + [(half, half)]
    vals = np.pad(vals, pad, constant_values=np.nan)
    windows = np.lib.stride_tricks.sliding_window_view(vals, window, axis=-1)
    model, _ = masked_median(windows, False, axis=-1)                 # all-masked: NaN
    return np.where(np.isfinite(model), model, 0.0)


_KEYS_A = -0.5


def _keys_weights(t):
    """Weights of the 4 taps at offsets -1, 0, 1, 2 for a fraction t in [0, 1)."""
    a = _KEYS_A
    t2, t3 = t * t, t * t * t
    return np.stack([
        a * (t3 - 2 * t2 + t),
        (a + 2) * t3 - (a + 3) * t2 + 1,
        -(a + 2) * t3 + (2 * a + 3) * t2 - a * t,
        -a * (t3 - t2),
    ])


def _sample_rows(a, good, dy, zero_outside=False):
    """Sample ``a`` (n_exp, n_rows, n_cols) at rows ``u + dy`` for every row u.

    ``dy`` has shape (n_exp, n_cols).  Returns the samples and a validity
    mask (all four taps inside the frame and good).  Taps outside the frame
    read the nearest edge row, or contribute nothing with ``zero_outside``
    (for a field that is zero beyond the frame).
    """
    n_exp, ny, nx = a.shape
    pos = np.arange(ny)[None, :, None] + dy[:, None, :]          # (e, u, x)
    base = np.floor(pos).astype(int)
    t = pos - base
    wts = _keys_weights(t)                                        # (4, e, u, x)
    out = np.zeros(pos.shape)
    valid = np.ones(pos.shape, dtype=bool)
    for tap in range(4):      # four kernel taps, not a loop over pixels
        idx = base + tap - 1
        inside = (idx >= 0) & (idx < ny)
        idx_c = np.clip(idx, 0, ny - 1)
        w_tap = np.where(inside, wts[tap], 0.0) if zero_outside else wts[tap]
        out += w_tap * np.take_along_axis(a, idx_c, axis=1)
        valid &= inside & np.take_along_axis(good, idx_c, axis=1)
    return out, valid


def _median_along_trace(sample, weight, dy, window):
    """Running median along the rows, plus that of the residual along the trace.

    The residual of the row median is sampled onto rows that follow the
    trace, smoothed there by the running median and sampled back; trace
    rows whose taps leave the aperture contribute nothing.
    """
    rows = _median_smooth(sample, weight, window)
    has = weight > 0
    resid, valid = _sample_rows(sample - rows, has, dy)
    _, inside = _sample_rows(resid, np.ones(resid.shape, dtype=bool), dy)
    along = np.where(inside, _median_smooth(resid, valid.astype(float), window), 0.0)
    back, _ = _sample_rows(along, np.ones(along.shape, dtype=bool), -dy, zero_outside=True)
    # rows without a usable pixel keep the row median's 0 (see the polynomial)
    return np.where(has.any(axis=2, keepdims=True), rows + back, 0.0)


def _trace_taps(dy, ny):
    """Kernel taps that carry trace-frame rows onto the detector rows.

    Detector row y of column x lies at ``u = y - dy`` in the frame that
    follows the trace.  Returns the trace-row index of each of the four taps
    (counted from the first trace row touched), their weights, both of shape
    (4, n_exp, ny, n_cols), and the number of trace rows touched.
    """
    pos = np.arange(ny)[None, :, None] - dy[:, None, :]
    base = np.floor(pos).astype(int)
    wts = _keys_weights(pos - base)
    first = int(base.min()) - 1
    idx = base[None] + np.arange(-1, 3)[:, None, None, None] - first
    return idx, wts, int(base.max()) + 2 - first + 1


def _joint_polynomial_smooth(y, w, dy, order, threshold, n_iter):
    """Weighted least-squares fit of row polynomials plus trace polynomials.

    The model of ``y`` (n_exp, n_rows, n_cols) is, per exposure, a Legendre
    polynomial of degree ``order`` along the last axis for every detector row
    plus one for every row of the frame that follows the trace, the latter
    carried onto the detector rows by the cubic convolution kernel.  ``w``
    is the inverse variance (0 = unused); pixels beyond ``threshold`` sigma
    are rejected for up to ``n_iter`` refits.  Returns the model.
    """
    n_exp, ny, nx = y.shape
    k = order + 1
    basis = legendre.legvander(np.linspace(-1.0, 1.0, nx), order)        # (nx, K)
    idx, wts, n_u = _trace_taps(dy, ny)
    n_par = (ny + n_u) * k
    shape = (n_exp, ny, nx, k)
    pixel = np.broadcast_to(np.arange(n_exp * ny * nx).reshape(n_exp, ny, nx, 1), shape)
    start = (np.arange(n_exp) * n_par)[:, None, None, None]
    kk = np.arange(k)
    cols = [np.broadcast_to(start + np.arange(ny)[None, :, None, None] * k + kk, shape)]
    vals = [np.broadcast_to(basis, shape)]
    for tap in range(4):      # four kernel taps, not a loop over pixels
        cols.append(start + (ny + idx[tap])[..., None] * k + kk)
        vals.append(wts[tap][..., None] * basis)
    design = sparse.coo_array(
        (np.concatenate([v.ravel() for v in vals]),
         (np.concatenate([pixel.ravel()] * 5), np.concatenate([c.ravel() for c in cols]))),
        shape=(n_exp * ny * nx, n_exp * n_par)).tocsr()
    design_t = design.T.tocsr()
    has_data = (w > 0).any(axis=2, keepdims=True)
    w = w.copy()
    flat = y.ravel()
    ridge = 1e-10 * np.eye(n_par)
    for _ in range(n_iter + 1):
        wf = w.ravel()
        normal = (design_t @ sparse.diags_array(wf) @ design).tocoo()
        dense = np.zeros((n_exp, n_par, n_par))
        dense[normal.row // n_par, normal.row % n_par, normal.col % n_par] = normal.data
        rhs = (design_t @ (wf * flat)).reshape(n_exp, n_par)
        # Jacobi scaling and a tiny ridge: the two parts overlap (exactly so
        # for an untilted trace) and trace rows without data have no
        # constraint; both then get the smallest-norm split
        diag = np.einsum("eii->ei", dense)
        scale = 1.0 / np.sqrt(np.where(diag > 0, diag, 1.0))
        dense = dense * scale[:, :, None] * scale[:, None, :] + ridge
        coef = np.linalg.solve(dense, (rhs * scale)[..., None])[..., 0] * scale
        model = (design @ coef.ravel()).reshape(n_exp, ny, nx)
        bad = (y - model) ** 2 * w > threshold ** 2
        if not bad.any():
            break
        w[bad] = 0.0
    # a row without a single usable pixel gets no profile, as in the fit
    # along detector rows (which gives it 0): otherwise the trace part
    # would extrapolate into it, e.g. outside the band of a moving aperture
    return np.where(has_data, model, 0.0)
