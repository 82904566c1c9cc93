"""The truth table of a rendered visit (truth.fits).

HDU ``EXPOSURES`` (binary table, one row per exposure, in time order; columns
in electrons carry TUNIT ``count``, the FITS standard having no electron unit):

==================  =========  ==============================================
column              unit       meaning
==================  =========  ==============================================
time_bjd_tdb        d          mid-exposure (zero read + XPOSURE/2), BJD_TDB
time_mjd_utc        d          the same instant, MJD (UTC)
orbit               -          orbit index from 0 (0 for a continuous visit)
scan_direction      -          +1 forward (toward increasing rows), -1 reverse,
                               0 staring
white_flux          electron   noise-free source electrons collected from the
                               zero read to the last read (XPOSURE) in the
                               white band, with the astrophysical signal and
                               every systematic, before the flat field: what
                               an ideal reduction measures.  The band is in
                               TRUE wavelength (after a perfect drift
                               correction); columns at the band edges count
                               by the fraction of their nominal wavelength
                               interval inside the band.
white_astro         -          astrophysical signal alone in the white band,
                               source-weighted: transit 1 out of transit;
                               eclipse 1 = star alone (1 + fp/fs out of
                               eclipse)
ramp_visit          -          visit-long quadratic ramp (multiplier)
ramp_orbit          -          per-orbit exponential ramp (for a stare: the
                               settling ramp at the start of the visit); 1
                               when the ramps are rendered with traps
ramp_traps          -          charge-trapping ramp, recorded over incident
                               source electrons in the white band (1 unless
                               the ramps are rendered with traps; then each
                               column has its own, see model.trap_fractions)
orbit_phase_poly    -          polynomial in orbit phase (1 for a stare)
scan_offset         -          1 + offset for reverse scans, 1 otherwise
systematics         -          product of the four multipliers (the
                               achromatic part; times the column's trapping
                               ramp where it applies)
dx, dy              pixel      spectral (column) and spatial (row) drift of
                               the trace relative to the nominal position
white_sigma         electron   expected noise of an ideal optimal extraction
                               of white_flux (Notes)
channel_flux        electron   vector (n_channels): as white_flux per channel
channel_sigma       electron   vector (n_channels): as white_sigma per channel
==================  =========  ==============================================

HDU ``CHANNELS``: wave_min, wave_max (um); depth = injected transit depth
(rp/rs)^2 averaged over the channel weighted by the source electrons, or for
an eclipse the planet-to-star flux ratio fp/fs times the phase-curve factor at
mid-eclipse, averaged the same way (the flux that disappears at mid-eclipse);
for a phase curve the transit depth.
Header: WDEPTH (the same for the white band), WLO, WHI (um).

Phase curves (KIND = phase-curve) add the planet-to-star flux ratio: EXPOSURES
columns ``white_planet_flux`` and ``planet_flux`` (n_channels) at each
exposure's orbital angle (whether or not the star hides the planet then);
CHANNELS columns ``eclipse_flux`` (at mid-eclipse, the day side),
``night_flux`` (at mid-transit), ``max_flux``, ``min_flux``, and header
WECLIPSE, WNIGHT, WMAX, WMIN (white band) and OFFSET (degrees of orbital
angle by which the maximum precedes mid-eclipse, eastward positive); the
primary header adds ECC, OMEGA and TECLIPSE (BJD_TDB of the mid-eclipse after
T0), and VISITNO for a visit of a programme.

HDU ``COSMICS``: exposure (index), read (first read holding the charge),
y, x (subarray row, column), electrons.

Primary header: SCENARIO, SEED, SWVERS (software version), RAMPS
("exponential" or "traps"), KIND, T0 (BJD_TDB of mid-transit), PERIOD (d), RP_RS, A_RS, INCL (deg), U1, U2, XPOSURE (s).

Notes
-----
white_sigma.  For a stare, each column's optimal-extraction variance is
sum(P M) / sum(P^2 M / V) (Horne 1986) with P the pixel-integrated Gaussian
profile, M the good-pixel mask and V the variance of a pixel's charge over
XPOSURE: the Poisson variance of its source, sky and dark charge plus the
read-noise term of a least-squares slope through N equally spaced reads,
12 s^2 (N - 1) / (N (N + 1)) (Rauscher et al. 2007, eq. 1, times
XPOSURE^2; from memory).  For a scan, the source charge's Poisson variance
plus, for each of the N - 1 read differences, 2 s^2 and the sky and dark
Poisson variance of every pixel within 3 sigma of the rows the trace crossed
in that interval (the difference-masking of Deming et al. 2013).  Band and
channel variances sum the column variances times the squared band weights.
Correlated (1/f) read noise is not included.
"""

import numpy as np
from astropy.io import fits

from lightledger.pipeline import __version__
from . import model as vm

__all__ = ["truth_columns", "write_truth"]


def _column_variance(model, index, rate_ref):
    """Variance (e-^2) of each column's extracted charge over XPOSURE."""
    sc = model.scenario
    ny, nx = sc.sub_shape
    n = sc.n_reads
    s2 = sc.read_noise ** 2
    t = model.exposure_time
    sub = model.sub_slices
    dark = model.refs.dark[sub].astype(float)
    good = model.refs.bad_pixels[sub] == 0
    sky = vm.sky_rate(model)
    if sc.mode == "stare":
        centre = vm.trace_centre(model, index)
        prof = vm.scene.row_fraction(centre, sc.psf_sigma, ny)
        var_pix = (rate_ref[None, :] * prof + sky + dark) * t + 12.0 * s2 * (n - 1) / (n * (n + 1))
        m = good.astype(float)
        return np.sum(prof * m, axis=0) / np.sum(prof ** 2 * m / var_pix, axis=0)
    # Scan: rows crossed in each interval, widened by 3 sigma.
    c0 = vm.trace_centre(model, index)
    pos = c0[None, :] + model.velocity[index] * model.read_times[:, None]
    lo = np.minimum(pos[:-1], pos[1:]) - 3 * sc.psf_sigma
    hi = np.maximum(pos[:-1], pos[1:]) + 3 * sc.psf_sigma
    n_rows = np.clip(np.floor(hi) - np.ceil(lo) + 1, 0, ny)
    dt = np.diff(model.read_times)[:, None]
    background = np.mean(sky) + np.mean(dark[good])
    return rate_ref * t + np.sum(n_rows * (2 * s2 + background * dt), axis=0)


def truth_columns(model):
    """Per-exposure truth arrays of a visit (see the module docstring).

    Returns
    -------
    dict of str to ndarray
        The EXPOSURES columns, plus ``weights_white`` (n_columns,),
        ``weights_channels`` (n_channels, n_columns), ``depth`` (n_channels,)
        and ``wdepth`` (float).
    """
    sc = model.scenario
    edges = np.asarray(sc.channel_edges)
    cols = model.columns
    w_white = vm.band_weights(sc, cols, edges[0], edges[-1])
    w_chan = np.stack([vm.band_weights(sc, cols, a, b) for a, b in zip(edges[:-1], edges[1:])])
    rate = vm.source_rate(sc, cols)
    astro = vm.astrophysical_signal(sc, model.t0, model.bjd_tdb, model.wave)   # (n_exp, nx)
    sys = model.systematics["systematics"]
    traps = (np.ones_like(astro) if model.trap_fraction is None
             else np.asarray(model.trap_fraction, float))
    incident = rate[None, :] * astro * sys[:, None] * model.exposure_time
    per_col = incident * traps
    white = per_col @ w_white
    chan = per_col @ w_chan.T
    white_astro = (astro * rate) @ w_white / (rate @ w_white)
    ramp_traps = white / (incident @ w_white)
    var = np.stack([_column_variance(model, i, rate * astro[i] * sys[i] * traps[i])
                    for i in range(model.n_exposures)])
    white_sigma = np.sqrt(var @ w_white ** 2)
    chan_sigma = np.sqrt(var @ (w_chan ** 2).T)

    if sc.kind in ("transit", "phase-curve"):
        from .spectra import radius_ratio_spectrum
        depth_col = radius_ratio_spectrum(model.wave, rp_rs=sc.rp_rs, band_centre=sc.band_centre,
                                          band_width=sc.band_width, band_depth=sc.band_depth) ** 2
    else:
        from .spectra import planet_star_flux_ratio
        t_ecl = model.t0 + 0.5 * sc.period
        depth_col = (planet_star_flux_ratio(model.wave, rp_rs=sc.rp_rs, t_planet=sc.t_planet,
                                            t_star=sc.teff) * vm.phase_factor(sc, model.t0, t_ecl))
    depth = (w_chan * rate) @ depth_col / (w_chan @ rate)
    wdepth = float((w_white * rate) @ depth_col / (w_white @ rate))
    out = dict(time_bjd_tdb=model.bjd_tdb, time_mjd_utc=model.mjd_utc, orbit=model.orbit,
               scan_direction=model.direction, white_flux=white, white_astro=white_astro)
    out.update(model.systematics)
    out["ramp_traps"] = ramp_traps
    out.update(dx=model.dx, dy=model.dy, white_sigma=white_sigma, channel_flux=chan,
               channel_sigma=chan_sigma, weights_white=w_white, weights_channels=w_chan,
               depth=depth, wdepth=wdepth)
    if sc.kind == "phase-curve":
        out.update(_planet_truth(model, rate, w_white, w_chan))
    return out


def _planet_truth(model, rate, w_white, w_chan):
    """The planet's flux per exposure and its landmarks, per channel and white band.

    Channel values are source-weighted means over the channel's columns, as
    the depths; the planet's flux has the same orbital shape at every
    wavelength, so the landmarks of the mean are the means of the landmarks.
    """
    from lightledger.pipeline.orbit import eclipse_time, orbit_state

    sc = model.scenario
    eph = vm.ephemeris_of(sc, model.t0)
    angle = orbit_state(model.bjd_tdb, eph).angle
    off = np.deg2rad(sc.phase_offset_deg)
    marks = np.array([np.pi, 0.0, np.pi - off, 2 * np.pi - off])   # day, night, max, min
    per_col = vm.planet_phase_flux(sc, model.wave, np.concatenate([angle, marks]))
    wc = w_chan * rate
    ww = w_white * rate
    chan = per_col @ wc.T / wc.sum(axis=1)
    white = per_col @ ww / ww.sum()
    n = angle.size
    return dict(planet_flux=chan[:n], white_planet_flux=white[:n],
                eclipse_flux=chan[n], night_flux=chan[n + 1], max_flux=chan[n + 2],
                min_flux=chan[n + 3], white_marks=white[n:], offset_deg=float(sc.phase_offset_deg),
                t_eclipse=eclipse_time(eph))


def write_truth(model, path):
    """Write truth.fits for a visit model; returns the truth arrays."""
    sc = model.scenario
    tr = truth_columns(model)
    nch = tr["channel_flux"].shape[1]
    # The FITS standard has no electron unit: counts of electrons are written as "count".
    units = dict(time_bjd_tdb="d", time_mjd_utc="d", white_flux="count", dx="pixel",
                 dy="pixel", white_sigma="count", channel_flux="count",
                 channel_sigma="count")
    names = ["time_bjd_tdb", "time_mjd_utc", "orbit", "scan_direction", "white_flux",
             "white_astro", "ramp_visit", "ramp_orbit", "ramp_traps", "orbit_phase_poly",
             "scan_offset", "systematics", "dx", "dy", "white_sigma", "channel_flux", "channel_sigma"]
    if sc.kind == "phase-curve":
        names += ["white_planet_flux", "planet_flux"]
    cols = []
    for name in names:
        arr = np.asarray(tr[name])
        if name in ("orbit", "scan_direction"):
            cols.append(fits.Column(name=name, format="J", array=arr.astype(np.int32)))
        elif arr.ndim == 2:
            cols.append(fits.Column(name=name, format=f"{nch}D", array=arr, unit=units.get(name)))
        else:
            cols.append(fits.Column(name=name, format="D", array=arr, unit=units.get(name)))
    exposures = fits.BinTableHDU.from_columns(cols, name="EXPOSURES")
    edges = np.asarray(sc.channel_edges)
    channels = fits.BinTableHDU.from_columns([
        fits.Column(name="wave_min", format="D", unit="um", array=edges[:-1]),
        fits.Column(name="wave_max", format="D", unit="um", array=edges[1:]),
        fits.Column(name="depth", format="D", array=tr["depth"]),
    ] + ([fits.Column(name=name, format="D", array=tr[name])
          for name in ("eclipse_flux", "night_flux", "max_flux", "min_flux")]
         if sc.kind == "phase-curve" else []), name="CHANNELS")
    channels.header["WDEPTH"] = (tr["wdepth"], "injected white-band depth")
    channels.header["WLO"] = (float(edges[0]), "[um] white band lower edge")
    channels.header["WHI"] = (float(edges[-1]), "[um] white band upper edge")
    if sc.kind == "phase-curve":
        for key, value, text in zip(("WECLIPSE", "WNIGHT", "WMAX", "WMIN"), tr["white_marks"],
                                    ("white planet flux at mid-eclipse", "white night side",
                                     "white planet flux maximum", "white planet flux minimum")):
            channels.header[key] = (float(value), text)
        channels.header["OFFSET"] = (tr["offset_deg"], "[deg] eastward hotspot offset")
    cr = model.cosmics
    cosmics = fits.BinTableHDU.from_columns([
        fits.Column(name="exposure", format="J", array=cr.exposure.astype(np.int32)),
        fits.Column(name="read", format="J", array=cr.read.astype(np.int32)),
        fits.Column(name="y", format="J", array=cr.y.astype(np.int32)),
        fits.Column(name="x", format="J", array=cr.x.astype(np.int32)),
        fits.Column(name="electrons", format="D", unit="count", array=cr.electrons),
    ], name="COSMICS")
    primary = fits.PrimaryHDU()
    h = primary.header
    h["SCENARIO"] = (sc.name, "forward-model scenario")
    h["SEED"] = (model.seed, "random seed of the rendering")
    h["SWVERS"] = (__version__, "lightledger version")
    h["RAMPS"] = (model.ramps, "how the orbit ramps were rendered")
    h["KIND"] = (sc.kind, "transit, eclipse or phase-curve")
    h["T0"] = (model.t0, "[d] BJD_TDB of mid-transit")
    h["PERIOD"] = (sc.period, "[d] orbital period")
    h["RP_RS"] = (sc.rp_rs, "continuum planet-to-star radius ratio")
    h["A_RS"] = (sc.a_rs, "scaled semi-major axis")
    h["INCL"] = (sc.inclination, "[deg] orbital inclination")
    h["U1"] = (sc.u1, "quadratic limb darkening")
    h["U2"] = (sc.u2, "quadratic limb darkening")
    h["XPOSURE"] = (model.exposure_time, "[s] zero read to last read")
    if sc.kind == "phase-curve":
        h["ECC"] = (sc.eccentricity, "orbital eccentricity")
        h["OMEGA"] = (sc.omega_deg, "[deg] argument of periastron")
        h["TECLIPSE"] = (tr["t_eclipse"], "[d] BJD_TDB of the mid-eclipse after T0")
    if model.stream is not None:
        h["VISITNO"] = (model.stream, "visit index within the programme")
    from .render import write_hdus
    write_hdus([primary, exposures, channels, cosmics], path)
    return tr
