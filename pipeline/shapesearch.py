"""Choose the nonlinear shape parameters of a systematics model by chi-square.

A systematics model (:mod:`lightledger.pipeline.systematics`) is linear in its
amplitudes once its few shape parameters (a ramp's time scale, ...) are
fixed.  :func:`search_shapes` profiles any such fit over them: each parameter
is taken from its grid by the lowest chi-square, the others held at their
current values (cycling over the parameters until none moves, at most
``max_cycles`` times), then refined, where asked, by a bounded
one-dimensional minimisation between the best value's grid neighbours.
With one shape parameter this is a plain grid search plus an optional
refinement.  A best value at an end of its grid is not a minimum found: the
grid is extended past that end by its own end spacing (geometric for a log
parameter), a value at a time, up to ``max_extend`` values and never past the
``limits`` the caller gives (the range the data can constrain, e.g. for a
ramp's time scale the span of its orbit), and a parameter still at an end
after that is reported in :attr:`ShapeSearch.at_edge`, so the caller can warn
that the data want a value outside the range searched.  The caller then repeats the fit at the chosen values with the
columns' derivatives, so that the covariance is marginalised over the shape
parameters to first order (:func:`lightledger.pipeline.eventfit.fit_event`,
``basis_derivatives``).

Pure functions; the fit is a callable, so the single-visit fit and the joint
programme fit share this search.
"""

from dataclasses import dataclass

import numpy as np
from scipy.optimize import minimize, minimize_scalar

from .errors import ParameterError

__all__ = ["ShapeSearch", "ramp_limits", "search_shapes"]


@dataclass(frozen=True)
class ShapeSearch:
    """Outcome of :func:`search_shapes`.

    Attributes
    ----------
    values : dict of str to float
        Chosen value of every shape parameter, by qualified name.
    result : object
        The fit at those values (whatever ``evaluate`` returned).
    chosen_from_data : bool
        True when some parameter had more than one grid value or was refined,
        i.e. its uncertainty should be carried into the covariance.
    n_fits : int
        Number of fits evaluated.
    at_edge : tuple of str
        Parameters whose chosen value is still the first or last value of its
        (extended) grid: the minimum of chi-square may lie beyond it.
    extended : tuple of str
        Parameters whose grid was extended past an end.
    """

    values: dict
    result: object
    chosen_from_data: bool
    n_fits: int
    at_edge: tuple = ()
    extended: tuple = ()


def _beyond(grid, lower, log):
    """The next value past one end of a sorted grid, by the end's own spacing."""
    a, b = (grid[0], grid[1]) if lower else (grid[-1], grid[-2])
    return float(a * (a / b)) if log else float(a + (a - b))


def search_shapes(evaluate, params, *, max_cycles=3, max_extend=4, limits=None,
                  max_evaluations=200):
    """Profile a fit over shape parameters.

    Parameters
    ----------
    evaluate : callable
        ``evaluate(values) -> result`` with ``values`` a dict of qualified
        name to value; ``result.chi2`` is minimised.
    params : sequence of (str, ShapeParam)
        Qualified names and parameters (e.g.
        :meth:`lightledger.pipeline.systematics.SystematicsModel.shape_params`).
    max_cycles : int, optional
        Passes over the parameters at most (several parameters only).
    max_extend : int, optional
        Values added past an end of a grid, at most, per parameter (0: none).
    limits : dict of str to (float, float), optional
        Qualified name to the (lowest, highest) value a grid may be extended
        to; a parameter without limits is extended freely.
    max_evaluations : int, optional
        Fits at most of the joint refinement, when more than one parameter is
        refined: after each is refined alone, a simplex (Nelder-Mead) moves
        them together within the span of their grids.

    Returns
    -------
    ShapeSearch
        With no parameters, the single fit at ``{}``.

    Notes
    -----
    Cost: one fit per grid value of each parameter per cycle, plus one per
    value added past an end, plus about 20 for a refined parameter (up to
    ``max_evaluations`` for several, refined together by a simplex).  A
    coordinate-wise search finds the joint minimum when the parameters are
    weakly coupled (different components); strongly coupled parameters of
    one component (a trap population's fill and release times) need the
    joint refinement.
    """
    params = tuple(params)
    grids = {}
    for name, sp in params:
        g = np.asarray(sp.grid, dtype=float).ravel()
        if g.size < 1 or not np.all(np.isfinite(g)) or (sp.log and np.any(g <= 0)):
            raise ParameterError(f"the grid of {name} must hold finite values"
                                 + (" > 0" if sp.log else ""))
        grids[name] = np.unique(g)
    count = [0]
    cache = {}

    def run(values):
        key = tuple(values[n] for n, _ in params)
        if key not in cache:
            cache[key] = evaluate(dict(values))
            count[0] += 1
        return cache[key]

    if not params:
        return ShapeSearch({}, run({}), False, count[0])
    # Start from the grid's middle value of each parameter; with one parameter
    # the starting point is irrelevant.
    values = {name: float(grids[name][(grids[name].size - 1) // 2]) for name, _ in params}
    best_idx = {}
    added = {name: 0 for name, _ in params}

    def chi_at(name, g):
        trial = dict(values)
        trial[name] = float(g)
        return run(trial).chi2

    for _cycle in range(int(max_cycles) if len(params) > 1 else 1):
        moved = False
        for name, sp in params:
            fits = [chi_at(name, g) for g in grids[name]]
            i = int(np.argmin(fits))
            # a minimum at an end of the grid: look past it
            while grids[name].size > 1 and i in (0, grids[name].size - 1) \
                    and added[name] < int(max_extend):
                lower = i == 0
                new = _beyond(grids[name], lower, sp.log)
                low, high = (limits or {}).get(name, (-np.inf, np.inf))
                if not np.isfinite(new) or (sp.log and new <= 0) or not low <= new <= high:
                    break
                added[name] += 1
                grids[name] = (np.concatenate([[new], grids[name]]) if lower
                               else np.concatenate([grids[name], [new]]))
                fits = [chi_at(name, new)] + fits if lower else fits + [chi_at(name, new)]
                i = int(np.argmin(fits))
            if float(grids[name][i]) != values[name]:
                moved = True
            values[name] = float(grids[name][i])
            best_idx[name] = i
        if not moved:
            break
    refined = [(n, sp) for n, sp in params if sp.refine and grids[n].size > 1]
    for name, sp in params:
        grid = grids[name]
        if not (sp.refine and grid.size > 1):
            continue
        i = best_idx[name]
        lo, hi = grid[max(i - 1, 0)], grid[min(i + 1, grid.size - 1)]
        fwd, back = (np.log, np.exp) if sp.log else ((lambda x: x), (lambda x: x))

        def chi(x, name=name, back=back):
            trial = dict(values)
            trial[name] = float(back(x))
            return run(trial).chi2

        opt = minimize_scalar(chi, bounds=(fwd(lo), fwd(hi)), method="bounded",
                              options={"xatol": 1e-6})
        trial = dict(values)
        trial[name] = float(back(opt.x))
        if run(trial).chi2 < run(values).chi2:
            values = trial
    if len(refined) > 1:
        values = _refine_jointly(run, values, refined, grids, max_evaluations)
    from_data = any(grids[n].size > 1 or sp.refine for n, sp in params)
    at_edge = tuple(n for n, _ in params
                    if grids[n].size > 1 and values[n] in (float(grids[n][0]), float(grids[n][-1])))
    extended = tuple(n for n, _ in params if added[n])
    return ShapeSearch(values, run(values), from_data, count[0], at_edge, extended)


def _refine_jointly(run, values, refined, grids, max_evaluations):
    """Minimise chi-square over the refined parameters together (simplex), within their grids.

    Parameters refined one at a time stop where the others hold them; two
    time scales of one component (a trap population's fill and release
    times) trade against each other, and only a joint step follows the
    valley between them.  The simplex starts at ``values`` (each refined
    alone) with steps of a third of each grid's spacing, never leaves the
    span of each (extended) grid, stops when its points agree within 0.001
    in chi-square and in the parameters (0.1 % for a logarithmic one), and
    its result is kept only when it lowers chi-square.
    """
    names = [n for n, _ in refined]
    logs = [sp.log for _, sp in refined]
    fwd = [np.log if lg else (lambda x: x) for lg in logs]
    back = [np.exp if lg else (lambda x: x) for lg in logs]
    lo = np.array([f(grids[n][0]) for f, n in zip(fwd, names)])
    hi = np.array([f(grids[n][-1]) for f, n in zip(fwd, names)])
    x0 = np.array([f(values[n]) for f, n in zip(fwd, names)])
    step = (hi - lo) / np.maximum([grids[n].size - 1 for n in names], 1) / 3.0

    def chi(x):
        if np.any(x < lo) or np.any(x > hi):
            return np.inf
        trial = dict(values)
        trial.update({n: float(b(v)) for n, b, v in zip(names, back, x)})
        c = run(trial).chi2
        return c if np.isfinite(c) else np.inf

    simplex = np.vstack([x0] + [x0 + np.eye(len(names))[k] * step[k] for k in range(len(names))])
    opt = minimize(chi, x0, method="Nelder-Mead",
                   options={"initial_simplex": simplex, "xatol": 1e-3, "fatol": 1e-3,
                            "maxfev": int(max_evaluations)})
    if np.isfinite(opt.fun) and opt.fun < chi(x0):
        out = dict(values)
        out.update({n: float(b(v)) for n, b, v in zip(names, back, opt.x)})
        return out
    return values


def ramp_limits(inputs, model, mask, ramp_types):
    """Limits of the orbit ramps' time scales that the exposures can tell apart (days).

    From the first fitted exposure's time into its orbit to the longest: a shorter
    ramp is an offset of the first exposure, a longer one a slope.

    Parameters
    ----------
    inputs : SystematicsInputs
        Its ``orbit_time`` (days since each orbit's start, or `None`).
    model : SystematicsModel
    mask : array_like of bool or None
        True where an exposure is not fitted.
    ramp_types : tuple of type
        Component classes whose ``tau`` is limited.

    Returns
    -------
    dict
        ``{"<label>.tau": (shortest, longest)}`` for ``search_shapes(limits=)``;
        empty when no exposure has a time into its orbit.
    """
    if inputs.orbit_time is None:
        return {}
    t = np.asarray(inputs.orbit_time, float)
    keep = np.isfinite(t) & (t > 0)
    if mask is not None:
        keep &= ~np.asarray(mask, bool)
    if not keep.any():
        return {}
    span = (float(t[keep].min()), float(t[keep].max()))
    return {f"{c.label}.tau": span for c in model.components if isinstance(c, ramp_types)}

