"""The noise-free model of a visit: times, spectra, signals and systematics.

:func:`build_visit` turns a :class:`~.scenarios.Scenario` into a
:class:`VisitModel` that holds everything the renderer and the truth table
need; :func:`source_charge` gives the noise-free cumulative source charge of
one exposure, and :func:`expected_charge` adds sky and dark.

Geometry.  Full-detector column X has nominal wavelength
lambda(X) = sum_k c_k (X - x_ref)^k with x_ref = source_x + column_offset.
A drift of dx columns shifts the spectrum: column X then receives the light
of reference column X - dx.  The trace centre at column X is
source_y + row_offset + tilt (X - dx - x_ref) + dy rows; a forward scan
starts there at the zero read and moves toward increasing rows at
scan_length / XPOSURE rows/s; a reverse scan starts scan_length rows higher
and moves back, so both cover the same band (or, with the scenario's
``reverse_rows``, a band that many rows higher).
"""

from dataclasses import dataclass

import numpy as np
from astropy.time import Time, TimeDelta

from lightledger.pipeline import orbit, transit, traps
from lightledger.pipeline.errors import ParameterError
from . import detector, scene, spectra, timing
from .scenarios import Scenario

__all__ = ["VisitModel", "build_visit", "wavelength_of_column", "source_rate",
           "astrophysical_signal", "band_weights", "source_charge", "expected_charge",
           "flat_at", "RAMPS", "trap_fractions", "ephemeris_of", "planet_phase_flux"]


@dataclass(frozen=True)
class VisitModel:
    """Everything noise-free about a rendered visit (arrays per exposure).

    Attributes
    ----------
    scenario : Scenario
    seed : int
    refs : detector.ReferenceFiles
        Full-detector calibration arrays.
    columns : ndarray (n_columns,)
        Full-detector column of each subarray column.
    wave : ndarray (n_columns,)
        Nominal wavelength of each subarray column, um.
    read_times : ndarray (n_reads,)
        Seconds after each exposure's zero read.
    exposure_time : float
        XPOSURE, s.
    velocity : ndarray (n_exposures,)
        Signed scan speed, rows/s (0 for a stare).
    direction : ndarray of int (n_exposures,)
        +1 forward, -1 reverse, 0 staring.
    date_beg : str
        ISO UTC of the first exposure's zero read.
    start : ndarray (n_exposures,)
        Zero-read times, s after ``date_beg`` (rounded to microseconds).
    orbit, orbit_start : ndarray (n_exposures,)
    mjd_utc, bjd_tdb : ndarray (n_exposures,)
        Mid-exposure (zero read + XPOSURE / 2) times.
    obsgeo : ndarray (n_exposures, 3) or None
        Observer ITRS position at mid-exposure, m.
    t0 : float
        Injected mid-transit time, BJD_TDB.
    dx, dy : ndarray (n_exposures,)
        Spectral and spatial drifts, pixels.
    systematics : dict of str to ndarray (n_exposures,)
        ramp_visit, ramp_orbit, orbit_phase_poly, scan_offset, systematics
        (the product).
    cosmics : detector.CosmicRays
    ramps : str
        "exponential" (the scenario's per-orbit exponentials in
        ``systematics["ramp_orbit"]``) or "traps" (charge trapping, below).
    trap_fraction : ndarray (n_exposures, n_columns) or None
        With ``ramps == "traps"``: recorded over incident charge of each
        column (:func:`lightledger.pipeline.traps.trap_history`, Zhou et al.
        2017), chromatic because the traps fill at each column's own rate;
        ``ramp_orbit`` is then 1.
    stream : int or None
        Index of the visit within a programme (its own random draws).
    """

    scenario: Scenario
    seed: int
    refs: detector.ReferenceFiles
    columns: np.ndarray
    wave: np.ndarray
    read_times: np.ndarray
    exposure_time: float
    velocity: np.ndarray
    direction: np.ndarray
    date_beg: str
    start: np.ndarray
    orbit: np.ndarray
    orbit_start: np.ndarray
    mjd_utc: np.ndarray
    bjd_tdb: np.ndarray
    obsgeo: object
    t0: float
    dx: np.ndarray
    dy: np.ndarray
    systematics: dict
    cosmics: detector.CosmicRays
    ramps: str = "exponential"
    trap_fraction: object = None
    stream: int | None = None

    @property
    def entropy(self):
        """Entropy of the visit's random streams (the seed, and the visit's index)."""
        return seed_entropy(self.seed, self.stream)

    @property
    def n_exposures(self):
        return self.start.size

    @property
    def sub_slices(self):
        sc = self.scenario
        x0, y0 = sc.sub_origin
        return (slice(y0, y0 + sc.sub_shape[0]), slice(x0, x0 + sc.sub_shape[1]))


def seed_entropy(seed, stream=None):
    """Entropy of a visit's random streams: the seed, or (seed, visit index)."""
    return int(seed) if stream is None else [int(seed), int(stream)]


def x_reference(sc):
    """Reference column x_ref = source_x + column_offset."""
    return sc.source_x + sc.column_offset


def wavelength_of_column(sc, x):
    """Nominal wavelength (um) at full-detector column coordinate(s) ``x``."""
    d = np.asarray(x, dtype=float) - x_reference(sc)
    return sum(c * d ** k for k, c in enumerate(sc.dispersion))


def _dlambda_dx(sc, x):
    d = np.asarray(x, dtype=float) - x_reference(sc)
    return sum(k * c * d ** (k - 1) for k, c in enumerate(sc.dispersion) if k > 0)


def throughput_of(sc, wave):
    """Instrument throughput of the scenario at ``wave`` (um)."""
    return spectra.throughput(wave, lo=sc.throughput_lo, hi=sc.throughput_hi,
                              edge=sc.throughput_edge, peak=sc.throughput_peak, tilt=-0.3)


def _raw_rate(sc, x):
    wave = wavelength_of_column(sc, x)
    return (spectra.photon_rate_shape(wave, sc.teff) * throughput_of(sc, wave)
            * spectra.stellar_lines(wave, depth=sc.line_depth, width=sc.line_width)
            * np.abs(_dlambda_dx(sc, x)))


def source_rate(sc, x):
    """Stellar electrons per second per column at column coordinate(s) ``x``.

    Planck(T_eff) photons times throughput, the hydrogen lines and the
    dispersion dlambda/dx, scaled so that the brightest subarray column
    receives ``peak_rate`` e-/s.
    """
    grid = sc.sub_origin[0] + np.arange(sc.sub_shape[1], dtype=float)
    return sc.peak_rate * _raw_rate(sc, x) / np.max(_raw_rate(sc, grid))


def astrophysical_signal(sc, t0, bjd, wave):
    """Relative flux of star (+ planet) at times ``bjd`` and wavelengths ``wave``.

    Parameters
    ----------
    sc : Scenario
    t0 : float
        Mid-transit, BJD_TDB.
    bjd : array_like (n_times,)
        BJD_TDB.
    wave : array_like (..., n_wave)
        Wavelengths, um; broadcast against ``bjd[:, None]``.

    Returns
    -------
    ndarray (n_times, n_wave)
        Transit: the limb-darkened transit with rp_rs(lambda).  Eclipse:
        1 + fp_fs(lambda) g(t) v(t), star alone = 1, with v the visible
        fraction of the planet and g the phase-curve factor
        g = night + (1 - night) (1 - cos(2 pi phi + offset)) / 2
        (phi the orbital phase from transit).  Phase curve (a visit of any
        length, circular or eccentric orbit): 1 - lambda(t) + F_p(t) v(t)
        with every transit and eclipse of the ephemeris (see
        :func:`planet_phase_flux`).
    """
    if sc.kind == "phase-curve":
        return _full_orbit_signal(sc, t0, bjd, wave)
    bjd = np.asarray(bjd, dtype=float)[:, None]
    wave = np.asarray(wave, dtype=float)
    geo = dict(t0=t0, period=sc.period, a_rs=sc.a_rs, inclination=sc.inclination)
    if sc.kind == "transit":
        rp = spectra.radius_ratio_spectrum(wave, rp_rs=sc.rp_rs, band_centre=sc.band_centre,
                                           band_width=sc.band_width, band_depth=sc.band_depth)
        return transit.transit_flux(bjd, rp_rs=rp, u1=sc.u1, u2=sc.u2, **geo)
    fp = spectra.planet_star_flux_ratio(wave, rp_rs=sc.rp_rs, t_planet=sc.t_planet, t_star=sc.teff)
    visible = transit.eclipse_flux(bjd, rp_rs=sc.rp_rs, fp_fs=1.0, **geo) - 1.0
    return 1.0 + fp * phase_factor(sc, t0, bjd) * visible


def ephemeris_of(sc, t0):
    """The planet's orbit (pipeline's :class:`~lightledger.pipeline.orbit.Ephemeris`)."""
    return orbit.Ephemeris(t0, sc.period, sc.a_rs, sc.inclination, sc.eccentricity, sc.omega_deg)


def planet_phase_flux(sc, wave, angle):
    """Planet-to-star flux ratio over the orbit, per wavelength.

    The planet's flux goes from a night side of brightness temperature
    ``t_night`` to a hot side of ``t_planet`` (plus ``emission_band`` K in
    a Gaussian band at ``band_centre``: an emission feature of the hot side)
    as F = F_night + (F_hot - F_night) (1 - cos(angle + offset)) / 2, with
    ``angle`` the orbital angle from transit: a first-harmonic sinusoid in
    flux whose maximum precedes mid-eclipse by ``phase_offset_deg``
    (eastward), so the band weakens toward the night side.

    Parameters
    ----------
    sc : Scenario
    wave : array_like (n_wave,)
        Wavelengths, um.
    angle : array_like (n_times,)
        Orbital angle from transit, radians.

    Returns
    -------
    ndarray (n_times, n_wave)
    """
    wave = np.asarray(wave, dtype=float)
    t_hot = sc.t_planet + sc.emission_band * np.exp(
        -0.5 * ((wave - sc.band_centre) / sc.band_width) ** 2)
    ratio = sc.rp_rs ** 2 / spectra.planck_lambda(wave, sc.teff)
    f_hot = ratio * spectra.planck_lambda(wave, t_hot)
    f_night = ratio * spectra.planck_lambda(wave, sc.t_night) if sc.t_night > 0 else 0.0 * wave
    g = 0.5 * (1.0 - np.cos(np.asarray(angle, dtype=float) + np.deg2rad(sc.phase_offset_deg)))
    return f_night[None, :] + (f_hot - f_night)[None, :] * g[:, None]


def _full_orbit_signal(sc, t0, bjd, wave):
    wave = np.asarray(wave, dtype=float)
    times = np.asarray(bjd, dtype=float).ravel()
    st = orbit.orbit_state(times, ephemeris_of(sc, t0))
    rp = spectra.radius_ratio_spectrum(wave, rp_rs=sc.rp_rs, band_centre=sc.band_centre,
                                       band_width=sc.band_width, band_depth=sc.band_depth)
    z, front, p = np.broadcast_arrays(st.z[:, None], st.in_front[:, None], rp[None, :])
    blocked = np.zeros(z.shape)
    hidden = np.zeros(z.shape)
    tr = front & (z < 1.0 + p)
    if np.any(tr):
        blocked[tr] = transit.limb_darkened_blocked_fraction(z[tr], p[tr], sc.u1, sc.u2)
    ec = ~front & (z < 1.0 + p)
    if np.any(ec):
        hidden[ec] = transit.occulted_fraction_uniform(z[ec], p[ec])
    return 1.0 - blocked + planet_phase_flux(sc, wave, st.angle) * (1.0 - hidden)


def phase_factor(sc, t0, bjd):
    """Phase-curve factor g(t) of the planet's flux (1 near eclipse)."""
    phi = (np.asarray(bjd, dtype=float) - t0) / sc.period
    off = np.deg2rad(sc.phase_offset_deg)
    return sc.night_fraction + (1 - sc.night_fraction) * 0.5 * (1 - np.cos(2 * np.pi * phi + off))


def band_weights(sc, columns, lo, hi):
    """Fraction of each column's nominal wavelength interval inside [lo, hi].

    The column spans X - 1/2 .. X + 1/2; the weight is the overlap of its
    wavelength interval with [lo, hi] over its width (flux-conserving
    binning of a spectrum sampled per column).
    """
    a = wavelength_of_column(sc, np.asarray(columns) - 0.5)
    b = wavelength_of_column(sc, np.asarray(columns) + 0.5)
    overlap = np.clip(np.minimum(b, hi) - np.maximum(a, lo), 0.0, None)
    return overlap / (b - a)


def flat_at(sc, flat, wave):
    """Flat-field value of each subarray pixel for light of wavelength ``wave``.

    Parameters
    ----------
    flat : ndarray (n_rows, n_columns) or (K, n_rows, n_columns)
        Subarray cut of the flat reference.
    wave : ndarray (n_columns,)
        Wavelength of the light on each column, um.
    """
    if flat.ndim == 2:
        return flat.astype(float)
    lo, hi = sc.flat_range
    w = (np.asarray(wave) - lo) / (hi - lo)
    return sum(flat[k].astype(float) * w[None, :] ** k for k in range(flat.shape[0]))


#: Ways of rendering the ramps at the start of each orbit.
RAMPS = ("exponential", "traps")


def build_visit(sc, *, seed=0, n_exposures=None, ramps="exponential", t0=None, stream=None,
                refs=None):
    """The noise-free plan of a visit (see :class:`VisitModel`).

    ``ramps`` is "exponential" (the scenario's per-orbit exponentials) or
    "traps" (charge trapping with the scenario's trap populations, see
    :func:`trap_fractions`).

    The visits of a programme share one planet and one set of calibration
    files: ``t0`` (BJD_TDB of a mid-transit) then fixes the ephemeris instead
    of placing the event ``event_offset`` days after the visit's centre,
    ``stream`` (the visit's index) gives each visit its own random draws for
    the same ``seed``, and ``refs`` reuses reference files already drawn.
    """
    if ramps not in RAMPS:
        raise ParameterError(f"ramps must be one of {', '.join(RAMPS)}; got {ramps!r}")
    if ramps == "traps" and not sc.trap_populations:
        raise ParameterError(f"scenario {sc.name} has no trap populations; ramps='traps' needs one "
                             f"that does (the scan scenarios)")
    n_exp = int(n_exposures or sc.default_n_exposures)
    streams = np.random.SeedSequence(seed_entropy(seed, stream)).spawn(4)
    rng_refs, rng_cr, rng_drift = (np.random.default_rng(s) for s in streams[:3])

    ny, nx = sc.sub_shape
    x0, y0 = sc.sub_origin
    # Keep the brightest science pixels free of dead pixels.
    protect = (slice(y0 + int(sc.source_y - y0) - 3,
                     y0 + int(sc.source_y - y0 + sc.scan_length + abs(sc.reverse_rows)) + 4),
               slice(x0 + 40, x0 + nx - 40))
    refs = refs if refs is not None else detector.make_reference_files(
        rng_refs, full_shape=sc.full_shape, bias_level=sc.bias_level, dark_rate=sc.dark_rate,
        flat_kind=sc.flat_kind, nonlin_c1=sc.nonlin_c1, nonlin_c2=sc.nonlin_c2,
        n_dead=sc.n_dead, n_hot=sc.n_hot, hot_rate_range=sc.hot_rate_range, protect=protect)

    read_times = np.arange(sc.n_reads) * sc.read_interval
    xpos = float(read_times[-1])
    sched = timing.exposure_schedule(n_exposures=n_exp, exposure_time=xpos, n_orbits=sc.n_orbits,
                                     orbit_period=sc.orbit_period, visibility=sc.visibility,
                                     cadence=sc.cadence)
    start = np.round(sched.start, 6)
    t_beg = Time(sc.date_beg, scale="utc", precision=6)
    mid = t_beg + TimeDelta(start + 0.5 * xpos, format="sec")
    obsgeo = None
    if sc.altitude_km > 0:
        obsgeo = timing.observer_position(mid, altitude_km=sc.altitude_km,
                                          inclination_deg=sc.orbit_inclination_deg)
    bjd = timing.bjd_tdb(mid, ra=sc.ra, dec=sc.dec, position=obsgeo)
    mjd = mid.utc.mjd

    # Event placement: the event centre sits event_offset days after the visit centre.
    if sc.n_orbits:
        centre_s = (sc.n_orbits // 2) * sc.orbit_period + 0.5 * sc.visibility
    else:
        centre_s = 0.5 * (start[0] + start[-1] + xpos)
    t_centre = t_beg + TimeDelta(centre_s, format="sec")
    bjd_centre = float(timing.bjd_tdb(t_centre.reshape(1), ra=sc.ra, dec=sc.dec)[0])
    event = bjd_centre + sc.event_offset
    if t0 is None:
        t0 = round(event - (0.5 * sc.period if sc.kind == "eclipse" else 0.0), 6)

    if sc.mode == "scan":
        direction = np.where(np.arange(n_exp) % 2 == 0, 1, -1)
        velocity = direction * sc.scan_length / xpos
    else:
        direction = np.zeros(n_exp, dtype=int)
        velocity = np.zeros(n_exp)

    # Systematics (multiplicative, achromatic).
    tmid = start + 0.5 * xpos
    span = max(tmid[-1] - tmid[0], 1.0)
    tday = (tmid - 0.5 * (tmid[0] + tmid[-1])) / 86400.0
    ramp_visit = 1.0 + sc.visit_slope * tday + sc.visit_curve * tday ** 2
    since = tmid - sched.orbit_start
    amp = np.asarray(sc.orbit_ramp)[np.minimum(sched.orbit, len(sc.orbit_ramp) - 1)]
    ramp_orbit = 1.0 - amp * np.exp(-since / sc.orbit_ramp_tau)
    if ramps == "traps":
        ramp_orbit = np.ones(n_exp)
    if sc.orbit_period > 0 and sc.orbit_poly:
        xph = since / sc.orbit_period - 0.25
        orbit_poly = 1.0 + sum(c * xph ** (k + 1) for k, c in enumerate(sc.orbit_poly))
    else:
        orbit_poly = np.ones(n_exp)
    scan_offset = np.where(direction < 0, 1.0 + sc.reverse_offset, 1.0)
    systematics = dict(ramp_visit=ramp_visit, ramp_orbit=ramp_orbit, orbit_phase_poly=orbit_poly,
                       scan_offset=scan_offset,
                       systematics=ramp_visit * ramp_orbit * orbit_poly * scan_offset)

    def drift(params):
        lin, per_orbit, jitter = params
        d = lin * (tmid - tmid[0]) / span
        if sc.orbit_period > 0:
            d = d + per_orbit * np.sin(2 * np.pi * since / sc.orbit_period)
        return d + jitter * rng_drift.normal(size=n_exp)

    dx = drift(sc.drift_x)
    dy = drift(sc.drift_y)
    cosmics = detector.draw_cosmic_rays(rng_cr, n_exposures=n_exp, n_reads=sc.n_reads,
                                        shape=sc.sub_shape, hits_per_exposure=sc.cr_per_exposure,
                                        median_electrons=sc.cr_median)
    columns = x0 + np.arange(nx, dtype=float)
    trap_fraction = None
    if ramps == "traps":
        incident = (source_rate(sc, columns)[None, :]
                    * astrophysical_signal(sc, t0, bjd, wavelength_of_column(sc, columns))
                    * systematics["systematics"][:, None])
        trap_fraction = trap_fractions(sc, incident, start, xpos, sched.orbit)
    return VisitModel(scenario=sc, seed=int(seed), refs=refs, stream=stream, columns=columns,
                      wave=wavelength_of_column(sc, columns), read_times=read_times,
                      exposure_time=xpos, velocity=velocity, direction=direction,
                      date_beg=t_beg.isot, start=start, orbit=sched.orbit,
                      orbit_start=sched.orbit_start, mjd_utc=mjd, bjd_tdb=bjd, obsgeo=obsgeo,
                      t0=t0, dx=dx, dy=dy, systematics=systematics, cosmics=cosmics,
                      ramps=ramps, trap_fraction=trap_fraction)


def trap_fractions(sc, column_rate, start, exposure_time, orbit):
    """Charge-trapping ramp of every column: recorded over incident charge.

    Parameters
    ----------
    sc : Scenario
        With ``trap_populations``, ``trap_initial`` and ``trap_refill``.
    column_rate : ndarray (n_exposures, n_columns)
        Incident source electrons per second on each column.
    start : ndarray (n_exposures,)
        Zero-read times, s.
    exposure_time : float
        XPOSURE, s.
    orbit : ndarray of int (n_exposures,)

    Returns
    -------
    ndarray (n_exposures, n_columns)

    Notes
    -----
    Each pixel of a column receives the column's rate spread over the rows
    it lights during an exposure: the scanned band (``scan_length`` rows) or,
    staring, the Gaussian trace's equivalent width sqrt(2 pi) sigma; the traps
    see that mean rate per pixel, as in the scan treatment of Zhou et al.
    2017 (sky and dark are too faint to fill them and are left out).
    """
    rows = max(sc.scan_length, np.sqrt(2 * np.pi) * sc.psf_sigma)
    pops = [traps.TrapPopulation(*p) for p in sc.trap_populations]
    hist = traps.trap_history(np.asarray(column_rate, float) / rows, start, exposure_time, pops,
                              initial=sc.trap_initial or None, refill=sc.trap_refill or None,
                              orbit=orbit)
    return hist.recorded_fraction


def trace_centre(model, index, columns=None):
    """Trace centre (subarray rows) per column at the zero read of exposure ``index``."""
    sc = model.scenario
    x = model.columns if columns is None else columns
    centre = (sc.source_y + sc.row_offset + sc.tilt * (x - model.dx[index] - x_reference(sc))
              + model.dy[index] - sc.sub_origin[1])
    if model.direction[index] < 0:
        centre = centre + sc.scan_length + sc.reverse_rows
    return centre


def source_charge(model, index, *, velocity=None, with_flat=True):
    """Noise-free cumulative source charge of one exposure.

    Parameters
    ----------
    model : VisitModel
    index : int
        Exposure index.
    velocity : float, optional
        Override the scan speed (rows/s); 0 renders the same exposure staring
        at the scan's start row.
    with_flat : bool, optional
        Multiply by the flat field (as the detector does).

    Returns
    -------
    ndarray (n_reads, n_rows, n_columns)
        Electrons from the zero read to each read.
    """
    sc = model.scenario
    xs = model.columns - model.dx[index]
    wave_true = wavelength_of_column(sc, xs)
    rate = (source_rate(sc, xs)
            * astrophysical_signal(sc, model.t0, model.bjd_tdb[index:index + 1], wave_true)[0]
            * model.systematics["systematics"][index])
    if model.trap_fraction is not None:
        rate = rate * model.trap_fraction[index]
    v = model.velocity[index] if velocity is None else velocity
    charge = scene.scan_charge(rate, trace_centre(model, index), v, sc.psf_sigma,
                               sc.sub_shape[0], model.read_times)
    if with_flat:
        charge = charge * flat_at(sc, model.refs.flat[(...,) + model.sub_slices], wave_true)[None]
    return charge


def sky_rate(model):
    """Sky electrons per second per subarray pixel before the flat (a gentle gradient)."""
    sc = model.scenario
    ny, nx = sc.sub_shape
    gx = (np.arange(nx) / (nx - 1) - 0.5)[None, :]
    gy = (np.arange(ny) / (ny - 1) - 0.5)[:, None]
    return sc.sky_rate * (1.0 + sc.sky_gradient * gx + 0.3 * sc.sky_gradient * gy)


def expected_charge(model, index):
    """Expected cumulative linear charge (source + sky + dark), electrons."""
    sc = model.scenario
    sub = model.sub_slices
    flat = flat_at(sc, model.refs.flat[(...,) + sub], model.wave)
    background = sky_rate(model) * flat + model.refs.dark[sub].astype(float)
    return source_charge(model, index) + model.read_times[:, None, None] * background[None]
