"""Fit of systematics times an event to one light curve: :func:`fit_event`.

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
:math:`F_p/(1 + F_p)` at mid-eclipse (``planet_basis``).

The fit is weighted least squares on the flux itself, not on its logarithm:
for fixed :math:`\\delta` the model is linear in :math:`a`, and the joint
problem is bilinear, solved by Gauss-Newton iterations
(:func:`lightledger.pipeline.leastsq.gauss_newton_bilinear`) from the
linearised solution until the step is below 1e-13 of the parameters.  A
noise-free series built from the model is therefore recovered to rounding.
Nonlinear parameters of the basis (a ramp's time scale) are held fixed here;
:mod:`lightledger.pipeline.shapesearch` chooses them and this fit carries
their uncertainty into the covariance from the basis derivatives.

Times are days; the template and basis columns are dimensionless.
"""

import dataclasses
from dataclasses import dataclass

import numpy as np

from .errors import AllMaskedError, ParameterError
from .leastsq import gauss_newton_bilinear, weighted_lstsq

__all__ = ["DetrendResult", "fit_event", "with_shapes"]


def _vector(x, name, n=None):
    a = np.asarray(x, dtype=float)
    if a.ndim != 1 or (n is not None and a.size != n):
        want = f"({n},)" if n is not None else "1-D"
        raise ParameterError(f"{name} must have shape {want}; got {a.shape}")
    return a


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
    shapes : tuple of (str, float)
        Shape parameters of the systematics model chosen from the data
        (qualified names such as ``"ramp.tau"``), empty when none.
    star : ndarray of float, shape (n_exposures,) or None
        With the planet's flux fitted (``planet_basis``), :math:`S_* = B a`:
        the star alone times the systematics; None otherwise.
    shapes_at_edge : tuple of str
        Shape parameters whose chosen value is still at an end of its grid
        after the grid was extended
        (:attr:`~lightledger.pipeline.shapesearch.ShapeSearch.at_edge`).
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
    shapes: tuple = ()
    star: np.ndarray | None = None
    shapes_at_edge: tuple = ()


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
    B_extra, names = _check_basis(basis, basis_names, n)
    if mode not in ("joint", "out_of_event"):
        raise ParameterError(f"mode must be 'joint' or 'out_of_event'; got {mode!r}")
    tied = planet_basis is not None
    if tied:
        P_all, p_mid_all, pnames = _check_planet(planet_basis, planet_at_event, planet_names,
                                                 mode, n)
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
    Du = _check_derivatives(basis_derivatives, B_extra.shape, active, use)
    if tied:
        p_active = np.any(P_all[use] != 0, axis=0)
        P, p_mid = P_all[:, p_active], p_mid_all[p_active]
        Q = P * (1.0 - s)[:, None]
    else:
        P = p_mid = None
        p_active = np.zeros(0, dtype=bool)
        Q = -s[:, None]
    m = Q.shape[1]
    if n_fit <= k + m:
        raise ParameterError(f"need more fitted exposures ({n_fit}) than parameters ({k + m}); "
                             "use a smaller basis or mask fewer exposures")
    if mode == "joint":
        a, c, cov_ac = gauss_newton_bilinear(fu, wu, Bu, Q[use], Du, max_iter)
    else:
        a, c, cov_ac = _fit_out_of_event(fu, wu, su, Bu, Du, out_of_event_threshold,
                                         np.array(names)[active])
    return _assemble(f, v, use, B, a, c, cov_ac, Q, P, p_mid, active, p_active,
                     B_all.shape[1], P_all.shape[1], names + pnames, mode)


def _check_basis(basis, basis_names, n):
    """Systematics columns (without the constant) and the names with "constant" first."""
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
    return B_extra, names


def _check_planet(planet_basis, planet_at_event, planet_names, mode, n):
    """The planet's flux columns, their values at mid-eclipse and their names."""
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
    return P_all, p_mid_all, pnames


def _check_derivatives(basis_derivatives, extra_shape, active, use):
    """Derivatives of the active basis columns on the fitted exposures (constant's are 0)."""
    n, n_extra = extra_shape
    k = int(active.sum())
    if basis_derivatives is None:
        return np.zeros((0, int(use.sum()), k))
    D = np.asarray(basis_derivatives, dtype=float)
    if D.ndim == 2:
        D = D[None]
    if D.ndim != 3 or D.shape[1:] != extra_shape:
        raise ParameterError(f"basis_derivatives must have shape (n_nonlinear, {n}, "
                             f"{n_extra}); got {D.shape}")
    D = np.concatenate([np.zeros((D.shape[0], n, 1)), D], axis=2)[:, :, active]
    return np.where(np.isfinite(D), D, 0.0)[:, use, :]


def _fit_out_of_event(fu, wu, su, Bu, Du, threshold, active_names):
    """Systematics from out-of-event exposures, then the depth with them fixed.

    Returns (a, c = [depth], covariance of (a, depth)); see :func:`fit_event`'s Notes.
    """
    k = Bu.shape[1]
    out = su <= threshold
    if np.count_nonzero(out) <= k:
        raise ParameterError("out_of_event mode needs more out-of-event exposures than basis "
                             "columns; lower the basis order or use mode='joint'")
    unconstrained = ~np.any(Bu[out] != 0, axis=0)
    if np.any(unconstrained):
        which = [str(nm) for nm, keep in zip(active_names, unconstrained) if keep]
        raise ParameterError(f"basis columns {which} are zero on every out-of-event exposure "
                             "and cannot be fitted there; use mode='joint'")
    a, _ = weighted_lstsq(Bu[out], fu[out], wu[out])
    S_u = Bu @ a
    d = fu / S_u
    wd = wu * S_u * S_u
    denom = np.sum(wd * su * su)
    delta = np.sum(wd * su * (1.0 - d)) / denom
    # Covariance of (a, theta) from the out-of-event fit; d(delta)/d(a_k) and
    # d(delta)/d(theta_j) with the weights held fixed.  The two stages use
    # disjoint exposures (s = 0 against s > 0), so their errors are independent.
    A_out = np.concatenate([Bu, (Du @ a).T], axis=1)
    _, cov_at = weighted_lstsq(A_out[out], np.zeros(np.count_nonzero(out)), wu[out])
    grad_all = (wd * su * fu / (S_u * S_u)) @ A_out / denom
    var_d = 1.0 / denom + grad_all @ cov_at @ grad_all
    cov_ac = np.zeros((k + 1, k + 1))
    cov_ac[:k, :k] = cov_at[:k, :k]
    cov_ac[:k, k] = cov_ac[k, :k] = cov_at[:k] @ grad_all
    cov_ac[k, k] = var_d
    return a, np.array([delta]), cov_ac


def _assemble(f, v, use, B, a, c, cov_ac, Q, P, p_mid, active, p_active, nb, n_planet,
              names, mode):
    """Depth, its covariance, the per-exposure models and the result record."""
    k, m = B.shape[1], Q.shape[1]
    tied = P is not None
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
    fu, wu = f[use], 1.0 / v[use]
    n_fit = fu.size
    resid_u = fu - model[use]
    chi2 = float(np.sum(wu * resid_u * resid_u))
    n_params = k + m
    dof = n_fit - n_params
    red = chi2 / dof
    err = float(np.sqrt(var_depth))
    scale_err = float(np.sqrt(red)) if red > 1 else 1.0
    n_coef = nb + n_planet
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
        coefficients=coef, coefficient_names=names, covariance=full_cov, chi2=chi2,
        bic=float(chi2 + n_params * np.log(n_fit)), n_params=int(n_params),
        n_points=n_fit, fit_mask=~use, tau=float("nan"), mode=mode, star=S if tied else None)


def with_shapes(result, shapes, tau=float("nan"), at_edge=()):
    """Copy of ``result`` with its shape parameters counted as free parameters.

    Parameters
    ----------
    result : DetrendResult
        A fit at fixed shape parameters.
    shapes : dict of str to float
        The shape parameters chosen from the data (qualified names); each
        adds one to ``n_params`` and so changes the reduced chi-square, the
        error scale and the BIC.
    tau : float, optional
        The ramp time scale to report as ``tau`` (days), NaN without a ramp.
    at_edge : tuple of str, optional
        Shape parameters left at an end of their grid (``shapes_at_edge``).

    Returns
    -------
    DetrendResult
    """
    n_params = result.n_params + len(shapes)
    dof = result.n_points - n_params
    red = result.chi2 / dof if dof > 0 else np.inf
    scale = float(np.sqrt(red)) if red > 1 else 1.0
    return dataclasses.replace(
        result, tau=float(tau), n_params=int(n_params), reduced_chi2=float(red),
        error_scale=scale, depth_error=result.depth_error_unscaled * scale,
        bic=float(result.chi2 + n_params * np.log(result.n_points)),
        shapes=tuple((str(k), float(v)) for k, v in shapes.items()),
        shapes_at_edge=tuple(str(n) for n in at_edge))
