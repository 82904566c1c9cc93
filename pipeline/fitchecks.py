"""Checks of :func:`lightledger.pipeline.eventfit.fit_event`'s inputs at the boundary.

Each returns the validated arrays (or raises
:class:`~lightledger.pipeline.errors.ParameterError` with a message naming the
argument and what is wrong).  Inputs are not modified.
"""

import numpy as np

from .argchecks import vector as _vector
from .errors import ParameterError


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
