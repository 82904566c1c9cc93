"""Charge trapping: the ramp of a detector whose traps fill while it is lit.

A near-infrared detector loses part of the charge of the first exposures of
each orbit to traps, which fill while the pixel is illuminated and empty
again in the dark (Zhou et al. 2017, AJ 153, 243): the "ramp" at the start of
every orbit, and a slower one over the visit.  Two populations of traps are
modelled, each with its own number of traps per pixel :math:`E_{tot}`
(electrons), trapping efficiency :math:`\\eta` (the fraction of the incident
charge captured by an empty population) and release time :math:`\\tau`.

For one population the occupancy :math:`E` (trapped electrons per pixel)
under an incident rate :math:`f` (electrons per second per pixel) obeys

.. math:: \\frac{dE}{dt} = \\eta f \\left(1 - \\frac{E}{E_{tot}}\\right)
          - \\frac{E}{\\tau}

(Zhou et al. 2017, eqs. 1-2), so that during an exposure of length
:math:`t_{exp}` at constant :math:`f`

.. math:: E(t) = E_\\infty + (E_0 - E_\\infty)\\, e^{-c t}, \\qquad
          c = \\frac{\\eta f}{E_{tot}} + \\frac{1}{\\tau}, \\qquad
          E_\\infty = \\frac{\\eta f}{c},

and the charge the exposure records is :math:`f t_{exp} - \\Delta E`, with
:math:`\\Delta E = (E_\\infty - E_0)(1 - e^{-c t_{exp}})` the net charge
trapped during it.  In the dark between exposures :math:`E` decays as
:math:`e^{-t/\\tau}`; at the start of each new orbit after the first, the
occupancy grows by a further :math:`\\Delta E_{orb}` per population (the
traps filled during the orbit gap; a free parameter of Zhou et al. 2017), and
is never more than :math:`E_{tot}`.

Two views of the same model:

- :func:`trap_history` follows the occupancies through a visit for given
  populations (the forward model renders its ramps with it);
- :func:`trap_ramp_basis` gives, for fixed time scales, the ramp as a sum of
  columns that are linear in the populations' efficiencies, initial
  occupancies and orbit refills, so that a light-curve fit can solve for them
  by linear least squares while only the time scales are nonlinear.

Rates are electrons per second per pixel (a spectral channel's rate per
pixel: its electrons per exposure over the pixels that collected them and the
exposure time); times are seconds.  Masks are not used: every exposure's
incident rate must be finite, since the traps remember every exposure.
Inputs are not modified.  The recursion runs over exposures in time order
(a loop over exposures, vectorised over series); cost O(n_exposures x
n_series x n_populations) time and memory.

References
----------
Zhou, Y., Apai, D., Lew, B. W. P., Schneider, G. 2017, AJ 153, 243 (a
physical model of the ramp from charge trapping in near-infrared detectors).
"""

from dataclasses import dataclass

import numpy as np

from .errors import ParameterError

__all__ = ["TrapPopulation", "TrapHistory", "TrapRampBasis", "trap_history",
           "trap_ramp_basis"]


@dataclass(frozen=True)
class TrapPopulation:
    """One population of charge traps (per pixel).

    Attributes
    ----------
    capacity : float
        Number of traps :math:`E_{tot}`, electrons per pixel, > 0.
    efficiency : float
        Trapping efficiency :math:`\\eta`, the fraction of the incident
        charge an empty population captures, in [0, 1].
    release_time : float
        Release time scale :math:`\\tau`, seconds, > 0.
    """

    capacity: float
    efficiency: float
    release_time: float

    def __post_init__(self):
        if not (np.isfinite(self.capacity) and self.capacity > 0):
            raise ParameterError(f"trap capacity must be a finite number of electrons > 0; "
                                 f"got {self.capacity!r}")
        if not (np.isfinite(self.efficiency) and 0 <= self.efficiency <= 1):
            raise ParameterError(f"trap efficiency must lie in [0, 1]; got {self.efficiency!r}")
        if not (np.isfinite(self.release_time) and self.release_time > 0):
            raise ParameterError(f"trap release_time must be a finite number of seconds > 0; "
                                 f"got {self.release_time!r}")

    @property
    def trap_constant(self):
        """:math:`\\kappa = \\eta / E_{tot}`, 1/electron: the capture rate is :math:`\\kappa f`."""
        return self.efficiency / self.capacity


@dataclass(frozen=True)
class TrapHistory:
    """Occupancies through a visit; returned by :func:`trap_history`.

    Attributes
    ----------
    occupancy_start, occupancy_end : ndarray of float, shape (n_populations, n_exposures, n_series)
        Trapped electrons per pixel at the start and the end of each exposure.
    trapped : ndarray of float, shape (n_populations, n_exposures, n_series)
        Net electrons per pixel trapped during each exposure,
        :math:`\\Delta E` (negative when the population releases more than it
        captures).
    recorded_fraction : ndarray of float, shape (n_exposures, n_series)
        Recorded over incident charge, :math:`1 - \\sum_p \\Delta E_p / (f t_{exp})`
        (1 where the rate is 0).
    """

    occupancy_start: np.ndarray
    occupancy_end: np.ndarray
    trapped: np.ndarray
    recorded_fraction: np.ndarray


@dataclass(frozen=True)
class TrapRampBasis:
    """The trapping ramp as columns linear in its amplitudes; returned by :func:`trap_ramp_basis`.

    Attributes
    ----------
    columns : ndarray of float, shape (n_exposures, n_series, 3 * n_populations)
        For population p, columns 3p, 3p+1, 3p+2 are the fraction of the
        incident charge lost per unit efficiency :math:`\\eta_p`, per electron
        of initial occupancy :math:`E_{0,p}` and per electron of orbit refill
        :math:`\\Delta E_{orb,p}`; the recorded fraction is
        ``1 - columns @ (eta_0, E0_0, refill_0, eta_1, ...)``.
    derivatives : ndarray of float, shape (2 * n_populations, n_exposures, n_series, 3 * n_populations)
        Derivatives of ``columns`` with respect to ``ln kappa_p`` and
        ``ln tau_p`` (rows 2p and 2p+1), for carrying the time scales'
        uncertainty into a fit's covariance.
    names : tuple of str
        ``"trap{p}_eta"``, ``"trap{p}_initial"``, ``"trap{p}_refill"``.
    """

    columns: np.ndarray
    derivatives: np.ndarray
    names: tuple


def _as_series(rate, n=None):
    r = np.asarray(rate, dtype=float)
    if r.ndim == 1:
        r = r[:, None]
    if r.ndim != 2 or (n is not None and r.shape[0] != n):
        want = f"({n},) or ({n}, n_series)" if n is not None else "(n_exposures,) or (n_exposures, n_series)"
        raise ParameterError(f"rate must have shape {want}; got {np.shape(rate)}")
    if not np.all(np.isfinite(r)) or np.any(r < 0):
        raise ParameterError("rate must be finite electrons per second per pixel >= 0 for every "
                             "exposure (the traps remember every exposure)")
    return r


def _schedule(start, exposure_time, orbit):
    t = np.asarray(start, dtype=float)
    if t.ndim != 1 or t.size < 1:
        raise ParameterError(f"start must be a 1-D array of exposure start times (s); got shape {t.shape}")
    if not np.all(np.isfinite(t)) or np.any(np.diff(t) < 0):
        raise ParameterError("start must be finite and in time order (s)")
    texp = np.broadcast_to(np.asarray(exposure_time, dtype=float), t.shape).copy()
    if not np.all(np.isfinite(texp) & (texp > 0)):
        raise ParameterError("exposure_time must be finite seconds > 0")
    dark = np.diff(t) - texp[:-1]
    if np.any(dark < -1e-6 * np.maximum(texp[:-1], 1.0)):
        raise ParameterError("exposures overlap: each start must follow the previous start plus "
                             "its exposure_time")
    dark = np.maximum(dark, 0.0)
    if orbit is None:
        new_orbit = np.zeros(t.size - 1, dtype=bool)
    else:
        o = np.asarray(orbit)
        if o.shape != t.shape:
            raise ParameterError(f"orbit must have the shape of start {t.shape}; got {o.shape}")
        new_orbit = o[1:] != o[:-1]
    return t, texp, dark, new_orbit


def _populations(populations):
    pops = tuple(populations)
    if not pops or not all(isinstance(p, TrapPopulation) for p in pops):
        raise ParameterError("populations must be a non-empty sequence of TrapPopulation")
    return pops


def _per_population(values, n_pop, name):
    if values is None:
        return np.zeros(n_pop)
    v = np.atleast_1d(np.asarray(values, dtype=float))
    if v.shape != (n_pop,) or not np.all(np.isfinite(v)) or np.any(v < 0):
        raise ParameterError(f"{name} must give {n_pop} finite electrons per pixel >= 0, "
                             f"one per population; got {values!r}")
    return v


def trap_history(rate, start, exposure_time, populations, *, initial=None, refill=None,
                 orbit=None):
    """Follow the trap occupancies of a visit, exposure by exposure.

    Every exposure must have a finite incident rate (no mask: the traps
    remember every exposure).  Inputs are not modified.

    Parameters
    ----------
    rate : array_like of float, shape (n_exposures,) or (n_exposures, n_series)
        Incident rate of each exposure, electrons per second per pixel (one
        series per pixel, column or channel followed).
    start : array_like of float, shape (n_exposures,)
        Start of each exposure, seconds, in time order.
    exposure_time : float or array_like of float, shape (n_exposures,)
        Seconds each exposure integrates.
    populations : sequence of TrapPopulation
        Usually two: a fast one (short release time, few traps) and a slow one.
    initial : array_like of float, shape (n_populations,), optional
        Occupancy at the start of the first exposure, electrons per pixel
        (default 0, empty traps); clipped to each capacity.
    refill : array_like of float, shape (n_populations,), optional
        Electrons per pixel added to each population at the start of every
        orbit after the first (default 0).
    orbit : array_like of int, shape (n_exposures,), optional
        Orbit label of each exposure; a change of label starts a new orbit.
        Default: one orbit.

    Returns
    -------
    TrapHistory

    Notes
    -----
    For each exposure :math:`i` and population, with :math:`c_i = \\eta
    f_i/E_{tot} + 1/\\tau` and :math:`E_{\\infty,i} = \\eta f_i / c_i`:

    .. math:: E_{end,i} = E_{\\infty,i} + (E_{start,i} - E_{\\infty,i})
              e^{-c_i t_{exp,i}}, \\qquad \\Delta E_i = E_{end,i} - E_{start,i},

    then over the dark interval :math:`d_i` to the next start
    :math:`E_{start,i+1} = E_{end,i}\\, e^{-d_i/\\tau}`, plus the refill (at
    most :math:`E_{tot}`) when an orbit begins (Zhou et al. 2017, eqs. 1-3).
    The closed form is the exact solution of the differential equation for
    a rate constant over the exposure.

    References
    ----------
    Zhou et al. 2017, AJ 153, 243.
    """
    t, texp, dark, new_orbit = _schedule(start, exposure_time, orbit)
    f = _as_series(rate, t.size)
    pops = _populations(populations)
    n_pop = len(pops)
    cap = np.array([p.capacity for p in pops])[:, None]
    eta = np.array([p.efficiency for p in pops])[:, None]
    tau = np.array([p.release_time for p in pops])[:, None]
    E = np.minimum(_per_population(initial, n_pop, "initial")[:, None], cap) * np.ones(f.shape[1])
    add = _per_population(refill, n_pop, "refill")[:, None]
    n, m = f.shape
    E_start = np.empty((n_pop, n, m))
    E_end = np.empty((n_pop, n, m))
    for i in range(n):                      # time order: each exposure starts from the last
        c = eta * f[i][None, :] / cap + 1.0 / tau
        E_inf = eta * f[i][None, :] / c
        E_start[:, i] = E
        E = E_inf + (E - E_inf) * np.exp(-c * texp[i])
        E_end[:, i] = E
        if i + 1 < n:
            E = E * np.exp(-dark[i] / tau)
            if new_orbit[i]:
                E = np.minimum(E + add, cap)
    trapped = E_end - E_start
    incident = f * texp[:, None]
    with np.errstate(divide="ignore", invalid="ignore"):
        lost = np.where(incident > 0, trapped.sum(axis=0) / incident, 0.0)
    return TrapHistory(occupancy_start=E_start, occupancy_end=E_end, trapped=trapped,
                       recorded_fraction=1.0 - lost)


def trap_ramp_basis(rate, start, exposure_time, trap_constants, release_times, *, orbit=None,
                    efficiency_only=False, derivatives=True):
    """The trapping ramp as columns linear in efficiencies, initial occupancies and refills.

    For fixed trap constants :math:`\\kappa_p = \\eta_p / E_{tot,p}` and release
    times :math:`\\tau_p` the occupancies of :func:`trap_history` are linear in
    :math:`(\\eta_p, E_{0,p}, \\Delta E_{orb,p})` as long as no population
    reaches its capacity through a refill (the clip of :func:`trap_history`),
    so the recorded fraction is exactly ``1 - columns @ amplitudes``.  A
    light-curve fit multiplies the constant flux by this and solves for the
    amplitudes by linear least squares, the time scales being the only
    nonlinear parameters.  Inputs are not modified; every rate must be
    finite.

    Parameters
    ----------
    rate : array_like of float, shape (n_exposures,) or (n_exposures, n_series)
        Incident rate, electrons per second per pixel (for a fit, a smooth
        estimate of each series' rate, e.g. its median flux per pixel and
        second times the a priori event shape).
    start : array_like of float, shape (n_exposures,)
        Exposure starts, seconds, in time order.
    exposure_time : float or array_like of float, shape (n_exposures,)
        Seconds.
    trap_constants : array_like of float, shape (n_populations,)
        :math:`\\kappa_p = \\eta_p/E_{tot,p}`, per electron, >= 0; the
        population fills at the rate :math:`c = \\kappa f + 1/\\tau`.
    release_times : array_like of float, shape (n_populations,)
        :math:`\\tau_p`, seconds, > 0.
    orbit : array_like of int, shape (n_exposures,), optional
        Orbit labels; a refill enters at the start of every orbit after the
        first.  Default: one orbit (the refill columns are then 0).
    efficiency_only : bool, optional
        Only the efficiencies' columns (``columns`` of shape (n_exposures,
        n_series, n_populations), names ``"trap{p}_eta"``): a third of the
        work, the same numbers as those columns of the full basis, laid out
        in memory as numpy lays out that selection (``columns[..., 3 * p]``),
        so that sums over series come out the same to the bit.
    derivatives : bool, optional
        False: the columns alone (``derivatives`` of shape (0, ...)), a
        fifth of the arithmetic, the same numbers.

    Returns
    -------
    TrapRampBasis

    Notes
    -----
    With :math:`a_i = e^{-c_i t_{exp,i}}`, :math:`E_{end,i} = a_i E_{start,i}
    + (1 - a_i) \\eta f_i/c_i` and :math:`\\Delta E_i = (1 - a_i)(\\eta f_i/c_i
    - E_{start,i})`: both are linear and homogeneous in :math:`\\eta` and in
    the occupancy, which itself is a linear combination of :math:`\\eta`,
    :math:`E_0` and the refills.  The recursion is run once per amplitude
    with that amplitude set to 1 and the others to 0 (superposition).  The
    derivatives with respect to :math:`\\ln\\kappa` and :math:`\\ln\\tau`
    are central differences of step 1e-4 in the logarithm (relative error
    about 1e-8).

    References
    ----------
    Zhou et al. 2017, AJ 153, 243.
    """
    t, texp, dark, new_orbit = _schedule(start, exposure_time, orbit)
    f = _as_series(rate, t.size)
    kappa = np.atleast_1d(np.asarray(trap_constants, dtype=float))
    tau = np.atleast_1d(np.asarray(release_times, dtype=float))
    if kappa.ndim != 1 or kappa.size < 1 or not np.all(np.isfinite(kappa) & (kappa >= 0)):
        raise ParameterError(f"trap_constants must be finite numbers >= 0 (per electron), one per "
                             f"population; got {trap_constants!r}")
    if tau.shape != kappa.shape or not np.all(np.isfinite(tau) & (tau > 0)):
        raise ParameterError(f"release_times must be {kappa.size} finite times in seconds > 0, "
                             f"one per population; got {release_times!r}")
    h = 1e-4
    n_pop = kappa.size
    # Every parameter set at once (the one asked for, then every population's
    # ln kappa stepped up and down, then its ln tau): one pass over the
    # exposures.  The populations do not interact, so one set can step all of
    # them, each population's columns answering to its own step only.
    n_sets = 5 if derivatives else 1
    sets_k = np.repeat(kappa[None, :], n_sets, axis=0)
    sets_t = np.repeat(tau[None, :], n_sets, axis=0)
    if derivatives:
        sets_k[1] *= np.exp(h)
        sets_k[2] *= np.exp(-h)
        sets_t[3] *= np.exp(h)
        sets_t[4] *= np.exp(-h)
    kinds = ("eta",) if efficiency_only else ("eta", "initial", "refill")
    u = len(kinds)
    names = tuple(f"trap{p}_{kind}" for p in range(kappa.size) for kind in kinds)
    cols_all = _ramp_columns(f, texp, dark, new_orbit, sets_k, sets_t, units=u)
    cols = cols_all[0]
    if not derivatives:
        return TrapRampBasis(columns=cols, derivatives=np.zeros((0,) + cols.shape), names=names)
    if efficiency_only:     # the memory order of cols: population by population
        derivs = np.zeros((2 * n_pop, n_pop, t.size, f.shape[1])).transpose(0, 2, 3, 1)
    else:
        derivs = np.zeros((2 * n_pop,) + cols.shape)
    for which in (0, 1):                    # ln kappa, ln tau
        step = (cols_all[1 + 2 * which] - cols_all[2 + 2 * which]) / (2 * h)
        for p in range(n_pop):
            own = slice(u * p, u * (p + 1))
            derivs[2 * p + which][..., own] = step[..., own]
    return TrapRampBasis(columns=cols, derivatives=derivs, names=names)


def _ramp_columns(f, texp, dark, new_orbit, kappa, tau, units=3):
    """Lost fraction per unit amplitude for parameter sets ``kappa``, ``tau`` of shape
    (n_sets, n_pop); returns shape (n_sets, n_exposures, n_series, units * n_pop).

    ``units`` 3: the columns of (eta, initial, refill) per population; 1: the
    efficiency's alone (the same numbers: the three are independent
    superposed recursions).  The factors that do not depend on the occupancy
    (fill rate, decay over the exposure, equilibrium occupancy, decay in the
    dark) are computed for every exposure at once; the loop over exposures
    then holds four array operations on the state, with the arithmetic of
    each step unchanged (the same numbers to the bit).
    """
    n, m = f.shape
    n_sets, n_pop = kappa.shape
    k = kappa[None, :, :, None, None]
    tp = tau[None, :, :, None, None]
    fi = f[:, None, None, None, :]                          # (n, 1, 1, 1, m)
    c = k * fi + 1.0 / tp                                   # (n, S, P, 1, m)
    a = np.exp(-c * texp[:, None, None, None, None])
    kept = 1.0 - a                                          # share of the gap closed in an exposure
    unit_eta = np.zeros((1, 1, units, 1))
    unit_eta[0, 0, 0, 0] = 1.0
    target = unit_eta * fi / c                              # (n, S, P, units, m)
    release = np.exp(-dark[:, None, None, None, None] / tp)  # (n-1, S, P, 1, 1)
    # State: occupancy per unit amplitude, shape (n_sets, n_pop, units, m).
    E = np.zeros((n_sets, n_pop, units, m))
    if units > 1:
        E[:, :, 1] = 1.0
    trapped = np.empty((n, n_sets, n_pop, units, m))
    for i in range(n):                      # time order
        step = trapped[i]
        np.subtract(target[i], E, out=step)
        np.multiply(kept[i], step, out=step)
        E = E + step
        if i + 1 < n:
            E *= release[i]
            if new_orbit[i] and units > 2:
                E[:, :, 2] += 1.0
    incident = f * texp[:, None]
    with np.errstate(divide="ignore", invalid="ignore"):
        lost = np.where(incident[:, None, None, None, :] > 0,
                        trapped / incident[:, None, None, None, :], 0.0)
    if units == 1:
        # (n, S, P, 1, m) -> (S, n, m, P), stored population by population (the
        # memory order of numpy's selection of columns ``full[..., 3 * p]``), so
        # that a sum over series adds in the same order as over the full basis's
        # selected columns and gives the same bits.
        return np.ascontiguousarray(lost[:, :, :, 0].transpose(1, 2, 0, 3)).transpose(0, 2, 3, 1)
    # (n, S, P, units, m) -> (S, n, m, P * units)
    return lost.transpose(1, 0, 4, 2, 3).reshape(n_sets, n, m, n_pop * units)
