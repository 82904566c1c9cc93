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

The input checks are in :mod:`lightledger.pipeline.fitchecks`, the
"out_of_event" mode in :mod:`lightledger.pipeline.outofevent`, the result
record (:class:`DetrendResult`, :func:`with_shapes`) in
:mod:`lightledger.pipeline.fitrecord`; all are re-exported here.
"""

import numpy as np

from .errors import AllMaskedError, ParameterError
from .fitchecks import (_check_basis, _check_derivatives, _check_planet, _prepare,  # noqa: F401
                        _vector)
from .fitrecord import DetrendResult, _assemble, with_shapes
from .leastsq import gauss_newton_bilinear
from .outofevent import _fit_out_of_event

__all__ = ["DetrendResult", "fit_event", "with_shapes"]


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
