"""The "out_of_event" mode of :func:`lightledger.pipeline.eventfit.fit_event`.

Systematics fitted to the exposures out of the event, divided out, then the
depth fitted with them held fixed; the depth's variance adds the propagated
uncertainty of the systematics (see ``fit_event``'s Notes).
"""

import numpy as np

from .errors import ParameterError
from .leastsq import weighted_lstsq


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
