"""Systematics detrending of light curves jointly with an event template.

Masks follow the project's contract: a boolean ``mask`` is True where an
exposure is bad and must not enter the fit; exposures with a non-finite flux or
a non-finite or non-positive variance are left out too.  Every returned
per-exposure array still covers all exposures (the model is evaluated
everywhere).  Inputs are not modified.

The model of the flux of exposure :math:`i` is

.. math:: f_i = S_i \\, (1 - \\delta \\, s_i), \\qquad S_i = \\sum_k a_k B_{ik},

with :math:`B` a basis whose first column is 1 (so :math:`a_0 = F_0`, the
out-of-event flux, and :math:`S = F_0 (1 + \\sum_{k>0} (a_k/a_0) B_{ik})`),
:math:`s` the event template normalised to unit depth (0 out of the event)
and :math:`\\delta` the depth.  For a transit :math:`\\delta` is the fractional
flux lost at the template's deepest point; for an eclipse it is the fraction
of the out-of-eclipse flux hidden in full eclipse, :math:`f_p/(1 + f_p)` with
:math:`f_p` the planet-to-star flux ratio (invert with
:math:`f_p = \\delta/(1 - \\delta)`).

For an eclipse observed with its phase curve the planet's own flux
:math:`F_p(t) = c_0 + c_1 \\cos 2\\pi\\phi + c_2 \\sin 2\\pi\\phi` can instead
be hidden by the eclipse, :math:`f_i = S_{*i} (1 + F_p(t_i)(1 - s_i))`, with
:math:`S_*` the star's flux times the systematics; the depth is then
:math:`F_p/(1 + F_p)` at mid-eclipse (``tie_phase_curve`` of
:func:`detrend_light_curve`, ``planet_basis`` of :func:`fit_event`).

The fit is weighted least squares on the flux itself, not on its logarithm:
for fixed :math:`\\delta` the model is linear in :math:`a`, and the joint
problem is bilinear, solved by Gauss-Newton iterations from the linearised
solution until the step is below 1e-13 of the parameters.  A noise-free
series built from the model is therefore recovered to rounding.  The only
nonlinear systematic is the ramp time scale :math:`\\tau` of
:math:`\\exp(-t_{orb}/\\tau)`, chosen on a grid by :math:`\\chi^2` and
optionally refined by a bounded one-dimensional minimisation; its
uncertainty is carried into the covariance to first order.  Covariances are
computed from the singular value decomposition of the weighted,
column-normalised Jacobian, never by inverting the normal matrix.

Times are days; the template and basis columns are dimensionless.
"""

from dataclasses import dataclass

import numpy as np
from scipy.optimize import minimize_scalar

from .errors import AllMaskedError, ParameterError

__all__ = ["DetrendResult", "ChannelFits", "BinnedRms", "transit_template",
           "eclipse_template", "polynomial_basis", "orbit_phase_basis", "ramp_basis",
           "scan_direction_basis", "phase_curve_basis", "fit_event",
           "detrend_light_curve", "fit_channels", "binned_rms", "DEFAULT_TAU_GRID"]

#: Default ramp time scales, days (1 to 60 minutes, log-spaced).
DEFAULT_TAU_GRID = np.geomspace(1.0, 60.0, 16) / 1440.0


# --------------------------------------------------------------------------
# Templates and basis builders
# --------------------------------------------------------------------------

def _vector(x, name, n=None):
    a = np.asarray(x, dtype=float)
    if a.ndim != 1 or (n is not None and a.size != n):
        want = f"({n},)" if n is not None else "1-D"
        raise ParameterError(f"{name} must have shape {want}; got {a.shape}")
    return a


def transit_template(model_flux):
    """Unit-depth transit shape from a normalised transit model.

    Parameters
    ----------
    model_flux : array_like of float, shape (n_exposures,)
        Model relative flux, 1 out of transit (e.g. from a Mandel & Agol 2002
        model).

    Returns
    -------
    s : ndarray of float, shape (n_exposures,)
        ``(1 - model) / max(1 - model)``: 0 out of transit, 1 at the deepest
        point.
    """
    m = _vector(model_flux, "model_flux")
    drop = 1.0 - m
    peak = np.nanmax(drop) if drop.size else 0.0
    if not np.isfinite(peak) or peak <= 0:
        raise ParameterError("model_flux must dip below 1 somewhere (a transit); it does not")
    return drop / peak


def eclipse_template(model_flux):
    """Unit-depth eclipse shape from an eclipse model.

    Parameters
    ----------
    model_flux : array_like of float, shape (n_exposures,)
        Model flux of star plus planet, highest out of eclipse.

    Returns
    -------
    s : ndarray of float, shape (n_exposures,)
        ``(max - model) / (max - min)``: one minus the planet's visibility, 0
        out of eclipse and 1 in full eclipse.
    """
    m = _vector(model_flux, "model_flux")
    hi, lo = np.nanmax(m), np.nanmin(m)
    if not (np.isfinite(hi) and np.isfinite(lo) and hi > lo):
        raise ParameterError("model_flux must vary (an eclipse); it is constant")
    return (hi - m) / (hi - lo)


def _scaled(t):
    t = np.asarray(t, dtype=float)
    lo, hi = np.nanmin(t), np.nanmax(t)
    half = 0.5 * (hi - lo)
    return (t - 0.5 * (hi + lo)) / (half if half > 0 else 1.0)


def polynomial_basis(time, order):
    """Visit-long polynomial in time, without the constant.

    Parameters
    ----------
    time : array_like of float, shape (n_exposures,)
        Days.
    order : int
        Highest power, >= 0 (0 gives no column).

    Returns
    -------
    columns : ndarray of float, shape (n_exposures, order)
        ``x**k`` for k = 1..order with ``x`` the time mapped onto [-1, 1]
        over the visit (for conditioning).
    """
    t = _vector(time, "time")
    k = _order(order, "order")
    x = _scaled(t)
    return x[:, None] ** np.arange(1, k + 1)[None, :]


def orbit_phase_basis(orbit_time, order):
    """Polynomial in time since the orbit's start, shared by all orbits.

    Parameters
    ----------
    orbit_time : array_like of float, shape (n_exposures,)
        Days since the start of each exposure's orbit.
    order : int
        Highest power, >= 0.

    Returns
    -------
    columns : ndarray of float, shape (n_exposures, order)
        ``x**k``, k = 1..order, with ``x`` = orbit_time / max(orbit_time).

    References
    ----------
    Berta et al. 2012, ApJ 747, 35 (orbit-phase systematics).
    """
    t = _vector(orbit_time, "orbit_time")
    k = _order(order, "order")
    top = np.nanmax(t) if t.size else 1.0
    x = t / (top if top > 0 else 1.0)
    return x[:, None] ** np.arange(1, k + 1)[None, :]


def ramp_basis(orbit_time, orbit, tau):
    """Per-orbit exponential ramp, one column per orbit.

    The systematics ``a_0 + r_o exp(-t_orb / tau)`` in orbit ``o`` equal
    ``(a_0 + r_o) - r_o (1 - exp(-t_orb / tau))``: with the constant column in
    the fit, these columns span the ramp ``1 - exp(-t_orb / tau)`` with a
    free amplitude in each orbit.

    Parameters
    ----------
    orbit_time : array_like of float, shape (n_exposures,)
        Days since the start of the exposure's orbit.
    orbit : array_like of int, shape (n_exposures,)
        Orbit number of each exposure.
    tau : float
        Time scale, days, > 0.

    Returns
    -------
    columns : ndarray of float, shape (n_exposures, n_orbits)
        Column ``o`` is ``exp(-orbit_time / tau)`` in orbit ``o`` and 0
        elsewhere, for each distinct orbit number in increasing order.

    References
    ----------
    Kreidberg et al. 2014, Nature 505, 69; Zhou et al. 2017, AJ 153, 243.
    """
    t = _vector(orbit_time, "orbit_time")
    o = np.asarray(orbit)
    if o.shape != t.shape:
        raise ParameterError(f"orbit must have the shape of orbit_time {t.shape}; got {o.shape}")
    if not (np.isfinite(tau) and tau > 0):
        raise ParameterError(f"tau must be a finite time in days > 0; got {tau!r}")
    labels = np.unique(o)
    return np.exp(-t / tau)[:, None] * (o[:, None] == labels[None, :])


def scan_direction_basis(direction):
    """Offset between the two scan directions.

    Parameters
    ----------
    direction : array_like, shape (n_exposures,)
        Scan direction sign of each exposure (e.g. the sign of the scan
        speed): > 0 forward, <= 0 reverse.

    Returns
    -------
    columns : ndarray of float, shape (n_exposures, 1) or (n_exposures, 0)
        1 for forward exposures, 0 otherwise; no column when all exposures
        share one direction.
    """
    d = _vector(direction, "direction")
    fwd = (d > 0).astype(float)
    if np.all(fwd == fwd[0]) if fwd.size else True:
        return np.zeros((d.size, 0))
    return fwd[:, None]


def phase_curve_basis(time, t0, period, *, harmonics=1):
    """Sinusoids of the orbital phase, for a phase curve.

    Parameters
    ----------
    time : array_like of float, shape (n_exposures,)
        BJD_TDB, days.
    t0 : float
        Reference mid-transit time, days.
    period : float
        Orbital period, days, > 0.
    harmonics : int, optional
        Number of harmonics (default 1).

    Returns
    -------
    columns : ndarray of float, shape (n_exposures, 2 * harmonics)
        ``cos(2 pi h phi), sin(2 pi h phi)`` for h = 1..harmonics with
        ``phi = (time - t0) / period``.
    """
    t = _vector(time, "time")
    if not (np.isfinite(period) and period > 0):
        raise ParameterError(f"period must be a finite number of days > 0; got {period!r}")
    h = _order(harmonics, "harmonics")
    phi = (t - float(t0)) / float(period)
    cols = []
    for k in range(1, h + 1):
        cols += [np.cos(2 * np.pi * k * phi), np.sin(2 * np.pi * k * phi)]
    return np.stack(cols, axis=1) if cols else np.zeros((t.size, 0))


def _order(order, name):
    k = int(order)
    if k < 0 or k != order:
        raise ParameterError(f"{name} must be an integer >= 0; got {order!r}")
    return k


# --------------------------------------------------------------------------
# The fit
# --------------------------------------------------------------------------

@dataclass(frozen=True)
class DetrendResult:
    """A light-curve fit; returned by :func:`fit_event` and :func:`detrend_light_curve`.

    Attributes
    ----------
    depth : float
        Event depth :math:`\\delta` (dimensionless; see the module notes); with
        the planet's flux fitted (``planet_basis``), :math:`F_p/(1 + F_p)` at
        mid-eclipse.
    depth_error : float
        Standard error of ``depth``, multiplied by ``error_scale``.
    depth_error_unscaled : float
        Standard error from the given variances alone.
    error_scale : float
        ``sqrt(reduced_chi2)`` when the reduced chi-square exceeds 1, else 1.
    reduced_chi2 : float
        ``chi2 / (n_points - n_params)``.
    systematics : ndarray of float, shape (n_exposures,)
        :math:`S`, the systematics model in flux units (includes :math:`F_0`):
        the model's out-of-event flux (with the planet's flux,
        :math:`S_* (1 + F_p)`).
    model : ndarray of float, shape (n_exposures,)
        :math:`S (1 - \\delta s)` (with the planet's flux,
        :math:`S_* (1 + F_p (1 - s))`).
    detrended_flux : ndarray of float, shape (n_exposures,)
        ``flux / systematics`` (1 out of the event).
    detrended_error : ndarray of float, shape (n_exposures,)
        ``sqrt(variance) / systematics``.
    residuals : ndarray of float, shape (n_exposures,)
        ``detrended_flux - model / systematics`` (``1 - depth * template``
        without the planet's flux), relative units.
    coefficients : ndarray of float, shape (n_columns,)
        :math:`a_k` of the basis columns (the first is :math:`F_0`, or the
        star's flux :math:`F_*` with the planet's flux), followed by the
        planet's :math:`c_j` when fitted; 0 for a column that is zero on every
        fitted exposure.
    coefficient_names : tuple of str
    covariance : ndarray of float, shape (n_columns + 1, n_columns + 1)
        Unscaled covariance of (coefficients, depth), marginalised over any
        nonlinear parameter whose derivatives were given; rows and columns of
        dropped columns are 0.
    chi2 : float
        Weighted sum of squared residuals over the fitted exposures.
    bic : float
        ``chi2 + n_params * ln(n_points)`` (Schwarz 1978; chi2 equals
        -2 ln L up to a constant for Gaussian errors of known variance).
    n_params : int
        Free parameters: used basis columns + depth (+ 1 for a ramp time
        scale chosen from a grid or fitted).
    n_points : int
        Exposures in the fit.
    fit_mask : ndarray of bool, shape (n_exposures,)
        True where an exposure was left out of the fit.
    tau : float
        Ramp time scale used, days; NaN without a ramp.
    mode : str
        "joint" or "out_of_event".
    """

    depth: float
    depth_error: float
    depth_error_unscaled: float
    error_scale: float
    reduced_chi2: float
    systematics: np.ndarray
    model: np.ndarray
    detrended_flux: np.ndarray
    detrended_error: np.ndarray
    residuals: np.ndarray
    coefficients: np.ndarray
    coefficient_names: tuple
    covariance: np.ndarray
    chi2: float
    bic: float
    n_params: int
    n_points: int
    fit_mask: np.ndarray
    tau: float
    mode: str


def _wls(A, y, w):
    """Weighted linear least squares; returns (coefficients, covariance).

    The columns of the weighted design matrix are scaled to unit norm and
    the problem is solved by its singular value decomposition, never by the
    normal equations: for a basis mixing a flux-sized constant with nearly
    degenerate low-order columns (a short visit's phase sinusoids against its
    polynomial and the eclipse) the normal matrix has a condition number
    beyond 1e19, and a pseudo-inverse of it silently drops exactly the
    poorly constrained directions, whose variance is the one that matters.
    Singular values below ``max(shape) * eps`` of the largest (the rank
    convention of numpy's ``lstsq``) are treated as exactly degenerate
    directions and left out (minimum-norm solution in the scaled
    coordinates).
    """
    sw = np.sqrt(w)
    Aw = A * sw[:, None]
    norm = np.sqrt(np.sum(Aw * Aw, axis=0))
    norm = np.where(norm > 0, norm, 1.0)
    U, sv, Vt = np.linalg.svd(Aw / norm, full_matrices=False)
    keep = sv > max(Aw.shape) * np.finfo(float).eps * (sv[0] if sv.size else 0.0)
    inv = np.where(keep, 1.0 / np.where(keep, sv, 1.0), 0.0)
    coef = (Vt.T @ (inv * (U.T @ (y * sw)))) / norm
    cov = ((Vt.T * inv ** 2) @ Vt) / np.outer(norm, norm)
    return coef, cov


def _prepare(flux, variance, template, mask, n=None):
    f = _vector(flux, "flux", n)
    n = f.size
    v = _vector(variance, "variance", n)
    s = _vector(template, "template", n)
    if mask is None:
        m = np.zeros(n, dtype=bool)
    else:
        m = np.asarray(mask)
        if m.dtype != bool or m.shape != (n,):
            raise ParameterError(f"mask must be boolean of shape ({n},) (True = bad)")
    bad = m | ~np.isfinite(f) | ~np.isfinite(v) | (v <= 0) | ~np.isfinite(s)
    return f, v, s, bad


def _gauss_newton(fu, wu, Bu, Qu, Du, max_iter):
    """Weighted fit of ``f = (B a)(1 + Q c)``; returns (a, c, covariance of (a, c)).

    Starts from the linearised solution ``f ~ B a + Q c'`` with
    ``c' ~ S c`` and iterates Gauss-Newton steps with step halving.  The
    covariance is marginalised over the nonlinear parameters whose basis
    derivatives are ``Du`` (shape (n_nonlinear, n_fit, n_basis)).
    """
    k, m = Bu.shape[1], Qu.shape[1]
    p_lin, _ = _wls(np.concatenate([Bu, Qu], axis=1), fu, wu)
    a = p_lin[:k]
    S_u = Bu @ a
    wq = wu[:, None] * Qu * Qu
    num, den = np.sum(wq * S_u[:, None], axis=0), np.sum(wq, axis=0)
    with np.errstate(divide="ignore", invalid="ignore"):
        scale = np.where(den > 0, num / den, 0.0)
        c = np.where(scale != 0, p_lin[k:] / scale, 0.0)
    for _ in range(int(max_iter)):
        S_u = Bu @ a
        E_u = 1.0 + Qu @ c
        r = fu - S_u * E_u
        J = np.concatenate([Bu * E_u[:, None], S_u[:, None] * Qu], axis=1)
        step, _ = _wls(J, r, wu)
        # Step halving guards against an overshoot far from the minimum.
        lam = 1.0
        chi_now = np.sum(wu * r * r)
        for _h in range(30):
            a_try, c_try = a + lam * step[:k], c + lam * step[k:]
            r_try = fu - (Bu @ a_try) * (1.0 + Qu @ c_try)
            if np.sum(wu * r_try * r_try) <= chi_now * (1 + 1e-15) + 1e-300:
                break
            lam *= 0.5
        a, c = a_try, c_try
        size = np.max(np.abs(lam * step) / np.maximum(np.abs(np.append(a, c)), 1e-300))
        if size < 1e-13 or np.max(np.abs(lam * step[k:])) < 1e-15:
            break
    S_u = Bu @ a
    E_u = 1.0 + Qu @ c
    G = (Du @ a).T * E_u[:, None]          # d f / d theta_j
    J = np.concatenate([Bu * E_u[:, None], S_u[:, None] * Qu, G], axis=1)
    _, cov = _wls(J, np.zeros(fu.size), wu)
    return a, c, cov[:k + m, :k + m]


def fit_event(flux, variance, template, basis=None, *, mask=None, mode="joint",
              basis_names=None, out_of_event_threshold=0.0, max_iter=50,
              basis_derivatives=None, planet_basis=None, planet_at_event=None,
              planet_names=None):
    """Fit systematics (a linear basis) and an event depth to one light curve.

    ``mask`` is True where an exposure is bad; those and exposures with
    non-finite flux or non-positive variance are not fitted, but every output
    array covers all exposures.  Inputs are not modified.

    Parameters
    ----------
    flux : array_like of float, shape (n_exposures,)
        Flux (electrons, or any unit).
    variance : array_like of float, shape (n_exposures,)
        Variance of ``flux``.
    template : array_like of float, shape (n_exposures,)
        Event shape :math:`s` of unit depth, 0 out of the event (see
        :func:`transit_template`, :func:`eclipse_template`).
    basis : array_like of float, shape (n_exposures, n_basis), optional
        Systematics columns without the constant, which is always added first.
    mask : array_like of bool, shape (n_exposures,), optional
    mode : {"joint", "out_of_event"}
        "joint": systematics and depth fitted together (Gauss-Newton on the
        bilinear model).  "out_of_event": systematics fitted only to exposures
        with ``template <= out_of_event_threshold``, divided out, then the
        depth fitted to the detrended series with the systematics held fixed;
        its error adds the propagated uncertainty of the systematics.
    basis_names : sequence of str, optional
        Names of the basis columns (default "b1", "b2", ...).
    out_of_event_threshold : float, optional
        Template value at or below which an exposure is out of the event.
    max_iter : int, optional
        Gauss-Newton iterations at most (default 50).
    basis_derivatives : array_like of float, shape (n_nonlinear, n_exposures, n_basis), optional
        Derivatives :math:`\\partial B/\\partial\\theta_j` of the basis columns
        with respect to nonlinear parameters :math:`\\theta` held fixed in this
        fit (e.g. the logarithm of a ramp time scale).  Their uncertainty is
        then propagated into ``covariance`` and ``depth_error`` (see Notes);
        the fit itself is unchanged and ``n_params`` does not count them.
    planet_basis : array_like of float, shape (n_exposures, n_planet), optional
        Eclipses only ("joint" mode): columns :math:`P` of the planet's own
        flux relative to the star, :math:`F_p = P c` (e.g. a constant and the
        sinusoids of :func:`phase_curve_basis`), which the eclipse hides.
        The model becomes :math:`f = S_* (1 + F_p (1 - s))` with :math:`S_*
        = B a` the star's flux times the systematics (see Notes).
    planet_at_event : array_like of float, shape (n_planet,), optional
        The planet columns at mid-eclipse; required with ``planet_basis``.
        The depth is then :math:`F_p/(1 + F_p)` there.
    planet_names : sequence of str, optional
        Names of the planet columns (default "planet0", "planet1", ...).

    Returns
    -------
    DetrendResult
        With ``planet_basis`` the coefficients are those of the basis columns
        followed by :math:`c`, ``systematics`` is the out-of-eclipse flux
        :math:`S_* (1 + F_p)` and ``residuals`` are ``detrended_flux -
        model / systematics``.

    Notes
    -----
    Weights are :math:`w_i = 1/\\sigma_i^2`.  The covariance of the parameters
    :math:`p = (a, \\delta)` is :math:`(J^T W J)^{-1}` at the solution, with
    the Jacobian columns :math:`\\partial f/\\partial a_k = B_{ik}(1 - \\delta s_i)`
    and :math:`\\partial f/\\partial \\delta = -S_i s_i`; this is exact for the
    linear part and the usual linearisation for the bilinear term.  In
    "out_of_event" mode the depth solves the one-parameter weighted fit of
    :math:`d_i = f_i/S_i = 1 - \\delta s_i` with :math:`\\mathrm{Var}(d_i) =
    \\sigma_i^2/S_i^2`:
    :math:`\\delta = \\sum w'_i s_i (1 - d_i) / \\sum w'_i s_i^2`, with
    :math:`\\mathrm{Var}(\\delta) = 1/\\sum w'_i s_i^2 + g^T C_a g`: the first
    term from the in-event noise, the second from the covariance :math:`C_a`
    of the systematics fitted out of the event (independent exposures), with
    :math:`g_k = \\partial\\delta/\\partial a_k =
    \\sum w'_i s_i f_i B_{ik}/S_i^2 \\, / \\sum w'_i s_i^2` (first order).  When the reduced
    :math:`\\chi^2` exceeds 1 the depth error is multiplied by its square root
    (``depth_error``); ``depth_error_unscaled`` keeps the bare value.

    Eclipse with the planet's flux (``planet_basis``): the star plus planet
    give :math:`f = S_* (1 + F_p v)` with :math:`v = 1 - s` the planet's
    visible fraction, so that in full eclipse the planet's flux *at that
    phase* disappears (common practice for eclipses with phase curves).  The
    model is bilinear in :math:`a` and :math:`c` and solved by the same
    Gauss-Newton iterations, with the Jacobian columns
    :math:`B_{ik}(1 + F_{p,i} v_i)` and :math:`S_{*i} P_{ij} v_i`.  The
    depth :math:`\\delta = F_m/(1 + F_m)`, :math:`F_m = P_m c` at mid-eclipse,
    is the fraction of the out-of-eclipse flux hidden there, as without
    ``planet_basis``; its variance is :math:`h^T C_c h` with
    :math:`h = P_m/(1 + F_m)^2` (first order) and :math:`C_c` the block of
    :math:`c` in the covariance.  Multiplying :math:`S_*` by independent
    phase sinusoids instead, :math:`S (1 - \\delta s)`, makes the fitted
    :math:`\\delta` an average of :math:`F_p/(1+F_p)` over the eclipse
    rather than its value at mid-eclipse.

    Nonlinear parameters held fixed (``basis_derivatives``) add the Jacobian
    columns :math:`\\partial f/\\partial\\theta_j = (D_j a)(1 - \\delta s)`
    (:math:`(D_j a)(1 + F_p v)` with the planet's flux),
    :math:`D_j = \\partial B/\\partial\\theta_j`; the covariance of the
    linear parameters returned is the corresponding block of the inverse of
    the enlarged information matrix, i.e. marginalised over :math:`\\theta`
    to first order (in "out_of_event" mode the columns :math:`D_j a` join the
    out-of-event fit's design matrix and :math:`g`).  Without them a
    time scale chosen from a grid by :math:`\\chi^2` would be treated as
    exactly known.

    All covariances come from the singular value decomposition of the
    weighted, column-normalised Jacobian (never from inverting the normal
    matrix, whose condition number for a phase curve fitted to a short
    visit exceeds 1e19, beyond double precision).

    Cost: O(max_iter * n_exposures * n_basis^2) time, O(n_exposures * n_basis)
    memory.

    References
    ----------
    Berta et al. 2012, ApJ 747, 35; Kreidberg et al. 2014, Nature 505, 69;
    Schwarz 1978, Ann. Stat. 6, 461 (BIC).
    """
    f, v, s, bad = _prepare(flux, variance, template, mask)
    n = f.size
    if basis is None:
        B_extra = np.zeros((n, 0))
    else:
        B_extra = np.asarray(basis, dtype=float)
        if B_extra.ndim == 1:
            B_extra = B_extra[:, None]
        if B_extra.ndim != 2 or B_extra.shape[0] != n:
            raise ParameterError(f"basis must have shape ({n}, n_basis); got {B_extra.shape}")
    if basis_names is None:
        names = ("constant",) + tuple(f"b{k + 1}" for k in range(B_extra.shape[1]))
    else:
        names = ("constant",) + tuple(str(x) for x in basis_names)
        if len(names) != B_extra.shape[1] + 1:
            raise ParameterError(f"basis_names must name the {B_extra.shape[1]} basis columns")
    if mode not in ("joint", "out_of_event"):
        raise ParameterError(f"mode must be 'joint' or 'out_of_event'; got {mode!r}")
    tied = planet_basis is not None
    if tied:
        P_all = np.asarray(planet_basis, dtype=float)
        if P_all.ndim == 1:
            P_all = P_all[:, None]
        if P_all.ndim != 2 or P_all.shape[0] != n or P_all.shape[1] < 1:
            raise ParameterError(f"planet_basis must have shape ({n}, n_planet >= 1); "
                                 f"got {P_all.shape}")
        if planet_at_event is None:
            raise ParameterError("planet_at_event (the planet columns at mid-eclipse) is needed "
                                 "with planet_basis")
        p_mid_all = _vector(planet_at_event, "planet_at_event", P_all.shape[1])
        if not np.all(np.isfinite(p_mid_all)):
            raise ParameterError("planet_at_event must be finite")
        if mode != "joint":
            raise ParameterError("planet_basis needs mode='joint' (out of the eclipse the star's "
                                 "and the planet's constant cannot be told apart)")
        if planet_names is None:
            pnames = tuple(f"planet{j}" for j in range(P_all.shape[1]))
        else:
            pnames = tuple(str(x) for x in planet_names)
            if len(pnames) != P_all.shape[1]:
                raise ParameterError(f"planet_names must name the {P_all.shape[1]} planet columns")
        bad = bad | ~np.all(np.isfinite(P_all), axis=1)
    else:
        P_all, pnames = np.zeros((n, 0)), ()
    bad = bad | ~np.all(np.isfinite(B_extra), axis=1)
    use = ~bad
    if not np.any(use):
        raise AllMaskedError("every exposure is masked or non-finite; nothing to fit")
    B_all = np.concatenate([np.ones((n, 1)), B_extra], axis=1)
    # Columns that vanish on every fitted exposure carry no information.
    active = np.any(B_all[use] != 0, axis=0)
    active[0] = True
    B = B_all[:, active]
    k = B.shape[1]
    fu, su, wu, Bu = f[use], s[use], 1.0 / v[use], B[use]
    n_fit = int(use.sum())
    if not np.any(su != 0):
        raise ParameterError("template is 0 on every fitted exposure: there is no event to fit")
    if basis_derivatives is None:
        Du = np.zeros((0, n_fit, k))
    else:
        D = np.asarray(basis_derivatives, dtype=float)
        if D.ndim == 2:
            D = D[None]
        if D.ndim != 3 or D.shape[1:] != B_extra.shape:
            raise ParameterError(f"basis_derivatives must have shape (n_nonlinear, {n}, "
                                 f"{B_extra.shape[1]}); got {D.shape}")
        D = np.concatenate([np.zeros((D.shape[0], n, 1)), D], axis=2)[:, :, active]
        Du = np.where(np.isfinite(D), D, 0.0)[:, use, :]
    if tied:
        p_active = np.any(P_all[use] != 0, axis=0)
        P, p_mid = P_all[:, p_active], p_mid_all[p_active]
        Q = P * (1.0 - s)[:, None]
    else:
        p_active = np.zeros(0, dtype=bool)
        Q = -s[:, None]
    m = Q.shape[1]
    if n_fit <= k + m:
        raise ParameterError(f"need more fitted exposures ({n_fit}) than parameters ({k + m}); "
                             "use a smaller basis or mask fewer exposures")

    if mode == "joint":
        a, c, cov_ac = _gauss_newton(fu, wu, Bu, Q[use], Du, max_iter)
    else:
        out = su <= out_of_event_threshold
        if np.count_nonzero(out) <= k:
            raise ParameterError("out_of_event mode needs more out-of-event exposures than basis "
                                 "columns; lower the basis order or use mode='joint'")
        unconstrained = ~np.any(Bu[out] != 0, axis=0)
        if np.any(unconstrained):
            which = [str(nm) for nm, keep in zip(np.array(names)[active], unconstrained) if keep]
            raise ParameterError(f"basis columns {which} are zero on every out-of-event exposure "
                                 "and cannot be fitted there; use mode='joint'")
        a, _ = _wls(Bu[out], fu[out], wu[out])
        S_u = Bu @ a
        d = fu / S_u
        wd = wu * S_u * S_u
        denom = np.sum(wd * su * su)
        delta = np.sum(wd * su * (1.0 - d)) / denom
        # Covariance of (a, theta) from the out-of-event fit; d(delta)/d(a_k) and
        # d(delta)/d(theta_j) with the weights held fixed.  The two stages use
        # disjoint exposures (s = 0 against s > 0), so their errors are independent.
        A_out = np.concatenate([Bu, (Du @ a).T], axis=1)
        _, cov_at = _wls(A_out[out], np.zeros(np.count_nonzero(out)), wu[out])
        grad_all = (wd * su * fu / (S_u * S_u)) @ A_out / denom
        var_d = 1.0 / denom + grad_all @ cov_at @ grad_all
        cov_ac = np.zeros((k + 1, k + 1))
        cov_ac[:k, :k] = cov_at[:k, :k]
        cov_ac[:k, k] = cov_ac[k, :k] = cov_at[:k] @ grad_all
        cov_ac[k, k] = var_d
        c = np.array([delta])

    S = B @ a                      # S (no planet term) or S_* (with the planet's flux)
    event = 1.0 + Q @ c            # model / S
    model = S * event
    if tied:
        systematics = S * (1.0 + P @ c)
        f_mid = float(p_mid @ c)
        delta = f_mid / (1.0 + f_mid)
        h = np.zeros(k + m)
        h[k:] = p_mid / (1.0 + f_mid) ** 2
        cov = np.zeros((k + m + 1,) * 2)
        cov[:k + m, :k + m] = cov_ac
        cov[:k + m, -1] = cov[-1, :k + m] = cov_ac @ h
        cov[-1, -1] = var_depth = float(h @ cov_ac @ h)
    else:
        systematics = S
        delta = float(c[0])
        cov, var_depth = cov_ac, cov_ac[k, k]
    resid_u = fu - model[use]
    chi2 = float(np.sum(wu * resid_u * resid_u))
    n_params = k + m
    dof = n_fit - n_params
    red = chi2 / dof
    err = float(np.sqrt(var_depth))
    scale_err = float(np.sqrt(red)) if red > 1 else 1.0
    nb = B_all.shape[1]
    n_coef = nb + P_all.shape[1]
    coef = np.zeros(n_coef)
    idx = np.flatnonzero(active)
    if tied:
        idx = np.append(idx, nb + np.flatnonzero(p_active))
        coef[idx] = np.append(a, c)
    else:
        coef[idx] = a
    full_cov = np.zeros((n_coef + 1,) * 2)
    idx = np.append(idx, n_coef)
    full_cov[np.ix_(idx, idx)] = cov
    with np.errstate(divide="ignore", invalid="ignore"):
        detr = f / systematics
        detr_err = np.sqrt(v) / np.abs(systematics)
        rel_model = model / systematics if tied else event
    return DetrendResult(
        depth=float(delta), depth_error=err * scale_err, depth_error_unscaled=err,
        error_scale=scale_err, reduced_chi2=float(red), systematics=systematics, model=model,
        detrended_flux=detr, detrended_error=detr_err, residuals=detr - rel_model,
        coefficients=coef, coefficient_names=names + pnames, covariance=full_cov, chi2=chi2,
        bic=float(chi2 + n_params * np.log(n_fit)), n_params=int(n_params),
        n_points=n_fit, fit_mask=bad, tau=float("nan"), mode=mode)


def _with_tau(result, tau, extra_params):
    """Copy of ``result`` with the ramp time scale and its parameter count."""
    import dataclasses
    n_params = result.n_params + extra_params
    dof = result.n_points - n_params
    red = result.chi2 / dof if dof > 0 else np.inf
    scale = float(np.sqrt(red)) if red > 1 else 1.0
    return dataclasses.replace(
        result, tau=float(tau), n_params=int(n_params), reduced_chi2=float(red),
        error_scale=scale, depth_error=result.depth_error_unscaled * scale,
        bic=float(result.chi2 + n_params * np.log(result.n_points)))


def detrend_light_curve(time, flux, variance, template, *, orbit=None, orbit_time=None,
                        scan_direction=None, mask=None, visit_order=1, orbit_order=0,
                        ramp=False, tau_grid=None, fit_tau=False, phase_curve=None,
                        tie_phase_curve=False, drop_first_orbit=False, mode="joint",
                        out_of_event_threshold=0.0):
    """Detrend one light curve with a systematics model built from covariates.

    ``mask`` is True where an exposure is bad; see :func:`fit_event` for the
    mask contract, the model and the error propagation.  Inputs are not
    modified.

    Parameters
    ----------
    time : array_like of float, shape (n_exposures,)
        Mid-exposure times, days (BJD_TDB).
    flux, variance, template
        See :func:`fit_event`.
    orbit : array_like of int, shape (n_exposures,), optional
        Orbit numbers (:func:`lightledger.pipeline.covariates.exposure_covariates`);
        needed for ``ramp`` and ``drop_first_orbit``.
    orbit_time : array_like of float, shape (n_exposures,), optional
        Days since each orbit's start; needed for ``orbit_order > 0`` and
        ``ramp``.
    scan_direction : array_like, shape (n_exposures,), optional
        Scan direction sign; adds an offset between directions when both occur.
    mask : array_like of bool, shape (n_exposures,), optional
    visit_order : int, optional
        Order of the visit-long polynomial in time (default 1; 0 = constant).
    orbit_order : int, optional
        Order of the orbit-phase polynomial shared by the orbits (default 0).
    ramp : bool, optional
        Add a per-orbit exponential ramp ``exp(-orbit_time / tau)``.
    tau_grid : array_like of float, optional
        Ramp time scales to try, days; the one of lowest chi-square is kept.
        Default :data:`DEFAULT_TAU_GRID` (1 to 60 min).
    fit_tau : bool, optional
        Refine tau by a bounded minimisation of chi-square between the grid
        neighbours of the best grid value.
    phase_curve : (float, float), optional
        ``(t0, period)`` in days (``t0`` the mid-transit time): add
        first-harmonic phase sinusoids, as systematics columns ("cos1",
        "sin1") unless ``tie_phase_curve``.
    tie_phase_curve : bool, optional
        Eclipses, with ``phase_curve`` and ``mode="joint"``: describe the
        planet's flux as ``F_p = c0 + c1 cos + c2 sin`` of the orbital phase
        and hide it with the eclipse, ``S_* (1 + F_p (1 - s))`` (``planet_basis``
        of :func:`fit_event`, columns "planet", "planet_cos1",
        "planet_sin1"); the depth is ``F_p/(1 + F_p)`` at mid-eclipse,
        ``t0 + period/2`` (circular orbit).  Default False.
    drop_first_orbit : bool, optional
        Leave orbit 0 out of the fit (its ramp is usually the strongest;
        common practice).
    mode : {"joint", "out_of_event"}
        See :func:`fit_event`.
    out_of_event_threshold : float, optional
        See :func:`fit_event`.

    Returns
    -------
    DetrendResult
        ``coefficient_names`` name the columns ("visit^1", "orbit^1",
        "ramp[o]", "scan", "cos1", "sin1", or "planet", "planet_cos1",
        "planet_sin1" last when tied); ``n_params`` counts tau as one
        parameter when a ramp is used.

    Notes
    -----
    When tau is chosen from the data (a grid of more than one value, or
    ``fit_tau``), the fit at the chosen tau is repeated with the derivative
    of the ramp columns with respect to :math:`\\ln\\tau`,
    :math:`(t/\\tau) e^{-t/\\tau}`, so that the covariance and the depth
    error are marginalised over tau (``basis_derivatives`` of
    :func:`fit_event`; first order).

    Cost: one :func:`fit_event` per grid value of tau (plus about 20 when
    ``fit_tau``, and one to propagate tau).
    """
    t = _vector(time, "time")
    n = t.size
    base_mask = np.zeros(n, dtype=bool) if mask is None else np.asarray(mask)
    if base_mask.dtype != bool or base_mask.shape != (n,):
        raise ParameterError(f"mask must be boolean of shape ({n},) (True = bad)")
    cols, names = [], []

    def add(block, label):
        for j in range(block.shape[1]):
            cols.append(block[:, j])
            names.append(label(j))

    add(polynomial_basis(t, visit_order), lambda j: f"visit^{j + 1}")
    if orbit_order > 0 or ramp:
        if orbit_time is None:
            raise ParameterError("orbit_time is needed for orbit_order > 0 or ramp=True")
        ot = _vector(orbit_time, "orbit_time", n)
    if orbit_order > 0:
        add(orbit_phase_basis(ot, orbit_order), lambda j: f"orbit^{j + 1}")
    if scan_direction is not None:
        add(scan_direction_basis(_vector(scan_direction, "scan_direction", n)), lambda j: "scan")
    if phase_curve is not None:
        try:
            pc_t0, pc_period = (float(x) for x in phase_curve)
        except (TypeError, ValueError):
            raise ParameterError("phase_curve must be (t0, period) in days") from None
        pc = phase_curve_basis(t, pc_t0, pc_period)
        if not tie_phase_curve:
            add(pc, lambda j: ("cos1", "sin1")[j])
    planet = {}
    if tie_phase_curve:
        if phase_curve is None:
            raise ParameterError("tie_phase_curve=True needs phase_curve=(t0, period)")
        if mode != "joint":
            raise ParameterError(f"tie_phase_curve=True needs mode='joint'; got {mode!r}")
        mid = phase_curve_basis(np.array([pc_t0 + 0.5 * pc_period]), pc_t0, pc_period)[0]
        planet = dict(planet_basis=np.concatenate([np.ones((n, 1)), pc], axis=1),
                      planet_at_event=np.append(1.0, mid),
                      planet_names=("planet", "planet_cos1", "planet_sin1"))
    fit_mask = base_mask.copy()
    if ramp or drop_first_orbit:
        if orbit is None:
            raise ParameterError("orbit is needed for ramp=True or drop_first_orbit=True")
        orb = np.asarray(orbit)
        if orb.shape != (n,):
            raise ParameterError(f"orbit must have shape ({n},); got {orb.shape}")
        if drop_first_orbit:
            fit_mask |= orb == np.min(orb)
    fixed = np.stack(cols, axis=1) if cols else np.zeros((n, 0))

    def run(tau, propagate=False):
        if tau is None:
            return fit_event(flux, variance, template, fixed, mask=fit_mask, mode=mode,
                             basis_names=names, out_of_event_threshold=out_of_event_threshold,
                             **planet)
        rb = ramp_basis(ot, orb, tau)
        labels = np.unique(orb)
        deriv = None
        if propagate:
            # d/d(ln tau) of exp(-t/tau) is (t/tau) exp(-t/tau); other columns do not move.
            deriv = np.concatenate([np.zeros_like(fixed), rb * (ot / tau)[:, None]], axis=1)[None]
        return fit_event(flux, variance, template, np.concatenate([fixed, rb], axis=1),
                         mask=fit_mask, mode=mode,
                         basis_names=names + [f"ramp[{o}]" for o in labels],
                         out_of_event_threshold=out_of_event_threshold,
                         basis_derivatives=deriv, **planet)

    if not ramp:
        return run(None)
    grid = DEFAULT_TAU_GRID if tau_grid is None else np.asarray(tau_grid, dtype=float).ravel()
    if grid.size < 1 or not np.all(np.isfinite(grid) & (grid > 0)):
        raise ParameterError("tau_grid must be finite time scales in days > 0")
    grid = np.unique(grid)
    fits = [run(tau) for tau in grid]
    chi = np.array([r.chi2 for r in fits])
    best = int(np.argmin(chi))
    tau_best, res_best = grid[best], fits[best]
    if fit_tau and grid.size > 1:
        lo = np.log(grid[max(best - 1, 0)])
        hi = np.log(grid[min(best + 1, grid.size - 1)])
        opt = minimize_scalar(lambda lt: run(np.exp(lt)).chi2, bounds=(lo, hi),
                              method="bounded", options={"xatol": 1e-6})
        cand = run(np.exp(opt.x))
        if cand.chi2 < res_best.chi2:
            tau_best, res_best = float(np.exp(opt.x)), cand
    if grid.size > 1 or fit_tau:
        # tau was chosen from the data: carry its uncertainty into the covariance.
        res_best = run(tau_best, propagate=True)
    return _with_tau(res_best, tau_best, 1)


# --------------------------------------------------------------------------
# Many channels
# --------------------------------------------------------------------------

@dataclass(frozen=True)
class ChannelFits:
    """Fits of every spectroscopic channel; returned by :func:`fit_channels`.

    Attributes
    ----------
    depth, depth_error, depth_error_unscaled, reduced_chi2, chi2, bic, tau : ndarray of float, shape (n_channels,)
        As in :class:`DetrendResult`, one per channel.
    n_params : ndarray of int, shape (n_channels,)
    systematics, model, detrended_flux, detrended_error, residuals : ndarray of float, shape (n_exposures, n_channels)
        As in :class:`DetrendResult`; with ``divide_white`` the systematics
        include the white-light shape, so that ``model`` describes the
        channel's flux as given.
    fits : tuple of DetrendResult
        The per-channel results (of the divided flux when ``divide_white``).
    white_shape : ndarray of float, shape (n_exposures,)
        The common-mode shape divided out (all ones without ``divide_white``).
    """

    depth: np.ndarray
    depth_error: np.ndarray
    depth_error_unscaled: np.ndarray
    reduced_chi2: np.ndarray
    chi2: np.ndarray
    bic: np.ndarray
    tau: np.ndarray
    n_params: np.ndarray
    systematics: np.ndarray
    model: np.ndarray
    detrended_flux: np.ndarray
    detrended_error: np.ndarray
    residuals: np.ndarray
    fits: tuple
    white_shape: np.ndarray


def fit_channels(time, flux, variance, template, *, mask=None, divide_white=None, **options):
    """Detrend every channel of a spectroscopic light curve.

    ``mask`` is True where a channel-exposure is bad (e.g.
    :attr:`lightledger.pipeline.binning.BinnedSpectra.mask`); non-finite
    values are left out as in :func:`fit_event`.  Inputs are not modified.

    Parameters
    ----------
    time : array_like of float, shape (n_exposures,)
        Days.
    flux, variance : array_like of float, shape (n_exposures, n_channels)
    template : array_like of float, shape (n_exposures,) or (n_exposures, n_channels)
        Unit-depth event shape, shared or per channel.
    mask : array_like of bool, shape (n_exposures, n_channels), optional
    divide_white : array_like of float, shape (n_exposures,), optional
        White-light systematics model (e.g. ``DetrendResult.systematics`` of
        the white light curve).  When given, each channel's flux is divided by
        its shape ``divide_white / mean(divide_white)`` (the common mode) and
        its variance by the shape squared before the fit.
    **options
        Keyword options of :func:`detrend_light_curve` (orbit, orbit_time,
        visit_order, ramp, mode, ...), the same for every channel.

    Returns
    -------
    ChannelFits

    Notes
    -----
    Dividing by a fixed shape :math:`g_i` scales each exposure's flux and
    standard deviation alike, :math:`\\mathrm{Var}(f_i/g_i) = \\sigma_i^2/g_i^2`;
    the white model's own uncertainty is not propagated.  A loop over
    channels: cost n_channels times that of :func:`detrend_light_curve`.

    References
    ----------
    Kreidberg et al. 2014, Nature 505, 69; Deming et al. 2013, ApJ 774, 95
    (common-mode and divide-white corrections).
    """
    t = _vector(time, "time")
    n = t.size
    F = np.asarray(flux, dtype=float)
    V = np.asarray(variance, dtype=float)
    if F.ndim != 2 or F.shape[0] != n:
        raise ParameterError(f"flux must have shape ({n}, n_channels); got {F.shape}")
    if V.shape != F.shape:
        raise ParameterError(f"variance must have the shape of flux {F.shape}; got {V.shape}")
    n_ch = F.shape[1]
    T = np.asarray(template, dtype=float)
    if T.shape == (n,):
        T = np.broadcast_to(T[:, None], F.shape)
    elif T.shape != F.shape:
        raise ParameterError(f"template must have shape ({n},) or {F.shape}; got {T.shape}")
    if mask is None:
        M = np.zeros(F.shape, dtype=bool)
    else:
        M = np.asarray(mask)
        if M.dtype != bool or M.shape != F.shape:
            raise ParameterError(f"mask must be boolean of shape {F.shape} (True = bad)")
    if divide_white is None:
        g = np.ones(n)
    else:
        w = _vector(divide_white, "divide_white", n)
        ok = np.isfinite(w)
        if not np.any(ok) or np.mean(w[ok]) == 0:
            raise ParameterError("divide_white must have finite values with a non-zero mean")
        g = w / np.mean(w[ok])
    per_exp_mask = options.pop("mask", None)
    if per_exp_mask is not None:
        raise ParameterError("give the mask as mask= of shape (n_exposures, n_channels)")
    fits = []
    for j in range(n_ch):
        with np.errstate(divide="ignore", invalid="ignore"):
            fj, vj = F[:, j] / g, V[:, j] / (g * g)
        fits.append(detrend_light_curve(t, fj, vj, T[:, j], mask=M[:, j], **options))
    def col(attr):
        return np.array([getattr(r, attr) for r in fits])

    def stack(attr):
        return np.stack([getattr(r, attr) for r in fits], axis=1)

    return ChannelFits(
        depth=col("depth"), depth_error=col("depth_error"),
        depth_error_unscaled=col("depth_error_unscaled"), reduced_chi2=col("reduced_chi2"),
        chi2=col("chi2"), bic=col("bic"), tau=col("tau"), n_params=col("n_params").astype(int),
        systematics=stack("systematics") * g[:, None], model=stack("model") * g[:, None],
        detrended_flux=stack("detrended_flux"), detrended_error=stack("detrended_error"),
        residuals=stack("residuals"), fits=tuple(fits), white_shape=g)


# --------------------------------------------------------------------------
# Correlated noise
# --------------------------------------------------------------------------

@dataclass(frozen=True)
class BinnedRms:
    """Time-averaging test; returned by :func:`binned_rms`.

    Attributes
    ----------
    bin_sizes : ndarray of int, shape (n_sizes,)
        Exposures per bin, N.
    n_bins : ndarray of int, shape (n_sizes,)
        Number of bins, M.
    rms : ndarray of float, shape (n_sizes,)
        Sample standard deviation of the bin means, sigma_N.
    expected : ndarray of float, shape (n_sizes,)
        White-noise expectation ``sigma_1 / sqrt(N) * sqrt(M / (M - 1))``.
    ratio : ndarray of float, shape (n_sizes,)
        ``rms / expected``.
    beta : float
        Mean of ``ratio`` over the bin sizes (not clipped at 1).
    sigma_1 : float
        Sample standard deviation of the unbinned residuals.
    """

    bin_sizes: np.ndarray
    n_bins: np.ndarray
    rms: np.ndarray
    expected: np.ndarray
    ratio: np.ndarray
    beta: float
    sigma_1: float


def binned_rms(residuals, bin_sizes, *, mask=None):
    """Rms of binned residuals against bin size, and the beta factor.

    ``mask`` is True where a residual is bad; bad and non-finite residuals
    are removed before binning (the remaining ones are binned in order, so a
    bin may span a removed exposure or an orbit gap).  Consecutive bins of N
    residuals are averaged; a remainder shorter than N is left out.

    Parameters
    ----------
    residuals : array_like of float, shape (n_exposures,)
        In time order, any unit.
    bin_sizes : array_like of int
        Exposures per bin, each >= 1 and giving at least 2 bins.
    mask : array_like of bool, shape (n_exposures,), optional

    Returns
    -------
    BinnedRms

    Notes
    -----
    For independent residuals of variance :math:`\\sigma^2`, the mean of
    :math:`N` has variance :math:`\\sigma^2/N`.  The published white-noise
    expectation is :math:`\\sigma_N = \\sigma_1 N^{-1/2} \\sqrt{M/(M-1)}`
    (Pont et al. 2006; Winn et al. 2008), computed here with
    :math:`\\sigma_1` and :math:`\\sigma_N` the sample standard deviations
    (denominators :math:`n-1` and :math:`M-1`).  With these estimators
    :math:`E[\\sigma_N^2] = \\sigma^2/N` exactly, so for white noise
    :math:`E[\\mathrm{ratio}^2] \\approx (M-1)/M`: the published factor makes
    the expectation conservative by up to :math:`\\sqrt{M/(M-1)}` (6 per
    cent at M = 10).  The beta factor is the mean ratio over bin sizes
    (Winn et al. 2008); values above 1 indicate correlated noise.

    References
    ----------
    Pont, Zucker & Queloz 2006, MNRAS 373, 231; Winn et al. 2008, ApJ 683, 1076.
    """
    r = _vector(residuals, "residuals")
    if mask is not None:
        m = np.asarray(mask)
        if m.dtype != bool or m.shape != r.shape:
            raise ParameterError(f"mask must be boolean of shape {r.shape} (True = bad)")
        r = r[~m]
    r = r[np.isfinite(r)]
    if r.size < 2:
        raise AllMaskedError("fewer than two finite, unmasked residuals")
    sizes = np.atleast_1d(np.asarray(bin_sizes))
    if sizes.ndim != 1 or sizes.size < 1 or not np.all(sizes == np.round(sizes)) or np.any(sizes < 1):
        raise ParameterError("bin_sizes must be integers >= 1")
    sizes = sizes.astype(int)
    n_bins = r.size // sizes
    if np.any(n_bins < 2):
        raise ParameterError(f"bin_sizes must give at least 2 bins of the {r.size} residuals; "
                             f"largest allowed is {r.size // 2}")
    sigma_1 = float(np.std(r, ddof=1))
    rms = np.empty(sizes.size)
    for i, (N, M) in enumerate(zip(sizes, n_bins)):  # loop over bin sizes only
        means = r[:N * M].reshape(M, N).mean(axis=1)
        rms[i] = np.std(means, ddof=1)
    expected = sigma_1 / np.sqrt(sizes) * np.sqrt(n_bins / (n_bins - 1.0))
    ratio = rms / expected
    return BinnedRms(bin_sizes=sizes, n_bins=n_bins, rms=rms, expected=expected, ratio=ratio,
                     beta=float(np.mean(ratio)), sigma_1=sigma_1)
