"""The Gauss-Newton core of the joint fit of visits: per-visit designs, one shared planet.

:func:`solve` minimises the weighted sum of squares of every visit's flux
against :math:`S_v E` (:math:`S_v = B_v a_v` the visit's star flux times its
systematics, :math:`E = 1 - \\lambda + F_p v` the full-orbit model of
:mod:`lightledger.pipeline.phasecurve`) at fixed systematics shape parameters:
a linearised start (systematics with the planet dark, then the planet's
coefficients with the systematics held), then Gauss-Newton steps with step
halving, and the covariance from the SVD of the weighted Jacobian
(:func:`~lightledger.pipeline.leastsq.weighted_lstsq`), optionally enlarged
by the derivatives of the design with respect to the shape parameters.
:func:`~lightledger.pipeline.jointfit.fit_joint` wraps it in the shape search
and assembles the result.

Pure functions on arrays; inputs are not modified.
"""

from dataclasses import dataclass

import numpy as np

from .errors import ParameterError
from .leastsq import weighted_lstsq
from .orbit import orbit_state
from .phasecurve import event_shapes, planet_columns

__all__ = ["Prepared", "prepare", "designs", "solve"]


@dataclass
class Prepared:
    """One visit ready to fit: its data, flux, variance, usable exposures, orbit state."""

    data: object            # jointfit.VisitData
    f: np.ndarray
    v: np.ndarray
    use: np.ndarray
    state: object


def prepare(visit, ephemeris):
    """Check one visit's arrays and compute its orbit state (:class:`Prepared`).

    ``visit`` is a :class:`~lightledger.pipeline.jointfit.VisitData`; an
    exposure is used when not masked, with finite flux and positive variance.
    """
    t = visit.inputs.time
    n = t.size
    f = np.asarray(visit.flux, dtype=float)
    v = np.asarray(visit.variance, dtype=float)
    if f.shape != (n,) or v.shape != (n,):
        raise ParameterError(f"visit {visit.name!r}: flux and variance must have shape ({n},)")
    m = np.zeros(n, bool) if visit.mask is None else np.asarray(visit.mask)
    if m.dtype != bool or m.shape != (n,):
        raise ParameterError(f"visit {visit.name!r}: mask must be boolean of shape ({n},)")
    use = ~m & np.isfinite(f) & np.isfinite(v) & (v > 0)
    return Prepared(visit, f, v, use, orbit_state(t, ephemeris))


def designs(prep, shapes_by_visit):
    """Each visit's design (a constant column first) at its shape parameters.

    Columns all zero over the used exposures are dropped (``active``); rows
    with a non-finite column are left out of the fit.
    """
    out = []
    for p, values in zip(prep, shapes_by_visit):
        d = p.data.model.design(p.data.inputs, values)
        B = np.concatenate([np.ones((p.f.size, 1)), d.columns], axis=1)
        bad = ~np.all(np.isfinite(B), axis=1)
        use = p.use & ~bad
        active = np.any(B[use] != 0, axis=0)
        active[0] = True
        D = np.concatenate([np.zeros((d.derivatives.shape[0], p.f.size, 1)), d.derivatives],
                           axis=2)[:, :, active]
        out.append(dict(B=B[:, active], names=("constant",) + d.names, active=active, use=use,
                        D=np.where(np.isfinite(D), D, 0.0), n_all=B.shape[1]))
    return out


def solve(prep, des, planet, fit_rp, fit_pl, max_iter=60, derivatives=False, cache=None,
           start=None):
    """Gauss-Newton on (a_1..a_V, c, rp); returns a dict of the solution.

    ``cache`` maps a radius ratio to the visits' event shapes (shared between
    the fits of a shape search); ``start`` is an earlier solution's (c, rp) to
    start from.
    """
    h = planet.harmonics
    n_c = 1 + 2 * h
    ks = [d["B"].shape[1] for d in des]
    offsets = np.concatenate([[0], np.cumsum(ks)])
    n_a = int(offsets[-1])
    P_all = [planet_columns(p.state.angle, h) for p in prep]
    rows = [d["use"] for d in des]
    fu = [p.f[r] for p, r in zip(prep, rows)]
    wu = [1.0 / p.v[r] for p, r in zip(prep, rows)]
    Bu = [d["B"][r] for d, r in zip(des, rows)]
    Pu = [P[r] for P, r in zip(P_all, rows)]
    eph = planet.ephemeris
    times = [p.data.inputs.time for p in prep]

    cache = {} if cache is None else cache

    def shapes(rp, derivatives=False):
        key = (rp, derivatives or not fit_rp)
        full = (rp, True)
        if full in cache:
            return cache[full]
        if key not in cache:
            if len(cache) > 64:
                cache.clear()
            cache[key] = [event_shapes(t, eph, rp, planet.u1, planet.u2, state=p.state,
                                       derivatives=key[1]) for t, p in zip(times, prep)]
        return cache[key]

    def evaluate(a, c, sh):
        out = []
        for j in range(len(prep)):
            r = rows[j]
            S = Bu[j] @ a[offsets[j]:offsets[j + 1]]
            Fp = Pu[j] @ c
            E = 1.0 - sh[j].blocked[r] + Fp * sh[j].visible[r]
            out.append((S, E, Fp))
        return out

    def chi2_of(a, c, sh):
        return sum(float(np.sum(w * (f - S * E) ** 2))
                   for (S, E, _), f, w in zip(evaluate(a, c, sh), fu, wu))

    # Linearised start: the star level and systematics with the planet's flux at 0,
    # then the planet's coefficients with the systematics held.
    rp = float(planet.rp_rs) if start is None or not fit_rp else float(start[1])
    sh = shapes(rp)
    a = np.zeros(n_a)
    for j in range(len(prep)):
        r = rows[j]
        E0 = 1.0 - sh[j].blocked[r]
        coef, _ = weighted_lstsq(Bu[j] * E0[:, None], fu[j], wu[j])
        a[offsets[j]:offsets[j + 1]] = coef
    c = np.zeros(n_c)
    if fit_pl and start is not None:
        c = np.array(start[0], dtype=float)
    elif fit_pl:
        A = np.concatenate([(Bu[j] @ a[offsets[j]:offsets[j + 1]])[:, None] * Pu[j]
                            * sh[j].visible[rows[j]][:, None] for j in range(len(prep))])
        y = np.concatenate([fu[j] - (Bu[j] @ a[offsets[j]:offsets[j + 1]])
                            * (1.0 - sh[j].blocked[rows[j]]) for j in range(len(prep))])
        c, _ = weighted_lstsq(A, y, np.concatenate(wu))

    def jacobian(a, c, rp, sh, with_shape_derivs=False):
        if fit_rp:
            sh = shapes(rp, derivatives=True)
        blocks = []
        for j, (S, E, Fp) in enumerate(evaluate(a, c, sh)):
            r = rows[j]
            n_j = r.sum()
            Ja = np.zeros((n_j, n_a))
            Ja[:, offsets[j]:offsets[j + 1]] = Bu[j] * E[:, None]
            parts = [Ja]
            if fit_pl:
                parts.append(S[:, None] * Pu[j] * sh[j].visible[r][:, None])
            if fit_rp:
                parts.append((S * (-sh[j].d_blocked[r] + Fp * sh[j].d_visible[r]))[:, None])
            if with_shape_derivs:
                for jj, d in enumerate(des):
                    G = np.zeros((n_j, d["D"].shape[0]))
                    if jj == j and d["D"].shape[0]:
                        G = (d["D"][:, r, :] @ a[offsets[j]:offsets[j + 1]]).T * E[:, None]
                    parts.append(G)
            blocks.append(np.concatenate(parts, axis=1))
        return np.concatenate(blocks, axis=0)

    def residual(a, c, sh):
        return np.concatenate([f - S * E for (S, E, _), f in zip(evaluate(a, c, sh), fu)])

    w_all = np.concatenate(wu)
    chi_now = chi2_of(a, c, sh)
    for _ in range(int(max_iter)):
        J = jacobian(a, c, rp, sh)
        step, _ = weighted_lstsq(J, residual(a, c, sh), w_all)
        lam = 1.0
        for _h in range(30):
            a_t = a + lam * step[:n_a]
            c_t = c + lam * step[n_a:n_a + n_c] if fit_pl else c
            rp_t = rp + lam * step[-1] if fit_rp else rp
            if rp_t <= 0:
                lam *= 0.5
                continue
            sh_t = shapes(rp_t) if fit_rp else sh
            chi_t = chi2_of(a_t, c_t, sh_t)
            if chi_t <= chi_now * (1 + 1e-15) + 1e-300:
                break
            lam *= 0.5
        params_now = np.concatenate([a, c if fit_pl else [], [rp] if fit_rp else []])
        a, c, rp, sh = a_t, c_t, rp_t, sh_t
        gain = chi_now - chi_t
        chi_now = chi_t
        size = np.max(np.abs(lam * step) / np.maximum(np.abs(params_now), 1e-300))
        if size < 1e-10 or gain < 1e-12 * max(chi_now, 1.0) and size < 1e-7:
            break
    J = jacobian(a, c, rp, sh, with_shape_derivs=derivatives)
    _, cov = weighted_lstsq(J, np.zeros(J.shape[0]), w_all)
    n_lin = n_a + (n_c if fit_pl else 0) + (1 if fit_rp else 0)
    return dict(a=a, c=c, rp=rp, sh=sh, chi2=chi_now, cov=cov[:n_lin, :n_lin], offsets=offsets,
                n_a=n_a, n_c=n_c, n_points=int(sum(r.sum() for r in rows)), n_params=n_lin)
