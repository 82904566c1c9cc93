"""The validation pass: every problem of a visit, found before any stage runs.

:func:`check_visit` looks at the visit description, its instrument profile,
every raw file and every reference file, and at the stage parameters against
the data (channel edges against the dispersion solution over the subarray,
the event's ephemeris against the exposures' times).  It returns a
:class:`CheckReport` that holds *every* problem, one line each
(``FILE: what is wrong``, naming the key, keyword or extension), instead of
stopping at the first.  ``lightledger check VISIT.toml`` prints the report;
``lightledger reduce`` runs the same pass first and stops with exit status 2
when it holds an error.

Exposures that cannot be used (an unreadable or damaged file, broken read
times, a duplicate start time, every pixel saturated or non-finite, a frame
shape or subarray unlike the rest of the visit) are *set aside* with their
reason, not errors, unless the visit says ``on_bad_exposure = "stop"``.
Exposures the observer excludes by hand (the ``[exclude]`` lists) are set
aside likewise.  Set-aside exposures keep their rows in the inventory
product, flagged, with the reason.

The pass reads every raw exposure once (one memory-mapped exposure at a
time) to find exposures whose pixels are all non-finite or all saturated;
``read_data=False`` skips that for a headers-only look.
"""

import math
import os
import warnings
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np

from lightledger.pipeline.errors import InputFileError, LightledgerError, ParameterError
from lightledger.pipeline.parameters import STAGE_ORDER
from lightledger.pipeline.rawreads import summarize_exposures

from .config import load_visit
from .problems import Problems
from .rawio import read_exposure, read_exposures, report_set_aside, set_aside, survey, usable
from .references import check_references, load_throughput

__all__ = ["CheckReport", "check_visit", "apply_exclusions", "clip_level", "event_coverage",
           "visit_exposures", "parse_settings"]


@dataclass
class CheckReport:
    """What the validation pass found.

    Attributes
    ----------
    visit : config.Visit or None
        The visit description (None when it could not be read at all).
    refs : list of rawio.ExposureRef
        Every exposure, set-aside ones included, in start-time order.
    problems : Problems
        Errors, environment failures and warnings, in the order found.
    references : references.References or None
        The reference arrays cut to the subarray (None when unusable).
    """

    visit: object = None
    refs: list = field(default_factory=list)
    problems: Problems = field(default_factory=Problems)
    references: object = None

    @property
    def errors(self):
        return self.problems.errors

    @property
    def warnings(self):
        return self.problems.warnings

    @property
    def usable(self):
        return usable(self.refs)

    @property
    def set_aside(self):
        return [r for r in self.refs if r.excluded]

    def lines(self):
        """Every problem's console line, errors first."""
        return [p.line for p in self.errors] + [p.line for p in self.warnings]

    def raise_errors(self):
        """Raise one LightledgerError (or EnvironmentFailure) holding every error."""
        self.problems.raise_errors(LightledgerError)

    def summary(self):
        """One line: exposures found, used and set aside."""
        n, aside = len(self.refs), len(self.set_aside)
        return (f"{n} exposures, {n - aside} to reduce, {aside} set aside"
                if self.refs else "no exposures")


def clip_level(ref, bias, saturation):
    """ADU above which a repeated top value counts as clipped (None: any value).

    Floating-point storage: any exact repeat of a pixel's top is a clip.
    Integer storage, where small values repeat by chance: only tops above
    half the saturation level (ADU above bias).
    """
    return None if ref.bitpix < 0 else np.asarray(bias, float) + 0.5 * float(saturation)


def apply_exclusions(refs, exclude, raw_dir, visit_path, problems):
    """Set aside the exposures the observer excludes by hand; errors for names that match nothing."""
    out = list(refs)
    names = {Path(r.file).name for r in refs}
    for k, (name, reason) in enumerate(exclude.get("files", ())):
        if name not in names:
            problems.error(visit_path, f"exclude.files[{k}] names {name!r}, which is not a "
                                       f"*.fits file of {raw_dir}")
            continue
        why = f"excluded by the visit description (exclude.files){': ' + reason if reason else ''}"
        out = [set_aside(r, why) if Path(r.file).name == name else r for r in out]
    n_numbered = sum(1 for r in refs if math.isfinite(r.start_mjd))
    for k, (first, last, reason) in enumerate(exclude.get("exposures", ())):
        if last >= n_numbered:
            problems.error(visit_path, f"exclude.exposures[{k}] names exposure {last}; the visit's "
                                       f"exposures are numbered 0 to {n_numbered - 1}")
            continue
        why = f"excluded by the visit description (exclude.exposures){': ' + reason if reason else ''}"
        out = [set_aside(r, why) if first <= r.exposure <= last and math.isfinite(r.start_mjd)
               else r for r in out]
    for k, (lo, hi, reason) in enumerate(exclude.get("times", ())):
        why = f"excluded by the visit description (exclude.times){': ' + reason if reason else ''}"
        hit = 0
        for i, r in enumerate(out):
            if not math.isfinite(r.start_mjd):
                continue
            end = r.start_mjd + (r.read_times[-1] if r.read_times else 0.0) / 86400.0
            if r.start_mjd <= hi and end >= lo:
                hit += 1
                out[i] = set_aside(r, why)
        if not hit:
            problems.warning(visit_path, f"exclude.times[{k}] covers no exposure of the visit")
    return out


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


def _notebook_writable(visit, problems):
    folder = Path(visit.notebook)
    if folder.exists() and not folder.is_dir():
        problems.error(visit.path, f"visit.notebook names {folder}, which is not a directory")
        return
    probe = folder
    while not probe.exists() and probe.parent != probe:
        probe = probe.parent
    if not os.access(probe, os.W_OK | os.X_OK):
        problems.environment(probe, f"permission denied: the notebook {folder} cannot be "
                                    f"written here (set visit.notebook to a writable folder)")


def check_visit(visit_path, settings=(), *, until=None, read_data=True, progress=None):
    """Validate a whole visit and list its exposures; every problem at once.

    Parameters
    ----------
    visit_path : str or Path
        Visit description (TOML).
    settings : list of (stage, key, value) or of "STAGE.KEY=VALUE" texts
        Command-line overrides (``--set``); a text that cannot be parsed is
        one more problem.
    until : str, optional
        Last stage that will run; the event's coverage is checked only when
        ``detrend`` runs.
    read_data : bool
        Read every raw exposure to find the unusable ones (default True).
    progress : callable, optional
        ``progress(done, total)`` while reading exposures.

    Returns
    -------
    CheckReport
    """
    report = CheckReport()
    problems = report.problems
    settings = parse_settings(settings, problems)
    visit = load_visit(visit_path, settings, problems)
    report.visit = visit
    if visit is None or visit.profile is None or visit.raw is None or not visit.raw.is_dir():
        return report
    profile = visit.profile
    _notebook_writable(visit, problems)
    survey_problems = Problems()
    refs = survey(visit.raw, profile, survey_problems)
    problems.extend(survey_problems)
    refs = apply_exclusions(refs, visit.exclude, visit.raw, visit.path, problems)
    good = usable(refs)
    if not good:
        report.refs = refs
        _finish(report, visit)
        return report
    shape, origin = good[0].shape[1:], good[0].origin

    references = None
    full = profile.full_shape
    if full is not None and (origin[0] + shape[1] > full[1] or origin[1] + shape[0] > full[0]):
        kw = profile.keyword
        problems.error(good[0].file, f"{kw('SUBORIGX')} = {origin[0]}, {kw('SUBORIGY')} = "
                                     f"{origin[1]} and the frame of {shape[0]} rows x {shape[1]} "
                                     f"columns reach beyond the {full[0]} x {full[1]} detector "
                                     f"(detector.full_shape of {profile.path}) that the "
                                     f"reference files cover")
        profile = None
    ready = profile is not None \
        and all(getattr(profile, k) is not None for k in ("gain", "saturation", "full_shape",
                                                          "dispersion", "column_offset")) \
        and all(f is not None for role, f in profile.files.items() if role != "throughput") \
        and visit.target.get("source_x") is not None
    if ready:
        edges = _dispersion_range(visit, shape, origin, problems)
        if edges is not None:
            references = check_references(profile, shape, origin, visit.target["source_x"],
                                          problems)
            n_channels = _check_channels(visit, edges, problems)
            _check_excluded_channels(visit, n_channels, problems)
            if visit.stages["extract"]["refine_wavelength"]:
                load_throughput(profile, problems)
    report.references = references

    if read_data and references is not None:
        refs = _scan_reads(refs, references, visit.profile, problems, progress)
    report.refs = refs
    _finish(report, visit)
    if (until is None or until == STAGE_ORDER[-1]) and report.usable and visit.valid:
        text = event_coverage(visit, report.usable)
        if text:
            problems.error(visit.path, text)
    return report


def parse_settings(settings, problems=None):
    """(stage, key, value) of each override; texts ``STAGE.KEY=VALUE`` are parsed and checked.

    Without ``problems`` the first bad text raises its ParameterError.
    """
    from lightledger.pipeline.parameters import parse_assignment

    out = []
    for item in settings or ():
        if isinstance(item, str):
            try:
                item = parse_assignment(item)
            except ParameterError as exc:
                if problems is None:
                    raise
                problems.error("", str(exc))
                continue
        out.append(tuple(item))
    return out


def _check_excluded_channels(visit, n_channels, problems):
    for k, (first, last, _) in enumerate(visit.exclude.get("channels", ())):
        if n_channels is not None and last >= n_channels:
            problems.error(visit.path, f"exclude.channels[{k}] names channel {last}; the bin "
                                       f"stage makes channels 0 to {n_channels - 1}")


#: Bytes of float64 reads the validation pass summarises at once (a block of one file's exposures).
_SCAN_BLOCK_BYTES = 4 << 20


def _scan_blocks(refs, todo):
    """Indices of ``todo`` in blocks of one file, one frame shape and one storage, in order."""
    block, key = [], None
    for i in todo:
        r = refs[i]
        k = (r.file, tuple(r.shape), r.bitpix, r.bscale)
        size = 8 * int(np.prod(r.shape))
        if block and (k != key or (len(block) + 1) * size > _SCAN_BLOCK_BYTES):
            yield block
            block = []
        block.append(i)
        key = k
    if block:
        yield block


def _read_block(refs):
    """The reads of a block of exposures (float64), or None when one of them cannot be read."""
    try:
        return read_exposures(refs, dtype=np.float64)
    except InputFileError:
        return None


def _scan_reads(refs, references, profile, problems, progress):
    """Set aside exposures with no usable pixel; warn about wrapped integer storage.

    The exposures of one file are read together (one memory map) and summarised a block at a
    time; an exposure of a block that cannot be read is read again alone, for its own reason.
    """
    out = list(refs)
    todo = [i for i, r in enumerate(out) if not r.excluded]
    wrapped = []
    done = 0
    for block in _scan_blocks(out, todo):
        if progress is not None:
            progress(done, len(todo))
        done += len(block)
        chosen = [out[i] for i in block]
        reads = _read_block(chosen)
        if reads is None:
            good = []
            for i in block:
                try:
                    good.append((i, read_exposure(out[i])[None]))
                except InputFileError as exc:
                    out[i] = set_aside(out[i], f"cannot read the reads ({str(exc).split(': ', 1)[-1]})")
            block = [i for i, _ in good]
            reads = np.concatenate([a for _, a in good]) if good else None
        if reads is None:
            continue
        r0 = out[block[0]]
        summaries = summarize_exposures(reads, bias=references.bias, saturation=profile.saturation,
                                        span=r0.wrap,
                                        clip_level=clip_level(r0, references.bias, profile.saturation))
        del reads
        for i, summary in zip(block, summaries):
            r = out[i]
            if summary.n_not_finite == summary.n_pixels:
                out[i] = set_aside(r, "every pixel is NaN or infinite in every read")
            elif summary.n_usable == 0:
                kind = "saturated or clipped" if summary.n_clipped else "saturated"
                out[i] = set_aside(r, f"every pixel is {kind} from read {summary.first_untrusted} on "
                                      f"(fewer than 2 usable reads; detector.saturation "
                                      f"{profile.saturation:g} ADU above bias)")
            if summary.n_wrapped:
                wrapped.append((r, summary.n_wrapped))
    if progress is not None and todo:
        progress(len(todo), len(todo))
    if wrapped:
        r, n = wrapped[0]
        bits = abs(r.bitpix)
        more = f"; likewise {len(wrapped) - 1} more exposures" if len(wrapped) > 1 else ""
        problems.warning(r.label, f"{n} pixels wrapped around the {bits}-bit integer storage of "
                                  f"READS (a read drops by more than half of 2**{bits} ADU); their "
                                  f"reads from the wrap on are treated as saturated{more}")
    return out


def _finish(report, visit):
    """Report set-aside exposures (errors when the visit says stop) and an empty visit."""
    problems = report.problems
    observer = [r for r in report.refs if r.excluded and r.reason.startswith("excluded by the visit")]
    bad = [r for r in report.refs if r.excluded and r not in observer]
    report_set_aside(bad, problems, level="error" if visit.on_bad_exposure == "stop" else "warning")
    if report.refs and not report.usable:
        problems.error(visit.raw, f"no usable exposure: all {len(report.refs)} are set aside "
                                  f"(reasons above)")




def visit_exposures(visit_path, settings_text, settings):
    """Every exposure of a visit, set-aside ones included (the validation pass's list).

    For a task run without the run's plan (a worker of another machine): the
    validation pass again, which gives the same list for the same files.

    Raises
    ------
    LightledgerError
        When the pass finds an error.
    """
    report = check_visit(visit_path, settings, until=STAGE_ORDER[0])
    report.raise_errors()
    return report.refs
