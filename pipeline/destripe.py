"""Removal of correlated (1/f) read noise: row and column stripes, or the readout stream.

Two estimators, chosen by ``method`` of :func:`destripe`; both measure the
pattern from pixels outside a source mask (common practice: subtract a
per-row or per-column median of pixels away from the source) and subtract it
relative to the frame's level, so the background level is kept.

* ``"median"`` - per frame (a read difference or a calibrated image), the
  median of each row over the columns outside the source mask, then the
  median of each column over the rows outside it.  A row that lies entirely
  inside the mask gets no correction.  Cost: two sorts of each frame,
  O(n ny nx log nx); a few ms for 7 frames of 100 x 180 pixels.
* ``"stream"`` - the pixels are clocked out row after row, columns fastest,
  so 1/f noise is a slowly wandering offset along that readout stream (index
  ``y nx + x``), not a constant per row.  It is modelled as a smooth function
  of the stream index, the penalised least-squares smoother of Eilers (2003)
  with first differences, plus one offset per column (the same for every
  row), fitted jointly by back-fitting to the pixels outside the mask.  Rows
  crossed by the source are bridged from the unmasked pixels at their two
  ends and from the rows before and after them; its smoothness comes from
  the data, measured between neighbouring rows or (``smoothing="gap"``, the
  calibrate stage's choice for stares) at the separation it bridges, which
  suits 1/f noise.  Cost: one factorisation of
  the tridiagonal smoother matrix per fit (twice when outliers are
  rejected), reused by every frame and back-fitting pass, and one
  tridiagonal solve of length ny nx per frame and pass, O(n ny nx); about
  3.5 ms for 4 frames of 40 x 256 pixels, memory a few copies of the frames.

Masks are boolean, True = pixel not used for the estimate.
"""

from dataclasses import dataclass

import numpy as np
from scipy.linalg.lapack import dpttrf as _pttrf, dpttrs as _pttrs

from .errors import ParameterError
from .maskedmedian import masked_median

__all__ = ["DestripeResult", "destripe", "stream_smoothing", "bridged_rows", "AXES", "METHODS"]

#: Allowed values of ``axes`` in :func:`destripe`.
AXES = ("rows", "columns", "both")
#: Allowed values of ``method`` in :func:`destripe`.
METHODS = ("median", "stream")

_MAD_TO_SIGMA = 1.4826  # normal distribution: sigma = 1.4826 MAD (common practice)


@dataclass(frozen=True)
class DestripeResult:
    """Result of :func:`destripe`.

    Attributes
    ----------
    frames : ndarray of shape (..., ny, nx)
        Destriped frames, float64.
    row_offsets : ndarray of shape (..., ny)
        Subtracted offset of each row (0 where every pixel of the row is masked
        or ``axes`` excludes rows).  ``method="stream"``: the mean over the row
        of the subtracted stream model.
    column_offsets : ndarray of shape (..., nx)
        Subtracted offset of each column (after the row correction).
    smoothing : float
        ``method="stream"``: the smoothing weight used, pixels**2 along the
        stream (NaN for ``"median"`` or when no stream was fitted).
    n_used : int
        Pixels per frame that entered the estimate.
    """

    frames: np.ndarray
    row_offsets: np.ndarray
    column_offsets: np.ndarray
    smoothing: float = float("nan")
    n_used: int = 0


def destripe(frames, source_mask, *, axes="both", mask=None, min_pixels=5, method="median",
             smoothing=None, clip=5.0, iterations=3):
    """Subtract row and column stripes, or the readout stream, measured away from the source.

    Mask contract: pixels where ``source_mask`` (True = source to avoid) or
    ``mask`` (True = bad) is True, and non-finite pixels, are not used to
    measure the pattern, but every pixel is corrected.  ``method="median"``:
    a row (column) with fewer than ``min_pixels`` usable pixels gets no
    correction.  ``method="stream"``: a pixel unusable in any frame is left
    out of every frame's estimate, a column with fewer than ``min_pixels``
    usable pixels gets no column offset, and pixels further than ``clip``
    robust sigma from the first model are rejected (cosmic rays, hot pixels).
    The inputs are not modified.

    Parameters
    ----------
    frames : array_like of shape (ny, nx) or (n_frames, ny, nx)
        Read differences or images, any unit.
    source_mask : array_like of bool, shape (ny, nx) or that of ``frames``
        True = source pixel.
    axes : {"rows", "columns", "both"}
        Which stripes to remove; "both" does rows (the stream) first, then
        columns.
    mask : array_like of bool, optional
        Bad pixels, broadcast like ``source_mask``.
    min_pixels : int
        Minimum usable pixels per row or column.
    method : {"median", "stream"}
        See the module docstring for model and cost.
    smoothing : float or "gap", optional
        ``"stream"``: weight of the squared first differences of the stream
        model, pixels**2 (the model follows the data on scales longer than
        about ``sqrt(smoothing)`` pixels along the stream).  Default: from
        the data, :func:`stream_smoothing` with the stream's step variance
        measured between consecutive full rows; ``"gap"``: measured at the
        separation the model bridges, the longest run of rows that are not
        full plus one (:func:`bridged_rows`; at most the largest separation
        with enough pairs of full rows).  ``"gap"`` suits 1/f read noise,
        whose wander across many rows is smaller than a random walk fitted
        between neighbouring rows says (see :func:`stream_smoothing`).
    clip : float or None
        ``"stream"``: rejection threshold, robust sigma (None = no rejection).
    iterations : int
        ``"stream"`` with ``axes="both"``: back-fitting passes between the
        stream and the column offsets (>= 1).

    Returns
    -------
    DestripeResult

    Raises
    ------
    ParameterError
        Unknown ``axes`` or ``method``, shapes that do not broadcast, or
        ``smoothing`` neither ``"gap"`` nor a number > 0.

    Notes
    -----
    ``"median"``: the correction of row ``y`` is ``median_x(F[y, x]) -
    median(F)`` over usable pixels.

    ``"stream"``: with ``s = y nx + x`` and weights ``w_s`` (1 usable, 0
    not), the stream ``z`` and column offsets ``c`` minimise
    ``sum_s w_s (F_s - z_s - c_x(s))**2 + smoothing sum_s (z_(s+1) - z_s)**2``.
    For fixed ``c`` the minimiser is the solution of the tridiagonal system
    ``(W + smoothing D^T D) z = W (F - c)`` (Eilers 2003); for fixed ``z``,
    ``c_x`` is the mean of ``F - z`` over the usable pixels of column ``x``;
    alternating the two decreases the objective at every step (back-fitting,
    common practice).  The smoother is the conditional mean of a random walk
    of step variance ``q`` per pixel seen in white noise of variance
    ``sigma**2`` when ``smoothing = sigma**2 / q`` (from memory); across a
    masked gap it interpolates linearly between the model at its two ends.
    The subtracted pattern is ``z + c`` minus its mean over the usable
    pixels; since ``D^T D`` annihilates a constant, the fitted model has the
    data's mean there, so the mean of the usable pixels of each frame is
    kept.

    Subtracting an estimate from ``n`` pixels adds its own noise, about
    ``sigma**2 / n`` per pixel for white noise ``sigma`` (``(pi / 2)
    sigma**2 / n`` for a median, common practice), correlated along the row
    or column; with ``n`` of order 100 this is a few per cent of the pixel
    variance and is not propagated.  Column corrections also remove any
    column structure of the background outside the source (e.g. a dispersed
    sky); apply a background estimate afterwards.

    References
    ----------
    Eilers, P. H. C. 2003, Analytical Chemistry 75, 3631 (penalised
    least-squares smoother with weights and gaps).
    """
    if axes not in AXES:
        raise ParameterError(f"axes must be one of {AXES}; got {axes!r}")
    if method not in METHODS:
        raise ParameterError(f"method must be one of {METHODS}; got {method!r}")
    f = np.asarray(frames, dtype=float)
    if f.ndim not in (2, 3):
        raise ParameterError(f"frames must have shape (ny, nx) or (n_frames, ny, nx); got {f.shape}")
    try:
        bad = np.broadcast_to(np.asarray(source_mask, dtype=bool), f.shape)
        if mask is not None:
            bad = bad | np.broadcast_to(np.asarray(mask, dtype=bool), f.shape)
    except ValueError:
        raise ParameterError(f"source_mask and mask must broadcast to frames' shape {f.shape}") from None
    bad = bad | ~np.isfinite(f)
    if smoothing is not None and not (isinstance(smoothing, str) and smoothing == "gap") and not (
            not isinstance(smoothing, str) and np.isfinite(smoothing) and smoothing > 0):
        raise ParameterError(f"smoothing must be a finite number > 0 pixels**2, 'gap' or None; got {smoothing!r}")
    if int(iterations) < 1:
        raise ParameterError(f"iterations must be an integer >= 1; got {iterations!r}")
    if method == "stream":
        return _stream(f, bad, axes, int(min_pixels), smoothing, clip, int(iterations))
    out = f.copy()
    flat = out.reshape(out.shape[:-2] + (-1,))
    level, _ = masked_median(flat, bad.reshape(flat.shape), axis=-1)
    level = np.nan_to_num(level)
    row_off = np.zeros(f.shape[:-1])
    col_off = np.zeros(f.shape[:-2] + (f.shape[-1],))
    if axes in ("rows", "both"):
        med, n = masked_median(out, bad, axis=-1)
        row_off = np.where(n >= min_pixels, med - level[..., None], 0.0)
        out -= row_off[..., :, None]
    if axes in ("columns", "both"):
        med, n = masked_median(out, bad, axis=-2)
        col_off = np.where(n >= min_pixels, med - level[..., None], 0.0)
        out -= col_off[..., None, :]
    n_used = int(np.count_nonzero(~bad)) // max(int(np.prod(f.shape[:-2])), 1)
    return DestripeResult(frames=out, row_offsets=row_off, column_offsets=col_off, n_used=n_used)


def _factor(weights, lam):
    """L D L^T factors of the smoother's matrix W + lam D^T D (tridiagonal, positive definite)."""
    n = weights.size
    dg = np.full(n, 2.0)
    dg[0] = dg[-1] = 1.0
    d, e, info = _pttrf(weights + lam * dg, np.full(n - 1, -lam))
    if info != 0:
        raise np.linalg.LinAlgError(f"{info}th leading minor of the stream smoother not positive definite")
    return d, e


def _smooth(factors, rhs):
    """Solve (W + lam D^T D) z = rhs for the rows of ``rhs`` (shape (n, N)), with :func:`_factor`.

    The factors are computed once per weight pattern and reused for every
    frame and back-fitting pass; this is the same LAPACK factorisation and
    solve that ``scipy.linalg.solveh_banded`` makes for a tridiagonal matrix.
    """
    z, info = _pttrs(factors[0], factors[1], rhs.T)   # rhs.T is Fortran-ordered: no copy
    if info != 0:
        raise ValueError(f"illegal value in argument {-info} of the tridiagonal solve")
    return z.T


def _median(x):
    """Median along the last axis of a finite array, as ``np.median`` (one partition, not two)."""
    n = x.shape[-1]
    h = n // 2
    p = np.partition(x, h, axis=-1)
    hi = p[..., h]
    if n % 2:
        return hi
    return (p[..., :h].max(axis=-1) + hi) / 2.0


_ROBUST_SAMPLE = 20000  # values used for a robust scale (every k-th one beyond this)


def _robust_var(x):
    """(1.4826 MAD)**2 of a 1-D sample (common practice), 0 for an empty one.

    Samples larger than ``_ROBUST_SAMPLE`` are thinned to every k-th value,
    which changes the estimate by about 1 per cent.
    """
    if x.size == 0:
        return 0.0
    x = x[::max(1, -(-x.size // _ROBUST_SAMPLE))]
    return float((_MAD_TO_SIGMA * _median(np.abs(x - _median(x)))) ** 2)


def stream_smoothing(frames, usable, *, min_fraction=0.9, lag=1, min_pairs=20):
    """Smoothing weight of the stream model from the data: white variance over step variance.

    Mask contract: only pixels where ``usable`` is True enter; the inputs are
    not modified.

    Parameters
    ----------
    frames : array_like of shape (n_frames, ny, nx)
        Frames in the readout order (rows one after another, columns fastest).
    usable : array_like of bool, shape (ny, nx)
        True = pixel may be used.
    min_fraction : float
        Rows with at least this fraction of usable pixels count as full rows.
    lag : int
        Largest separation of the two full rows whose means are compared,
        rows (>= 1): the step variance is measured at the largest separation
        ``k <= lag`` with at least ``min_pairs`` differences over the frames
        (``k = 1``, consecutive rows, when none has).
    min_pairs : int
        Differences needed at a separation ``k > 1``.

    Returns
    -------
    smoothing : float
        ``sigma**2 / q``, pixels**2, clipped to ``[1, (ny nx)**2]``; ``(nx /
        2)**2`` when fewer than three pairs of consecutive full rows exist.

    Notes
    -----
    The white variance is ``sigma**2 = var(F[y, x+1] - F[y, x]) / 2`` over
    usable neighbours.  For a random walk of step variance ``q`` per pixel
    the difference of the means of two rows of ``nx`` pixels ``k`` rows apart
    has variance ``q ((k - 1) nx + (2 nx**2 + 1) / (3 nx))``, plus
    ``sigma**2 (1 / n_1 + 1 / n_2)`` from the white noise of the two means
    (derived by summing the walk's steps with their weights); column offsets
    cancel in the difference.  Both variances are robust, (1.4826 MAD)**2
    (common practice).

    Read noise of 1/f (pink) spectrum is not a random walk: its variance
    over a separation grows about as the logarithm of the separation, not
    linearly, so ``q`` measured between consecutive rows overstates how far
    the stream wanders across several rows.  ``lag`` measures ``q`` at the
    scale the smoother has to bridge (see ``smoothing="gap"`` of
    :func:`destripe`); for a random walk every ``k`` gives the same ``q``.
    """
    f = np.asarray(frames, dtype=float)
    u = np.asarray(usable, dtype=bool)
    n_fr, ny, nx = f.shape
    # the usable neighbour differences, frame after frame, thinned as _robust_var thins them:
    # only the values it keeps are computed
    pidx = np.flatnonzero(u[:, 1:] & u[:, :-1])                      # into (ny, nx - 1)
    total = n_fr * pidx.size
    j = np.arange(0, total, max(1, -(-total // _ROBUST_SAMPLE)))
    if pidx.size:
        yy, xx = np.divmod(pidx[j % pidx.size], nx - 1)
        fi = j // pidx.size
        dx = f[fi, yy, xx + 1] - f[fi, yy, xx]
    else:
        dx = np.zeros(0)
    s2 = 0.5 * _robust_var(dx)
    cnt = u.sum(axis=1)
    full = cnt >= min_fraction * nx
    idx = np.flatnonzero(full)
    consec = idx[:-1][np.diff(idx) == 1]
    fallback = (0.5 * nx) ** 2
    if consec.size < 3 or s2 <= 0:
        return float(fallback)
    k, first = 1, consec
    for sep in range(min(int(lag), ny - 1), 1, -1):
        pairs = np.flatnonzero(full[:-sep] & full[sep:])
        if n_fr * pairs.size >= min_pairs:
            k, first = sep, pairs
            break
    means = np.where(u, f, 0.0).sum(axis=2) / np.maximum(cnt, 1)     # (n_frames, ny)
    dm = (means[:, first + k] - means[:, first]).ravel()
    white = s2 * float(np.mean(1.0 / cnt[first] + 1.0 / cnt[first + k]))
    v = _robust_var(dm) - white
    n_tot = ny * nx
    if v <= 0:
        return float(n_tot) ** 2
    q = v / ((k - 1) * nx + (2.0 * nx ** 2 + 1.0) / (3.0 * nx))
    return float(np.clip(s2 / q, 1.0, float(n_tot) ** 2))


def bridged_rows(usable, *, min_fraction=0.9):
    """Longest run of consecutive rows that are not full, rows.

    Parameters
    ----------
    usable : array_like of bool, shape (ny, nx)
        True = pixel may be used.
    min_fraction : float
        Rows with at least this fraction of usable pixels count as full rows.

    Returns
    -------
    int
        0 when every row is full.
    """
    u = np.asarray(usable, dtype=bool)
    part = np.concatenate([[0], (u.sum(axis=1) < min_fraction * u.shape[1]).astype(int), [0]])
    edges = np.flatnonzero(np.diff(part))
    return int((edges[1::2] - edges[::2]).max()) if edges.size else 0


def _stream(f, bad, axes, min_pixels, smoothing, clip, iterations):
    single = f.ndim == 2
    fr = f[None] if single else f
    bd = bad[None] if single else bad
    n_fr, ny, nx = fr.shape
    usable = ~bd.any(axis=0)
    zero_rows, zero_cols = np.zeros((n_fr, ny)), np.zeros((n_fr, nx))
    if not usable.any():
        out = fr.copy()
        return DestripeResult(frames=out[0] if single else out,
                              row_offsets=zero_rows[0] if single else zero_rows,
                              column_offsets=zero_cols[0] if single else zero_cols)
    y = np.where(usable, fr, 0.0)
    do_rows = axes in ("rows", "both")
    do_cols = axes in ("columns", "both")
    if not do_rows:
        lam = float("nan")
    elif smoothing is None:
        lam = stream_smoothing(y, usable)
    elif isinstance(smoothing, str):         # "gap"
        lam = stream_smoothing(y, usable, lag=bridged_rows(usable) + 1)
    else:
        lam = float(smoothing)

    def fit(use):
        w = use.ravel().astype(float)
        ncol = use.sum(axis=0)
        colok = ncol >= min_pixels
        cw = ncol * colok
        c = np.zeros((n_fr, nx))
        y3 = np.where(use, fr, 0.0)
        yk = y3.reshape(n_fr, -1)
        fac = _factor(w, lam) if do_rows else None

        def stream(c):
            # rhs W (F - c); F is already 0 where W is, so the first pass (c = 0) needs no product
            if not c.any():
                return _smooth(fac, yk)
            return _smooth(fac, w * (y3 - c[:, None, :]).reshape(n_fr, -1))

        if not do_rows:
            z = np.broadcast_to(np.median(fr[:, use], axis=1)[:, None], (n_fr, ny * nx))
        for _ in range(iterations if (do_rows and do_cols) else 1):
            if do_rows:
                z = stream(c)
            if do_cols:
                r = np.where(use, (yk - z).reshape(n_fr, ny, nx), 0.0).sum(axis=1)
                c = np.where(colok, r / np.maximum(ncol, 1), 0.0)
                c = np.where(colok, c - (c * cw).sum(axis=1, keepdims=True) / max(cw.sum(), 1), 0.0)
        if do_rows and do_cols:
            z = stream(c)
        return z.reshape(n_fr, ny, nx), c

    z, c = fit(usable)
    if clip is not None:
        resid = (fr - z - c[:, None, :])[:, usable]                       # (n_frames, n_usable)
        sub = resid[:, ::max(1, -(-resid.size // _ROBUST_SAMPLE))]
        med = _median(sub)[:, None]
        scale = _MAD_TO_SIGMA * _median(np.abs(sub - med))[:, None]
        out_any = np.zeros((ny, nx), bool)
        out_any[usable] = np.any(np.abs(resid - med) > float(clip) * scale, axis=0)
        if out_any.any():
            usable = usable & ~out_any
            z, c = fit(usable)
    model = z + c[:, None, :]
    ref = model[:, usable].mean(axis=1)
    zrel = z - ref[:, None, None]
    out = fr - zrel - c[:, None, :]
    row_off = zrel.mean(axis=2) if do_rows else zero_rows
    col_off = c if do_cols else zero_cols
    n_used = int(np.count_nonzero(usable))
    if single:
        out, row_off, col_off = out[0], row_off[0], col_off[0]
    return DestripeResult(frames=out, row_offsets=row_off, column_offsets=col_off,
                          smoothing=lam if do_rows else float("nan"), n_used=n_used)
