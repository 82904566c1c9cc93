"""Posterior draws of a phase curve's coefficients with uniform priors on amplitude and angle.

A phase curve's planet flux ``F_p = c0 + a1 cos xi + b1 sin xi + ...`` is fitted
linearly in its coefficients, so their likelihood is Gaussian with the fit's
covariance (exactly for the linear part; the nonlinear parameters enter to
first order).  The quantities an observer reads, the peak-to-trough
amplitude and the hotspot offset, are not linear: the amplitude is a length
``hypot(a1, b1)`` and the offset an angle.  When the first harmonic is
measured with a signal-to-noise ratio of a few (two short visits, or a
sinusoid whose sine term is nearly degenerate with each visit's own
trends), the length's estimate is biased upwards (the Rice bias of a vector
length measured with noise) and the angle's distribution has wide wings,
so errors propagated to first order are wrong: too large for the amplitude,
too small for the offset.

:func:`posterior_draws` draws the coefficients from their posterior with a
prior uniform in the first harmonic's amplitude ``A1 = hypot(a1, b1) >= 0``
and angle ``atan2(b1, a1)`` (and flat in the other coefficients): the
amplitude and the offset a fitter would sample directly (common practice in
phase-curve fits).
In polar coordinates this posterior density is the likelihood itself (the
Jacobian ``A1`` cancels the prior's ``1/A1`` in the Cartesian plane), so the
first harmonic is drawn from the likelihood on a polar grid and the other
coefficients from their Gaussian conditional on it.  For a well measured
curve the draws are those of the Gaussian (the summaries agree with first
order propagation); for a poorly measured one they carry the bound at zero
amplitude and the full circle of angles.

Pure functions on arrays; draws from a fixed seed, so results are
reproducible.
"""

import numpy as np

from .errors import ParameterError

__all__ = ["posterior_draws", "polar_grid_posterior"]

#: Half-width of the polar grid, in standard deviations of the first harmonic.
SPAN = 8.0


def polar_grid_posterior(v, C11, n_amplitude=320, n_angle=361):
    """Likelihood of the first harmonic on a polar grid.

    Parameters
    ----------
    v : array_like of float, shape (2,)
        Fitted ``(a1, b1)``.
    C11 : array_like of float, shape (2, 2)
        Their covariance (positive definite).
    n_amplitude, n_angle : int
        Grid nodes in amplitude and in angle.

    Returns
    -------
    (amplitude, angle, weight)
        Node centres (1-D, amplitude >= 0 and radians) and the normalised
        weights (n_amplitude, n_angle) of the cells, proportional to the
        likelihood ``exp(-(A u - v)^T C11^-1 (A u - v) / 2)`` with
        ``u = (cos angle, sin angle)``.

    Notes
    -----
    The grid spans the amplitude ``|v| +- 8 s`` (cut at 0), ``s`` the larger
    standard deviation of the first harmonic, and the angles within
    ``asin(8 s / |v|)`` of the fitted angle (the whole circle when ``|v| <=
    8 s``), so that a well measured harmonic is resolved as finely as a
    poorly measured one.
    """
    v = np.asarray(v, float)
    C11 = np.asarray(C11, float)
    W = np.linalg.inv(C11)
    s = float(np.sqrt(np.max(np.linalg.eigvalsh(C11))))
    r = float(np.hypot(*v))
    lo, hi = max(0.0, r - SPAN * s), r + SPAN * s
    da = (hi - lo) / n_amplitude
    amplitude = lo + da * (np.arange(n_amplitude) + 0.5)
    centre = float(np.arctan2(v[1], v[0]))
    half = float(np.arcsin(SPAN * s / r)) if r > SPAN * s else np.pi
    dt = 2 * half / n_angle
    angle = centre - half + dt * (np.arange(n_angle) + 0.5)
    u = np.stack([np.cos(angle), np.sin(angle)], axis=1)             # (n_angle, 2)
    uWu = np.einsum("mi,ij,mj->m", u, W, u)
    uWv = u @ (W @ v)
    chi2 = amplitude[:, None] ** 2 * uWu[None, :] - 2 * amplitude[:, None] * uWv[None, :]
    w = np.exp(-0.5 * (chi2 - chi2.min()))
    return amplitude, angle, w / w.sum()


def posterior_draws(coefficients, covariance, n_draws=10000, seed=0):
    """Draws of the planet's coefficients with uniform priors on the first harmonic's
    amplitude and angle.

    Parameters
    ----------
    coefficients : array_like of float, shape (1 + 2 h,), h >= 1
        ``c0, a1, b1, ...`` fitted.
    covariance : array_like of float, shape (1 + 2 h, 1 + 2 h)
        Their covariance; the first harmonic's 2 x 2 block must be positive
        definite.
    n_draws : int
        Number of draws.
    seed : int
        Seed of the generator (fixed: the same inputs give the same draws).

    Returns
    -------
    ndarray of float, shape (n_draws, 1 + 2 h)

    Notes
    -----
    ``(a1, b1)`` are drawn from the polar grid of
    :func:`polar_grid_posterior` (a cell by its weight, then uniformly
    within it); the other coefficients ``c_r`` from their Gaussian
    conditional ``N(c_r + K (x - v), C_rr - K C_1r)`` with ``K = C_r1
    C_11^-1`` (the conditional of a multivariate normal, common practice).

    References
    ----------
    The bias of a length measured with noise and its correction: Wardle &
    Kronberg 1974, ApJ 194, 249 (from memory); sampling a phase curve in
    amplitude and offset: common practice.
    """
    c = np.asarray(coefficients, float).ravel()
    C = np.asarray(covariance, float)
    if c.size < 3 or c.size % 2 != 1 or C.shape != (c.size, c.size):
        raise ParameterError("coefficients must be c0, a1, b1, ... with a square covariance")
    one = np.array([1, 2])
    rest = np.array([k for k in range(c.size) if k not in (1, 2)])
    C11 = C[np.ix_(one, one)]
    if not np.all(np.isfinite(C)) or np.linalg.eigvalsh(C11).min() <= 0:
        raise ParameterError("the first harmonic's covariance must be finite and positive definite")
    rng = np.random.default_rng(seed)
    amplitude, angle, w = polar_grid_posterior(c[one], C11)
    cdf = np.cumsum(w.ravel())
    cell = np.minimum(np.searchsorted(cdf, rng.random(n_draws) * cdf[-1]), w.size - 1)
    i, j = np.unravel_index(cell, w.shape)
    da = amplitude[1] - amplitude[0] if amplitude.size > 1 else 0.0
    dt = angle[1] - angle[0] if angle.size > 1 else 0.0
    A = np.clip(amplitude[i] + da * (rng.random(n_draws) - 0.5), 0.0, None)
    t = angle[j] + dt * (rng.random(n_draws) - 0.5)
    draws = np.empty((n_draws, c.size))
    draws[:, 1] = A * np.cos(t)
    draws[:, 2] = A * np.sin(t)
    K = C[np.ix_(rest, one)] @ np.linalg.inv(C11)
    cond = C[np.ix_(rest, rest)] - K @ C[np.ix_(one, rest)]
    vals, vecs = np.linalg.eigh(0.5 * (cond + cond.T))
    root = vecs * np.sqrt(np.clip(vals, 0.0, None))
    mean = c[rest][None, :] + (draws[:, 1:3] - c[one][None, :]) @ K.T
    draws[:, rest] = mean + rng.normal(size=(n_draws, rest.size)) @ root.T
    return draws
