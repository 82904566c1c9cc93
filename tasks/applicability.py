"""Which stage parameters have no effect on a given visit, and why.

A parameter such as ``detrend.drop_first_orbit`` means nothing for a staring
visit, and ``bin.n_channels`` means nothing once ``bin.edges`` is given.  The
parameter still enters the entry's identity (its value is recorded), but the
notebook entry and page say that it did not apply, so that an observer does
not read a setting into a result it could not touch.

:func:`not_applying` takes the stage's resolved parameters and a few facts
about the visit (:func:`visit_facts`) and returns ``{parameter: reason}``.
"""

__all__ = ["visit_facts", "not_applying"]


def visit_facts(*, scanning, n_orbits, kind, phase_curve=None):
    """The facts that decide whether a parameter applies.

    Parameters
    ----------
    scanning : bool
        True for spatial scans, False for a stare.
    n_orbits : int or None
        Orbits of the visit (a stare counts as one); None when not yet known.
    kind : str
        The event: ``"transit"`` or ``"eclipse"`` (or another kind).
    phase_curve : bool, optional
        Whether the detrend fits phase-curve terms (None when not decided).
    """
    return {"scanning": bool(scanning), "n_orbits": n_orbits, "kind": kind,
            "phase_curve": phase_curve}


def _calibrate(p, f):
    out = {}
    if f["scanning"]:
        out["ramp_method"] = "scans are always reduced from read differences masked to the band"
    else:
        out["band_padding"] = "a stare has no scanned band"
    return out


def _extract(p, f):
    out = {}
    if f["scanning"]:
        out["follow_tilt"] = "a scanned band is extracted along detector rows"
    if p.get("method") == "box":
        out["follow_tilt"] = out.get("follow_tilt", "box extraction sums whole rows")
    return out


def _bin(p, f):
    out = {}
    if not f["scanning"] and p.get("orbit_gap_minutes", 0) > 0:
        out["orbit_gap_minutes"] = "a stare is one orbit"
    if p.get("edges"):
        for key in ("width", "n_channels", "equal_counts"):
            out[key] = "bin.edges is given"
    elif p.get("width", 0) > 0:
        out["n_channels"] = "bin.width is given"
        out["equal_counts"] = "bin.width is given"
    return out


def _detrend(p, f):
    out = {}
    if not f["scanning"]:
        out["drop_first_orbit"] = "a stare has no orbits"
    elif f["n_orbits"] is not None and f["n_orbits"] <= 2:
        out["drop_first_orbit"] = f"the visit has {f['n_orbits']} orbit(s); at least 3 are needed"
    if f["kind"] != "eclipse" or f["phase_curve"] is False or p.get("fit") != "joint":
        why = (f"the event is a {f['kind']}, not an eclipse" if f["kind"] != "eclipse"
               else "no phase curve is fitted" if f["phase_curve"] is False
               else "the fit is not joint")
        if "phase_curve_model" in p:
            out["phase_curve_model"] = why
    models = tuple(p.get("models") or ())
    if not f["scanning"] and models:
        unused = sorted({tok for m in models for tok in m.split("+")
                         if tok == "scan" or (tok.startswith("orbit") and tok != "orbit0")})
        if unused:
            out["models"] = (f"on a stare the tokens {', '.join(unused)} are left out "
                             f"(one orbit, no scan directions)")
    if len(models) == 1:
        out["criterion"] = "a single model: nothing to rank or weight"
    if f["kind"] != "phase-curve":
        for key in ("harmonics", "fit_radius", "phase_bins"):
            out[key] = "used by phase-curve events and programmes only"
    else:
        out.update(_PHASE_CURVE_FIT)
    if f["kind"] == "phase-curve":
        return out
    if p.get("limb_darkening") != "fit" and "limb_darkening_prior" in p:
        out["limb_darkening_prior"] = "the channels' limb darkening is not fitted"
    if p.get("limb_darkening") == "fit" and f["kind"] == "eclipse":
        out["limb_darkening"] = "limb darkening does not shape an eclipse"
    return out


#: Detrend parameters a phase-curve fit (one visit's, or a programme's) does not use.
_PHASE_CURVE_FIT = {
    "phase_curve": "a phase-curve event models the planet's flux itself",
    "phase_curve_model": "a phase-curve event models the planet's flux itself",
    "fit": "a phase-curve fit fits the systematics and the planet together",
    "white_free": "a phase-curve fit holds the ephemeris and geometry at their a priori values",
    "depth_errors": "a phase-curve fit carries the covariance errors (marginalised over the "
                    "models)",
    "permutation_shifts": "a phase-curve fit computes no residual-permutation errors",
    "limb_darkening": "a phase-curve fit uses the event's u1, u2 for every channel",
    "limb_darkening_prior": "a phase-curve fit uses the event's u1, u2 for every channel",
}


def _joint(p, f):
    out = {}
    if len(tuple(p.get("models") or ())) == 1:
        out["criterion"] = "a single model: nothing to rank or weight"
    return out


_RULES = {"calibrate": _calibrate, "extract": _extract, "bin": _bin, "detrend": _detrend,
          "joint": _joint}


def not_applying(stage, params, facts):
    """Parameters of ``stage`` that have no effect on this visit.

    Parameters
    ----------
    stage : str
        A stage name.
    params : dict
        The stage's resolved parameters.
    facts : dict
        From :func:`visit_facts`.

    Returns
    -------
    dict of str to str
        Parameter name to a one-line reason; only names present in
        ``params`` (stages without rules give an empty dict).
    """
    rule = _RULES.get(stage)
    if rule is None:
        return {}
    return {k: v for k, v in rule(params, facts).items() if k in params}
