"""The validation pass's checks of the stage parameters against the data.

The dispersion solution over the subarray, the bin stage's channels and
white band against its wavelengths, the channels the visit excludes, and
whether the exposures cover the event (a baseline and the event itself).
Each adds its problems to a :class:`~lightledger.tasks.problems.Problems`
(or returns the problem's text) instead of raising.
"""

import warnings

import numpy as np

from lightledger.pipeline.errors import ParameterError

__all__ = ["event_coverage"]


def _dispersion_range(visit, shape, origin, problems):
    """Pixel-edge wavelengths (um) of the subarray, or None after an error."""
    from lightledger.pipeline.wavelength import column_wavelengths, reference_column

    profile = visit.profile
    if profile.dispersion is None or profile.column_offset is None \
            or visit.target.get("source_x") is None:
        return None
    x_ref = reference_column(visit.target["source_x"], profile.column_offset)
    edges = column_wavelengths(np.arange(shape[1] + 1) - 0.5, profile.dispersion, x_ref,
                               origin_x=origin[0])
    if not np.all(np.isfinite(edges)) or np.any(np.diff(edges) <= 0):
        problems.error(profile.path, f"dispersion.coefficients {list(profile.dispersion)} do not "
                                     f"give wavelengths increasing with column over the visit's "
                                     f"columns {origin[0]}-{origin[0] + shape[1] - 1} "
                                     f"(x_ref = target.source_x + dispersion.column_offset "
                                     f"= {x_ref:g})")
        return None
    if edges[0] <= 0:
        problems.error(profile.path, f"dispersion.coefficients give a wavelength of "
                                     f"{edges[0]:.4g} um at column {origin[0]}: wavelengths "
                                     f"must be positive")
        return None
    return edges


def _check_channels(visit, edges, problems):
    """Channel definition of the bin stage against the subarray's wavelengths; n_channels."""
    from lightledger.pipeline.binning import channel_edges_from_list, uniform_channel_edges

    params = visit.stages["bin"]
    lo, hi = float(edges[0]), float(edges[-1])
    span = f"the subarray's {lo:.4f}-{hi:.4f} um (dispersion.coefficients of {visit.profile.path})"
    n_channels = None
    if params["edges"]:
        where = visit.source("bin", "edges")
        label = "stages.bin.edges" if where == str(visit.path) else "bin.edges"
        try:
            ch = channel_edges_from_list(params["edges"])
        except ParameterError:
            problems.error(where, f"{label} must be at least two strictly increasing "
                                  f"wavelengths (um), got {list(params['edges'])}")
            ch = None
        if ch is not None:
            if ch[0] < lo - 1e-9 or ch[-1] > hi + 1e-9:
                problems.error(where, f"{label} {ch[0]:.4f}-{ch[-1]:.4f} um reach outside {span}")
            n_channels = len(ch) - 1
    elif params["width"] > 0:
        where = visit.source("bin", "width")
        try:
            n_channels = len(uniform_channel_edges((lo, hi), width=params["width"])) - 1
        except ParameterError:
            label = "stages.bin.width" if where == str(visit.path) else "bin.width"
            problems.error(where, f"{label} = {params['width']:g} um is wider than {span}")
    else:
        n_channels = params["n_channels"]
        if n_channels > len(edges) - 1:
            where = visit.source("bin", "n_channels")
            label = "stages.bin.n_channels" if where == str(visit.path) else "bin.n_channels"
            problems.error(where, f"{label} = {n_channels} is more channels than the "
                                  f"{len(edges) - 1} columns of the subarray")
    white = params["white_range"]
    if white:
        where = visit.source("bin", "white_range")
        label = "stages.bin.white_range" if where == str(visit.path) else "bin.white_range"
        if len(white) != 2 or not white[1] > white[0]:
            problems.error(where, f"{label} must be [lo, hi] in um with hi > lo, got {list(white)}")
        elif white[0] < lo - 1e-9 or white[1] > hi + 1e-9:
            problems.error(where, f"{label} {white[0]:.4f}-{white[1]:.4f} um reaches outside {span}")
    return n_channels


def event_coverage(visit, refs):
    """Problem text when the exposures cannot measure the event's depth, else None.

    The event's template (from the a priori ephemeris) must be zero on some
    exposures (the baseline) and positive on others (the event): without a
    baseline the depth is degenerate with the flux level, without the event
    there is nothing to measure.  Times are the exposures' mid-times in
    BJD_TDB (Eastman et al. 2010), interpolated from a coarse grid as the bin
    stage takes them.
    """
    from lightledger.pipeline.timing import interpolated_barycentric_times

    from .detrendsetup import event_template

    event, target = visit.event, visit.target
    if event.get("kind") == "phase-curve":
        return None      # the full-orbit fit takes whatever transits and eclipses the visit holds
    if any(event.get(k) is None for k in ("kind", "t0", "period", "duration", "rp_rs", "a_rs",
                                          "inclination")) \
            or target.get("ra") is None or target.get("dec") is None or not refs:
        return None
    mid = np.array([r.start_mjd + 0.5 * r.read_times[-1] / 86400.0 for r in refs])
    geo = [r.obsgeo for r in refs]
    obsgeo = None if all(g is None for g in geo) else np.array(
        [g if g is not None else (0.0, 0.0, 0.0) for g in geo], float)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        bjd = interpolated_barycentric_times(mid, target["ra"], target["dec"],
                                             obsgeo_m=obsgeo).bjd_tdb
        template = np.asarray(event_template(bjd, event), float)
    inside = template > 1e-9
    # the exposures the detrend stage fits: a multi-orbit scan visit leaves its first orbit out
    # (tasks/detrend.py with detrend.drop_first_orbit; orbits split as the bin stage does)
    from lightledger.pipeline.covariates import orbit_numbers

    stare = all(r.scan_velocity == 0 for r in refs)
    orbit, _ = orbit_numbers(np.array([r.start_mjd for r in refs]), stare=stare,
                             gap_minutes=visit.stages["bin"]["orbit_gap_minutes"] or None)
    fitted = np.ones(len(refs), bool)
    dropped = ""
    if visit.stages["detrend"]["drop_first_orbit"] and not stare and len(np.unique(orbit)) > 2:
        fitted = orbit != orbit[0]
        dropped = (" once the first orbit is left out (stages.detrend.drop_first_orbit = true; "
                   "set it false to fit the first orbit)")
    name = event["kind"]
    centre = event["t0"] + (0.5 * event["period"] if name == "eclipse" else 0.0)
    n_cycles = round((0.5 * (bjd[0] + bjd[-1]) - centre) / event["period"])
    centre += n_cycles * event["period"]
    span = (f"the exposures span BJD_TDB {bjd.min():.5f} to {bjd.max():.5f}; the nearest "
            f"{name} is centred at {centre:.5f}")
    if not inside.any():
        hint = (" (event.t0 is a full Julian date, e.g. 2460000.5)"
                if event["t0"] < 2.4e6 else "")
        return (f"event: no exposure falls inside the {name} predicted by event.t0, event.period "
                f"and the orbit (event.a_rs, event.inclination): {span}{hint}; there is no depth "
                f"to measure (use --until bin for the light curves alone)")
    if inside.all():
        return (f"event: every exposure falls inside the {name} ({span}): without exposures "
                f"outside it the depth cannot be told from the flux level (use --until bin for "
                f"the light curves alone)")
    if not inside[fitted].any():
        return (f"event: no fitted exposure falls inside the {name}{dropped} ({span}); use "
                f"--until bin for the light curves alone")
    if inside[fitted].all():
        return (f"event: every fitted exposure falls inside the {name}{dropped} ({span}): the "
                f"depth cannot be told from the flux level; use --until bin for the light curves "
                f"alone")
    return None


def _check_excluded_channels(visit, n_channels, problems):
    for k, (first, last, _) in enumerate(visit.exclude.get("channels", ())):
        if n_channels is not None and last >= n_channels:
            problems.error(visit.path, f"exclude.channels[{k}] names channel {last}; the bin "
                                       f"stage makes channels 0 to {n_channels - 1}")
