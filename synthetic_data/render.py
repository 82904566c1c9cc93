"""Render a fictional scenario into a visit directory ready to reduce.

:func:`render` writes into ``outdir``:

- ``raw/*.fits``: the exposures in the raw layout (version 1);
- ``calibration/{bias,dark,flat,nonlinearity,bad_pixels}.fits`` and
  ``calibration/throughput.ecsv``;
- ``instrument.toml`` and ``visit.toml``;
- ``truth.fits`` (columns documented in :mod:`.truth`).

A read in ADU is bias + nonlinear(e_linear) / gain + read noise / gain, with
e_linear the cumulative charge: Poisson increments of source (times the
flat), sky (times the flat) and dark between reads, plus cosmic-ray hits from
their read on.  The output is deterministic for a seed: the same bytes (the
CHECKSUM and DATASUM comments carry no time stamp, see :func:`write_hdus`), so
a visit rendered again keeps its identity in the reducer's notebook.
"""

import dataclasses
import pathlib

import numpy as np
from astropy.io import fits
from astropy.table import Table
from astropy.time import Time, TimeDelta

from lightledger.pipeline import orbit

from . import detector, model as vm
from .sizes import resolve_size
from .scenarios import SCENARIOS, Scenario, get_scenario
from .truth import write_truth

__all__ = ["render", "simulate_reads", "programme_models", "SCENARIOS"]


def simulate_reads(expected, *, rng, bias, nonlinearity, gain, read_noise, full_well,
                   row_noise=0.0, column_noise=0.0, cosmic_reads=None, cosmic_pixels=None,
                   cosmic_electrons=None):
    """Noisy reads (ADU) of one exposure from its expected cumulative charge.

    Parameters
    ----------
    expected : ndarray (n_reads, n_rows, n_columns)
        Expected cumulative linear charge, electrons (0 at the zero read).
    rng : numpy.random.Generator
    bias : ndarray (n_rows, n_columns), ADU
    nonlinearity : ndarray (K, n_rows, n_columns)
    gain : float
        Electrons per ADU.
    read_noise : float
        White read noise per read, electrons.
    full_well : float
        Clip level of the charge as read, electrons.
    row_noise, column_noise : float, optional
        Correlated 1/f read noise along the readout (rows) and the columns,
        electrons per read.
    cosmic_reads, cosmic_pixels, cosmic_electrons : array_like, optional
        Cosmic-ray hits: first read holding the charge, (y, x) pixel, charge.

    Returns
    -------
    ndarray of float32 (n_reads, n_rows, n_columns)
    """
    charge = detector.poisson_ramp(expected, rng=rng)
    if cosmic_reads is not None and len(cosmic_reads):
        n_reads = charge.shape[0]
        reads = np.asarray(cosmic_reads)
        after = np.arange(n_reads)[:, None] >= reads[None, :]            # (n_reads, n_hits)
        ys, xs = np.asarray(cosmic_pixels[0]), np.asarray(cosmic_pixels[1])
        for_read = after * np.asarray(cosmic_electrons)[None, :]
        np.add.at(charge, (slice(None), ys, xs), for_read)
    noise = rng.normal(0.0, read_noise, charge.shape)
    if row_noise > 0 or column_noise > 0:
        noise += detector.one_over_f_noise(rng, *charge.shape, row_sigma=row_noise,
                                           column_sigma=column_noise)
    return detector.digitise(charge, bias=bias, nonlinearity=nonlinearity, gain=gain,
                             full_well=full_well, read_noise_e=noise)


def _primary_header(model, start_s, obsgeo):
    t = Time(model.date_beg, scale="utc", precision=6) + TimeDelta(start_s, format="sec")
    h = fits.Header()
    h["DATE-BEG"] = (t.isot, "UTC of the first exposure's zero read")
    h["TIMESYS"] = ("UTC", "time scale of DATE-BEG")
    h["XPOSURE"] = (model.exposure_time, "[s] zero read to last read of one exposure")
    if obsgeo is not None:
        for axis, value in zip("XYZ", obsgeo):
            h[f"OBSGEO-{axis}"] = (float(value), "[m] observer ITRS position at mid-time")
    return h


def write_hdus(hdus, path):
    """Write HDUs with CHECKSUM and DATASUM whose comments carry no time stamp."""
    hdul = fits.HDUList(hdus)
    for hdu in hdul:
        hdu._get_timestamp = _no_time     # astropy dates these comments with the wall clock
    hdul.writeto(path, overwrite=True, checksum=True)


def _no_time():
    return "at rendering"


def _write_raw(path, header, reads, read_times, startoff=None):
    hdus = [fits.PrimaryHDU(header=header),
            fits.ImageHDU(reads, name="READS"),
            fits.ImageHDU(np.asarray(read_times, dtype=np.float64), name="READTIME")]
    if startoff is not None:
        hdus.append(fits.ImageHDU(np.asarray(startoff, dtype=np.float64), name="STARTOFF"))
    write_hdus(hdus, path)


def _write_image(path, array):
    write_hdus([fits.PrimaryHDU(np.asarray(array))], path)


def _toml_list(values):
    return "[" + ", ".join(repr(float(v)) for v in values) + "]"


def _write_profile(model, path):
    sc = model.scenario
    text = f'''# Instrument profile of a fictional instrument (rendered by the forward model)
name = "{sc.profile_name}"

[detector]
gain = {sc.gain!r}
read_noise = {sc.read_noise!r}
saturation = {sc.saturation!r}
full_shape = [{sc.full_shape[0]}, {sc.full_shape[1]}]

[reference_files]
bias = "calibration/bias.fits"
dark = "calibration/dark.fits"
flat = "calibration/flat.fits"
nonlinearity = "calibration/nonlinearity.fits"
bad_pixels = "calibration/bad_pixels.fits"
throughput = "calibration/throughput.ecsv"

[flat]
wavelength_range = {_toml_list(sc.flat_range)}

[dispersion]
coefficients = {_toml_list(sc.dispersion)}
column_offset = {float(sc.column_offset)!r}

[trace]
row_offset = {float(sc.row_offset)!r}
tilt = {float(sc.tilt)!r}
width = {float(sc.psf_sigma)!r}
'''
    path.write_text(text)


def _write_visit(model, path, wdepth, profile="instrument.toml"):
    sc = model.scenario
    edges = np.asarray(sc.channel_edges)
    duration = _event_duration(sc)
    orbit_keys = (f"eccentricity = {sc.eccentricity!r}\nomega = {sc.omega_deg!r}\n"
                  if sc.kind == "phase-curve" else "")
    text = f'''# Visit description of a fictional visit (rendered by the forward model)
[visit]
name = "{sc.visit_name}"
raw = "raw"
profile = "{profile}"
notebook = "notebook"

[target]
name = "{sc.target_name}"
ra = {sc.ra!r}
dec = {sc.dec!r}
teff = {sc.teff!r}
source_x = {float(sc.source_x)!r}
source_y = {float(sc.source_y)!r}

[event]
kind = "{sc.kind}"
t0 = {model.t0!r}
period = {sc.period!r}
duration = {round(duration, 6)!r}
rp_rs = {sc.rp_rs!r}
a_rs = {sc.a_rs!r}
inclination = {sc.inclination!r}
u1 = {sc.u1!r}
u2 = {sc.u2!r}
{orbit_keys}
[stages.calibrate]
[stages.extract]
[stages.bin]
edges = {_toml_list(edges)}
white_range = {_toml_list([edges[0], edges[-1]])}
[stages.detrend]
'''
    path.write_text(text)


def _event_duration(sc):
    """First-to-fourth contact duration of the transit, days (Winn 2010, eq. 14 and 16)."""
    e, w = sc.eccentricity, np.deg2rad(sc.omega_deg)
    scale = np.sqrt(1 - e * e) / (1 + e * np.sin(w))
    b = sc.a_rs * np.cos(np.deg2rad(sc.inclination)) * (1 - e * e) / (1 + e * np.sin(w))
    arg = np.sqrt(max((1 + sc.rp_rs) ** 2 - b ** 2, 0.0)) / (sc.a_rs * np.sin(np.deg2rad(sc.inclination)))
    return float(sc.period / np.pi * np.arcsin(min(arg, 1.0)) * scale)


def render(scenario, outdir, *, seed=0, n_exposures=None, n_orbits=None, progress=None,
           ramps="exponential"):
    """Render a scenario into a visit directory (a programme: one folder per visit).

    Parameters
    ----------
    scenario : str or Scenario
        A name in :data:`SCENARIOS`, or a scenario's parameters (e.g. one
        with a field changed by :func:`dataclasses.replace`).
    outdir : str or path-like
        Directory to write (created; existing files of the same names are
        overwritten).
    seed : int, optional
        Seed of every random draw; the same seed gives the same files.
    n_exposures : int, optional
        Exposures of the visit (of each visit of a programme); default the
        scenario's (for a changed number of orbits, its default exposures per
        orbit times the orbits).  The allowed range is
        :func:`.sizes.exposure_range`.
    n_orbits : int, optional
        Orbits of an orbiting (scan) scenario, 1 to
        :data:`.sizes.MAX_ORBITS`; default the scenario's.
    progress : callable, optional
        Called as ``progress(done, total)`` after each exposure.
    ramps : {"exponential", "traps"}, optional
        Render the ramps at the start of each orbit as the scenario's
        exponentials (default) or with its charge-trapping populations
        (Zhou et al. 2017; scan scenarios), a ramp that no exponential
        describes exactly and that differs from channel to channel.

    Returns
    -------
    pathlib.Path
        Path of the written ``visit.toml``, or of ``programme.toml`` for a
        programme of visits (``visits`` in the scenario): then ``outdir``
        holds the shared ``calibration/`` and ``instrument.toml`` and one
        folder per visit with its ``raw/``, ``visit.toml`` and ``truth.fits``.

    Raises
    ------
    lightledger.pipeline.errors.ParameterError
        For an unknown scenario (the message names the valid ones) or an
        impossible number of exposures or orbits (the message says the range).

    Notes
    -----
    Memory is bounded by one raw file's reads (exposures are rendered and
    written one file at a time) plus per-exposure tables, whatever the size.
    """
    sc = scenario if isinstance(scenario, Scenario) else get_scenario(scenario)
    sc, n_exposures = resolve_size(sc, n_exposures=n_exposures,
                                   n_orbits=n_orbits)
    out = pathlib.Path(outdir)
    if sc.visits:
        return _render_programme(sc, out, seed=seed, n_exposures=n_exposures, progress=progress,
                                 ramps=ramps)
    model = vm.build_visit(sc, seed=seed, n_exposures=n_exposures, ramps=ramps)
    _write_calibration(model, out)
    _write_exposures(model, out, progress)
    tr = write_truth(model, out / "truth.fits")
    _write_profile(model, out / "instrument.toml")
    visit = out / "visit.toml"
    _write_visit(model, visit, tr["wdepth"])
    return visit


def _write_calibration(model, out):
    sc = model.scenario
    (out / "calibration").mkdir(parents=True, exist_ok=True)
    refs = model.refs
    for name in ("bias", "dark", "flat", "nonlinearity", "bad_pixels"):
        _write_image(out / "calibration" / f"{name}.fits", getattr(refs, name))
    # the throughput curve covers the subarray's wavelengths with a margin on each side
    lo = np.floor((np.min(model.wave) - 0.1) * 10) / 10
    hi = np.ceil((np.max(model.wave) + 0.1) * 10) / 10
    wave = np.round(np.linspace(lo, hi, int(round((hi - lo) / 0.002)) + 1), 6)
    table = Table({"wavelength": wave, "throughput": vm.throughput_of(sc, wave)})
    table["wavelength"].unit = "um"
    table.meta["comment"] = [f"throughput of the fictional instrument {sc.profile_name}"]
    table.write(out / "calibration" / "throughput.ecsv", format="ascii.ecsv", overwrite=True)


def _write_exposures(model, out, progress, done=0, total=None):
    """Render and write every raw file of a visit; returns the exposures done so far."""
    sc = model.scenario
    (out / "raw").mkdir(parents=True, exist_ok=True)
    refs = model.refs
    sub = model.sub_slices
    bias = refs.bias[sub].astype(float)
    nonlin = refs.nonlinearity[(slice(None),) + sub].astype(float)
    noise_seeds = np.random.SeedSequence(model.entropy).spawn(4)[3].spawn(model.n_exposures)
    cr = model.cosmics
    n = model.n_exposures
    total = n if total is None else total
    per_file = sc.exposures_per_file
    for first in range(0, n, per_file):
        idx = np.arange(first, min(first + per_file, n))
        cube = np.empty((idx.size, sc.n_reads) + sc.sub_shape, dtype=np.float32)
        for j, i in enumerate(idx):
            hits = cr.exposure == i
            cube[j] = simulate_reads(
                vm.expected_charge(model, i), rng=np.random.default_rng(noise_seeds[i]),
                bias=bias, nonlinearity=nonlin, gain=sc.gain, read_noise=sc.read_noise,
                full_well=sc.full_well, row_noise=sc.row_noise, column_noise=sc.column_noise,
                cosmic_reads=cr.read[hits], cosmic_pixels=(cr.y[hits], cr.x[hits]),
                cosmic_electrons=cr.electrons[hits])
            done += 1
            if progress is not None:
                progress(done, total)
        obsgeo = None if model.obsgeo is None else model.obsgeo[idx].mean(axis=0)
        header = _primary_header(model, model.start[idx[0]], obsgeo)
        header["SCANVEL"] = (float(model.velocity[idx[0]]), "[rows/s] signed scan speed")
        header["SUBORIGX"] = (int(sc.sub_origin[0]), "full-detector column of [0,0]")
        header["SUBORIGY"] = (int(sc.sub_origin[1]), "full-detector row of [0,0]")
        header["INSTPROF"] = (sc.profile_name, "instrument profile")
        path = out / "raw" / f"{sc.name}-{first:04d}.fits"
        if per_file == 1:
            _write_raw(path, header, cube[0], model.read_times)
        else:
            _write_raw(path, header, cube, model.read_times,
                       startoff=model.start[idx] - model.start[idx[0]])
    return done


def _visit_scenarios(sc):
    """Each visit's scenario: the programme's with the visit's overrides."""
    return [(folder, centre, dataclasses.replace(sc, visits=(), **dict(overrides)))
            for folder, centre, overrides in sc.visits]


def programme_models(sc, *, seed=0, n_exposures=None, ramps="exponential"):
    """The noise-free plans of a programme's visits: one planet, shared reference files.

    The first visit is centred on its event (an eclipse or a transit) as a
    single visit would be; the planet's ephemeris follows from it, and each
    later visit starts so that the next event of its kind after the
    previous visit falls at its centre.

    Returns
    -------
    list of (str, VisitModel)
        Each visit's folder name and model, in order.
    """
    models = []
    t0 = None
    anchor = None            # (UTC start, BJD_TDB centre) of the previous visit
    for index, (folder, centre, vsc) in enumerate(_visit_scenarios(sc)):
        if anchor is not None:
            eph = vm.ephemeris_of(vsc, t0)
            times = (orbit.transit_times_in if centre == "transit" else orbit.eclipse_times_in)(
                eph, anchor[1] + 0.25 * vsc.period, anchor[1] + 1.25 * vsc.period)
            begin = Time(anchor[0], scale="utc") + TimeDelta((times[0] - anchor[1]) * 86400.0,
                                                             format="sec")
            vsc = dataclasses.replace(vsc, date_beg=begin.isot)
        refs = models[0][1].refs if models else None
        probe = vm.build_visit(vsc, seed=seed, n_exposures=n_exposures, stream=index, refs=refs,
                               t0=0.0)
        centre_bjd = _centre_bjd(probe)
        if t0 is None:
            lag = orbit.eclipse_time(vm.ephemeris_of(vsc, 0.0)) if centre == "eclipse" else 0.0
            t0 = round(centre_bjd - lag, 6)
        model = vm.build_visit(vsc, seed=seed, n_exposures=n_exposures, stream=index,
                               refs=probe.refs, t0=t0, ramps=ramps)
        models.append((folder, model))
        anchor = (vsc.date_beg, centre_bjd)
    return models


def _render_programme(sc, out, *, seed, n_exposures, progress, ramps="exponential"):
    """Render the visits of a programme sharing one planet and one set of calibration files."""
    models = programme_models(sc, seed=seed, n_exposures=n_exposures, ramps=ramps)
    total = sum(m.n_exposures for _, m in models)
    _write_calibration(models[0][1], out)
    _write_profile(models[0][1], out / "instrument.toml")
    done = 0
    paths = []
    for folder, model in models:
        vdir = out / folder
        done = _write_exposures(model, vdir, progress, done, total)
        tr = write_truth(model, vdir / "truth.fits")
        _write_visit(model, vdir / "visit.toml", tr["wdepth"], profile="../instrument.toml")
        paths.append(f"{folder}/visit.toml")
    programme = out / "programme.toml"
    _write_programme(sc, models[0][1], programme, paths)
    return programme


def _centre_bjd(model):
    """BJD_TDB of the middle of a visit (of its middle orbit's visibility window)."""
    sc = model.scenario
    t_beg = Time(model.date_beg, scale="utc", precision=6)
    if sc.n_orbits:
        centre_s = (sc.n_orbits // 2) * sc.orbit_period + 0.5 * sc.visibility
    else:
        centre_s = 0.5 * (model.start[0] + model.start[-1] + model.exposure_time)
    t_centre = t_beg + TimeDelta(centre_s, format="sec")
    from . import timing
    return float(timing.bjd_tdb(t_centre.reshape(1), ra=sc.ra, dec=sc.dec)[0])


def _write_programme(sc, model, path, visit_paths):
    text = f'''# Programme of visits of a fictional planet (rendered by the forward model)
[programme]
name = "{sc.visit_name}"
visits = [{", ".join(f'"{p}"' for p in visit_paths)}]
notebook = "notebook"

[planet]
name = "{sc.target_name} b"
t0 = {model.t0!r}
period = {sc.period!r}
rp_rs = {sc.rp_rs!r}
a_rs = {sc.a_rs!r}
inclination = {sc.inclination!r}
eccentricity = {sc.eccentricity!r}
omega = {sc.omega_deg!r}
u1 = {sc.u1!r}
u2 = {sc.u2!r}

[stages.joint]
phase_bins = {_toml_list(np.round(np.linspace(0.0, 1.0, 11), 4))}
'''
    path.write_text(text)
