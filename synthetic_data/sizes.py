"""How large a rendered visit may be: exposures and orbits of a scenario.

A scenario has a default size (``default_n_exposures`` over ``n_orbits``
low-Earth orbits, or one continuous window when ``n_orbits`` is 0).  The
renderer accepts other sizes within the limits here, so the same fictional
visit can be rendered from a few dozen exposures to the length of a
scaling benchmark:

- an orbiting scenario takes 1 to :data:`MAX_ORBITS` orbits, and between 2
  and as many exposures per orbit as fit in its visibility window (each
  exposure lasts XPOSURE plus at least 10 s of overhead); without an
  explicit number of exposures it keeps its default exposures per orbit;
- a continuous scenario takes 2 to :data:`MAX_STARE_EXPOSURES` exposures at
  its cadence (longer visits simply cover more of the planet's orbits).

The limits keep a render within a few gigabytes of disk; the renderer
streams one raw file at a time, so its memory does not depend on the size.
"""

import dataclasses

from lightledger.pipeline.errors import ParameterError

__all__ = ["MAX_ORBITS", "MAX_STARE_EXPOSURES", "OVERHEAD_S", "max_per_orbit", "exposure_range",
           "resolve_size", "describe_limits"]

#: Most orbits of a rendered orbiting visit.
MAX_ORBITS = 60
#: Most exposures of a rendered continuous (staring) visit.
MAX_STARE_EXPOSURES = 20000
#: Least gap between an exposure's last read and the next zero read, s.
OVERHEAD_S = 10.0


def _exposure_time(sc):
    return (sc.n_reads - 1) * sc.read_interval


def max_per_orbit(sc):
    """Most exposures that fit in one visibility window of scenario ``sc``."""
    xpos = _exposure_time(sc)
    return int((sc.visibility - xpos) // (xpos + OVERHEAD_S)) + 1


def exposure_range(sc, n_orbits=None):
    """Allowed (least, most) exposures of scenario ``sc`` with ``n_orbits`` orbits."""
    if not sc.n_orbits:
        return 2, MAX_STARE_EXPOSURES
    n_orbits = sc.n_orbits if n_orbits is None else n_orbits
    return 2 * n_orbits, max_per_orbit(sc) * n_orbits


def resolve_size(sc, *, n_exposures=None, n_orbits=None):
    """Check a requested size and return the scenario and exposures to render.

    Parameters
    ----------
    sc : Scenario
    n_exposures : int, optional
        Exposures of the visit; default the scenario's, or for a changed
        number of orbits its default exposures per orbit times the orbits.
    n_orbits : int, optional
        Orbits of an orbiting scenario (1 to :data:`MAX_ORBITS`); not
        allowed for a continuous one.

    Returns
    -------
    (Scenario, int)
        The scenario with ``n_orbits`` replaced, and the number of exposures.

    Raises
    ------
    lightledger.pipeline.errors.ParameterError
        One line naming the option, the scenario and the allowed range.
    """
    if n_orbits is not None:
        if not sc.n_orbits:
            raise ParameterError(f"orbits: {sc.name} is one continuous window; the number of "
                                 f"orbits applies to orbiting scenarios only (give exposures instead)")
        if isinstance(n_orbits, bool) or int(n_orbits) != n_orbits or not 1 <= n_orbits <= MAX_ORBITS:
            raise ParameterError(f"orbits must be an integer from 1 to {MAX_ORBITS}; got {n_orbits!r}")
        n_orbits = int(n_orbits)
        per_orbit = max(2, round(sc.default_n_exposures / sc.n_orbits))
        sc = dataclasses.replace(sc, n_orbits=n_orbits)
        default = per_orbit * n_orbits
    else:
        default = sc.default_n_exposures
    lo, hi = exposure_range(sc)
    if n_exposures is None:
        return sc, int(default)
    if isinstance(n_exposures, bool) or int(n_exposures) != n_exposures or not lo <= n_exposures <= hi:
        where = f" over {sc.n_orbits} orbits" if sc.n_orbits else ""
        raise ParameterError(f"exposures must be an integer from {lo} to {hi} for {sc.name}{where}; "
                             f"got {n_exposures!r}")
    return sc, int(n_exposures)


def describe_limits(scenarios):
    """One line per scenario saying the sizes it accepts (for the command's help)."""
    lines = []
    for sc in scenarios:
        if sc.n_orbits:
            per = max_per_orbit(sc)
            default_per = max(2, round(sc.default_n_exposures / sc.n_orbits))
            lines.append(f"{sc.name}: --orbits 1 to {MAX_ORBITS} (default {sc.n_orbits}); "
                         f"--exposures 2 to {per} per orbit (default {sc.default_n_exposures}, "
                         f"{default_per} per orbit)")
        else:
            lines.append(f"{sc.name}: --exposures 2 to {MAX_STARE_EXPOSURES} "
                         f"(default {sc.default_n_exposures}); no --orbits (one continuous window)")
    return lines
