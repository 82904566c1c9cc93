"""The fictional scenarios the forward model can render.

Every name and number here is invented for the demos: the stars, planets,
instruments and visits do not exist.  The two instruments have wavelength
ranges, dispersions, pixel scales and visibility windows of their own; only
the physics is real (the ~95.6 min period of a 550 km orbit, Planck spectra,
hydrogen lines).  :data:`SCENARIOS` maps each scenario's
name to a one-line description; :func:`get_scenario` returns its full
parameter set, a frozen :class:`Scenario`.
"""

import math
import dataclasses
from dataclasses import dataclass, field

from lightledger.pipeline.errors import ParameterError

__all__ = ["Scenario", "SCENARIOS", "get_scenario"]


@dataclass(frozen=True)
class Scenario:
    """Every parameter of one fictional visit.

    Units: wavelengths um, times s unless stated (event times in days),
    charges electrons, rates e-/s, positions full-detector pixels.
    """

    name: str
    description: str
    mode: str                         # "scan" or "stare"
    visit_name: str
    profile_name: str
    target_name: str
    ra: float
    dec: float
    teff: float
    # detector
    full_shape: tuple
    sub_origin: tuple                 # (SUBORIGX, SUBORIGY)
    sub_shape: tuple                  # (n_rows, n_columns)
    gain: float
    read_noise: float
    saturation: float                 # ADU above bias (profile)
    full_well: float                  # e- as read where the pixel clips
    bias_level: float
    dark_rate: float
    nonlin_c1: float
    nonlin_c2: float
    flat_kind: str
    flat_range: tuple
    n_dead: int
    n_hot: int
    hot_rate_range: tuple
    row_noise: float                  # 1/f stripes along rows, e- per read
    column_noise: float               # 1/f stripes along columns, e- per read
    cr_per_exposure: float
    cr_median: float
    # optics
    source_x: float
    source_y: float
    column_offset: float
    dispersion: tuple
    row_offset: float
    tilt: float
    pixel_scale: float                # arcsec per pixel
    psf_fwhm: float                   # cross-dispersion FWHM of the image, arcsec
    throughput_lo: float
    throughput_hi: float
    throughput_edge: float
    throughput_peak: float
    line_depth: float
    line_width: float
    peak_rate: float                  # source e-/s in the brightest column
    sky_rate: float                   # e-/s per pixel at the subarray centre
    sky_gradient: float               # fractional change across the subarray (x)
    # reads and schedule
    n_reads: int
    read_interval: float
    scan_rate: float                  # arcsec per second on the sky (0 = stare)
    date_beg: str
    default_n_exposures: int
    n_orbits: int                     # 0 = continuous visit
    orbit_period: float
    visibility: float
    cadence: float                    # stare: zero read to next zero read
    exposures_per_file: int
    altitude_km: float                # 0 = no observer position written
    orbit_inclination_deg: float
    # event (times in days)
    kind: str
    period: float
    event_offset: float               # event centre minus the visit centre, days
    rp_rs: float
    a_rs: float
    inclination: float
    u1: float
    u2: float
    band_centre: float
    band_width: float
    band_depth: float
    t_planet: float
    night_fraction: float             # planet flux at transit / at eclipse
    phase_offset_deg: float           # eastward hot-spot offset of the phase curve
    # systematics
    visit_slope: float                # per day
    visit_curve: float                # per day^2
    orbit_ramp: tuple                 # amplitude per orbit (first is strongest)
    orbit_ramp_tau: float
    orbit_poly: tuple                 # coefficients of orbit phase, powers 1..
    reverse_offset: float             # fractional offset of reverse scans
    drift_x: tuple                    # (linear px per visit, per-orbit px, jitter px)
    drift_y: tuple
    # binning
    channel_edges: tuple = field(default=())
    # charge trapping, for ramps rendered with traps (synthetic_data/model.py)
    trap_populations: tuple = ()      # ((traps e-/pixel, efficiency, release time s), ...)
    trap_initial: tuple = ()          # e-/pixel trapped per population when the visit starts
    trap_refill: tuple = ()
    # rows by which the reverse scans' band sits above the forward scans' (0 = the same band)
    reverse_rows: float = 0.0           # e-/pixel added per population at each later orbit's start
    # full-orbit phase curves ("phase-curve" kind) and programmes of visits
    eccentricity: float = 0.0
    omega_deg: float = 90.0           # argument of periastron, degrees
    t_night: float = 0.0              # night-side brightness temperature, K
    emission_band: float = 0.0        # hot-side brightness-temperature excess in the band, K
    visits: tuple = ()                # programme: (folder, centred event, overrides) per visit

    @property
    def psf_sigma(self):
        """Cross-dispersion Gaussian sigma in rows: FWHM / (2 sqrt(2 ln 2)) / pixel scale."""
        return self.psf_fwhm / (2.0 * math.sqrt(2.0 * math.log(2.0))) / self.pixel_scale

    @property
    def scan_length(self):
        """Rows a scan covers in one exposure (zero read to last read); 0 for a stare."""
        return self.scan_rate * (self.n_reads - 1) * self.read_interval / self.pixel_scale


SCAN = Scenario(
    name="scan-transit",
    description=("Low-Earth-orbit spatial-scan transit of the fictional warm giant "
                 "Tarn-41 b: 5 orbits, forward/reverse scans, 8 reads per exposure."),
    mode="scan",
    visit_name="Tarn-41 b transit, scanned",
    profile_name="ledger-orbiter-ir (fictional)",
    target_name="Tarn-41",
    ra=214.3712, dec=23.8127, teff=6050.0,
    full_shape=(256, 512), sub_origin=(160, 70), sub_shape=(100, 180),
    gain=2.0, read_noise=14.0, saturation=36000.0, full_well=74000.0,
    bias_level=11000.0, dark_rate=0.04, nonlin_c1=3.0e-7, nonlin_c2=1.0e-12,
    flat_kind="cube", flat_range=(1.18, 2.20),
    n_dead=60, n_hot=40, hot_rate_range=(20.0, 3000.0),
    row_noise=0.0, column_noise=0.0,
    cr_per_exposure=8.0, cr_median=2500.0,
    source_x=205.0, source_y=92.0, column_offset=-20.0,
    dispersion=(1.19, 6.3e-3, 2.5e-7), row_offset=0.0, tilt=0.01,
    pixel_scale=0.21, psf_fwhm=0.59,
    throughput_lo=1.28, throughput_hi=2.06, throughput_edge=0.016,
    throughput_peak=0.45, line_depth=0.12, line_width=0.0035,
    peak_rate=24000.0, sky_rate=1.5, sky_gradient=0.1,
    n_reads=8, read_interval=12.0, scan_rate=0.14,
    date_beg="2023-05-17T03:12:40.000",
    default_n_exposures=90, n_orbits=5, orbit_period=95.6 * 60.0,
    visibility=63.0 * 60.0, cadence=0.0, exposures_per_file=1,
    altitude_km=550.0, orbit_inclination_deg=28.5,
    kind="transit", period=2.9, event_offset=0.0104, rp_rs=0.118, a_rs=9.5,
    inclination=87.6, u1=0.22, u2=0.28,
    band_centre=1.92, band_width=0.06, band_depth=2.0e-4,
    t_planet=1100.0, night_fraction=1.0, phase_offset_deg=0.0,
    visit_slope=-1.5e-3, visit_curve=2.0e-3,
    orbit_ramp=(4.0e-3, 1.2e-3, 1.0e-3, 1.0e-3, 0.9e-3), orbit_ramp_tau=420.0,
    orbit_poly=(6.0e-4, -1.2e-3), reverse_offset=-2.5e-3,
    drift_x=(0.06, 0.03, 0.01), drift_y=(0.04, 0.02, 0.01),
    channel_edges=tuple(round(1.30 + 0.07 * k, 4) for k in range(11)),
    trap_populations=((130.0, 0.007, 420.0), (1200.0, 0.010, 14000.0)),
    trap_initial=(0.0, 0.0), trap_refill=(0.0, 0.0),
)

STARE = Scenario(
    name="stare-eclipse",
    description=("Continuous stare at the secondary eclipse and phase curve of the "
                 "fictional ultra-hot Jupiter Ember-9 b, with correlated read noise."),
    mode="stare",
    visit_name="Ember-9 b eclipse and phase curve, staring",
    profile_name="ledger-deepspace-ir (fictional)",
    target_name="Ember-9",
    ra=61.0428, dec=-47.3315, teff=6400.0,
    full_shape=(64, 512), sub_origin=(128, 12), sub_shape=(40, 256),
    gain=1.8, read_noise=12.0, saturation=40000.0, full_well=75000.0,
    bias_level=9000.0, dark_rate=0.02, nonlin_c1=2.6e-7, nonlin_c2=1.5e-12,
    flat_kind="2d", flat_range=(1.36, 2.36),
    n_dead=30, n_hot=20, hot_rate_range=(5.0, 200.0),
    row_noise=5.0, column_noise=3.0,
    cr_per_exposure=2.0, cr_median=2500.0,
    source_x=158.0, source_y=32.5, column_offset=0.0,
    dispersion=(1.50, 3.7e-3, 1.0e-7), row_offset=0.0, tilt=-0.006,
    pixel_scale=0.16, psf_fwhm=0.47,
    throughput_lo=1.46, throughput_hi=2.24, throughput_edge=0.018,
    throughput_peak=0.5, line_depth=0.12, line_width=0.003,
    peak_rate=1400.0, sky_rate=0.3, sky_gradient=0.05,
    n_reads=5, read_interval=20.0, scan_rate=0.0,
    date_beg="2024-02-09T11:05:00.000",
    default_n_exposures=300, n_orbits=0, orbit_period=0.0, visibility=0.0,
    cadence=100.0, exposures_per_file=50,
    altitude_km=0.0, orbit_inclination_deg=0.0,
    kind="eclipse", period=1.09, event_offset=0.0, rp_rs=0.104, a_rs=3.4,
    inclination=84.0, u1=0.2, u2=0.25,
    band_centre=1.92, band_width=0.06, band_depth=0.0,
    t_planet=2650.0, night_fraction=0.15, phase_offset_deg=8.0,
    visit_slope=8.0e-4, visit_curve=-1.0e-3,
    orbit_ramp=(1.5e-3,), orbit_ramp_tau=900.0,
    orbit_poly=(), reverse_offset=0.0,
    drift_x=(0.05, 0.0, 0.008), drift_y=(0.03, 0.0, 0.006),
    channel_edges=tuple(round(1.50 + 0.065 * k, 4) for k in range(11)),
)

PHASE_ORBIT = dataclasses.replace(
    SCAN,
    name="phase-orbit",
    description=("Low-Earth-orbit scans of the fictional ultra-hot giant Cinder-7 b over more "
                 "than a full planetary orbit: 21 orbits, a transit and two eclipses."),
    visit_name="Cinder-7 b phase curve, scanned",
    target_name="Cinder-7",
    ra=88.7314, dec=-12.4406, teff=6600.0,
    default_n_exposures=21 * 14, n_orbits=21,
    kind="phase-curve", period=1.21, event_offset=0.0, rp_rs=0.105, a_rs=3.6,
    inclination=83.0, u1=0.2, u2=0.22,
    band_centre=1.40, band_width=0.045, band_depth=1.5e-4,
    t_planet=2950.0, t_night=1250.0, phase_offset_deg=7.0, emission_band=250.0,
    visit_slope=-1.2e-3, visit_curve=6.0e-4,
    orbit_ramp=(4.0e-3, 1.3e-3, 1.0e-3), orbit_ramp_tau=420.0,
)

PHASE_PAIR = dataclasses.replace(
    PHASE_ORBIT,
    name="phase-pair",
    description=("Two scanned visits of the fictional ultra-hot giant Cinder-7 b on a slightly "
                 "eccentric orbit: one around an eclipse, one around the next transit."),
    visit_name="Cinder-7 b programme",
    default_n_exposures=5 * 14, n_orbits=5,
    eccentricity=0.03, omega_deg=60.0,
    visits=(
        ("visit-eclipse", "eclipse", (("visit_name", "Cinder-7 b eclipse, scanned"),
                                      ("visit_slope", -1.5e-3), ("visit_curve", 0.0),
                                      ("orbit_ramp", (4.0e-3, 1.2e-3, 1.0e-3)),
                                      ("reverse_offset", -2.5e-3))),
        ("visit-transit", "transit", (("visit_name", "Cinder-7 b transit, scanned"),
                                      ("visit_slope", 1.0e-3), ("visit_curve", 0.0),
                                      ("orbit_ramp", (3.0e-3, 1.5e-3, 1.1e-3)),
                                      ("orbit_ramp_tau", 520.0), ("reverse_offset", -2.0e-3),
                                      ("drift_x", (-0.05, 0.03, 0.01)),
                                      ("drift_y", (0.03, 0.025, 0.01)))),
    ),
)

_ALL = {s.name: s for s in (SCAN, STARE, PHASE_ORBIT, PHASE_PAIR)}

#: Scenario name -> one-line description.
SCENARIOS = {name: s.description for name, s in _ALL.items()}


def get_scenario(name):
    """The parameters of a scenario by name.

    Parameters
    ----------
    name : str
        One of the keys of :data:`SCENARIOS`.

    Returns
    -------
    Scenario

    Raises
    ------
    lightledger.pipeline.errors.ParameterError
        For an unknown name; the message lists the valid ones.
    """
    try:
        return _ALL[name]
    except (KeyError, TypeError):
        valid = ", ".join(sorted(_ALL))
        raise ParameterError(f"scenario must be one of {valid}; got {name!r}") from None
