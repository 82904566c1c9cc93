"""Errors a channel inherits from the white light curve it is tied to.

The channels of a grid model (:func:`lightledger.pipeline.grid.fit_grid`) are
fitted at the white light's ramp and trap time scales and event (mid-time,
and a/Rs and inclination when fitted) and, for a common-mode model, after
dividing out the white light's systematics or residuals (Berta et al. 2012;
Kreidberg et al. 2014).  Each channel's own error is conditional on those
estimates; their errors, shared by every channel, are propagated here and
added to it, so that a channel's depth error is honest about the depth
itself and not only about its difference from the white light's.

Pure functions on arrays; inputs are not modified.
"""

import numpy as np

from .fiterrors import depth_response, inherited_variance
from .whitelight import template_derivatives

__all__ = ["inherited_error", "MAX_SHAPE_LOG_ERROR"]

#: Largest error of a shape parameter (in its logarithm) propagated to a channel.
MAX_SHAPE_LOG_ERROR = 1.0


def inherited_error(result, lin, template, time, event, ld, own, common, common_mode,
                    refit_depth, shape_names):
    r"""Depth error a channel inherits from what it takes from the white light curve.

    A channel is fitted at its model's white-light shape parameters and event
    (mid-time, and a/Rs and inclination when fitted) and, for a common-mode
    model, after dividing out the top white model's systematics (``sys``) or
    its flux over its event model (``res``; :mod:`.commonmode`).  Those are estimates with
    errors, shared by every channel; their covariance (from the white fit's
    linearisation, scaled like its depth error) is propagated to the
    channel's depth (:func:`~lightledger.pipeline.fiterrors.inherited_variance`;
    first-order propagation of errors, common practice).

    Parameters
    ----------
    result, lin
        The channel's fit and its linearisation in its own parameters.
    template : ndarray of float, shape (n_exposures,)
        The channel's event template.
    time : ndarray of float
        BJD_TDB, days.
    event : dict
        The event the channel's template was made from.
    ld : (float, float)
        The channel's limb darkening.
    own : WhiteFit
        The white fit whose shapes and event the channel used.
    common : WhiteFit or None
        The white fit whose common mode was divided out.
    common_mode : str
        "", "sys" or "res".
    refit_depth : callable
        ``refit_depth(shapes) -> depth``: the channel refitted at other shape
        values (a dict of qualified names).
    shape_names : sequence of str
        The model's shape parameters, in the order of the white fit's
        Jacobian.

    Returns
    -------
    float
        Standard deviation, in depth units.

    Notes
    -----
    Event parameters and common modes are propagated through Jacobians: for
    a common mode :math:`g` the channel's data :math:`y = f/g` move by
    :math:`-y\,\Delta g/g`, with :math:`\Delta g/g = \Delta S_w/S_w` (the
    white systematics' columns of its Jacobian over its model) for ``sys``
    and :math:`-\Delta E_w/E_w` (the event's columns: depth or planet
    coefficients and event parameters) for ``res``, :math:`E_w = m_w/S_w`.  Shape
    parameters (time scales, through their logarithms) are propagated by
    refitting the channel at them moved together along each principal
    direction of their covariance by its error (no shape by more than
    :data:`MAX_SHAPE_LOG_ERROR`; :func:`_shape_variance`): the channel's own
    columns may trade with them far from linearly, and correlated shapes
    move together.  The shapes, the event and the common mode are
    taken as independent sources; for ``res`` the noise the white light shares
    with the channel is in the divided channel's variance
    (:func:`~lightledger.pipeline.commonmode.divide_common_mode`).
    """
    h = depth_response(lin)
    n = np.asarray(template).size
    total = 0.0
    wl = own.linearisation
    nb_w, ne_w, ns_w, ng_w = wl.blocks
    cov_own = wl.covariance(own.result.error_scale)
    # 1. shapes: refits along the principal directions of their (capped) covariance
    if ns_w and len(shape_names) == ns_w:
        idx = np.arange(nb_w + ne_w, nb_w + ne_w + ns_w)
        total += _shape_variance(cov_own[np.ix_(idx, idx)], own.shapes, shape_names, refit_depth)
    # 2. the event parameters the white light fitted, through the template
    free = tuple(own.event_errors)          # in the order the white light fitted them
    if ng_w and len(free) == ng_w:
        G = template_derivatives(time, event, free, u1=float(ld[0]), u2=float(ld[1]))
        S = np.asarray(result.systematics, float)
        # the model moves by -S depth dG; the residual by the opposite
        R = np.zeros((n, wl.jacobian.shape[1]))
        R[:, nb_w + ne_w + ns_w:] = (S * result.depth)[:, None] * G.T
        total += inherited_variance(h, [(R, cov_own)])
    # 3. the common mode divided out
    if common is not None and common_mode:
        cl = common.linearisation
        nb_c, ne_c, ns_c, _ = cl.blocks
        with np.errstate(divide="ignore", invalid="ignore"):
            ratio = np.asarray(result.model, float) / np.asarray(common.result.model, float)
        J = np.array(cl.jacobian)
        if common_mode == "sys":       # only the systematics move S_w
            J[:, nb_c:nb_c + ne_c] = 0.0
            J[:, nb_c + ne_c + ns_c:] = 0.0
            R = -ratio[:, None] * J
        else:                          # only the event model moves f_w S_w / m_w
            J[:, :nb_c] = 0.0
            J[:, nb_c + ne_c:nb_c + ne_c + ns_c] = 0.0
            R = ratio[:, None] * J
        total += inherited_variance(h, [(R, cl.covariance(common.result.error_scale))])
    return float(np.sqrt(max(total, 0.0)))


def _shape_variance(cov, shapes, names, refit_depth):
    r"""Variance of a channel's depth from the white fit's shape parameters, by refits.

    The shapes' covariance :math:`C` (in their logarithms) is decomposed as
    :math:`C = \sum_k \lambda_k v_k v_k^T`; the channel is refitted at the
    shapes moved by :math:`\pm\sqrt{\lambda_k} v_k` (the step shortened so
    that no shape moves by more than :data:`MAX_SHAPE_LOG_ERROR`: the depth's
    change over that range, not an extrapolation over many e-folds) and

    .. math:: \sigma^2 = \sum_k \left(\frac{d(+u_k) - d(-u_k)}{2}\right)^2,
              \quad u_k = \sqrt{\lambda_k} v_k,

    the first-order propagation :math:`g^T C g` evaluated with central
    differences along uncorrelated directions (symmetric sigma points; Julier
    & Uhlmann 1997, the unscented transform, from memory).  Moving each shape
    alone instead, with the others held, ignores that correlated shapes (a
    trap population's fill and release times, which trade against each
    other) move together: a move the white light rules out changes the
    channel's depth far from linearly, and the covariance's correlations no
    longer cancel it.  Cost: two refits per shape parameter.
    """
    cov = np.asarray(cov, float)
    cov = 0.5 * (cov + cov.T)
    lam, vec = np.linalg.eigh(cov)
    total = 0.0
    base = np.array([float(shapes[n]) for n in names])
    for k in range(lam.size):
        if not lam[k] > 0:
            continue
        u = np.sqrt(lam[k]) * vec[:, k]
        big = float(np.max(np.abs(u)))
        if not big > 0:
            continue
        shrink = min(1.0, MAX_SHAPE_LOG_ERROR / big)
        step = u * shrink
        up = refit_depth({**shapes, **dict(zip(names, base * np.exp(step)))})
        dn = refit_depth({**shapes, **dict(zip(names, base * np.exp(-step)))})
        total += (0.5 * (up - dn)) ** 2
    return float(total)
