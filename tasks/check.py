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

import os
from dataclasses import dataclass, field
from pathlib import Path

from lightledger.pipeline.errors import LightledgerError, ParameterError
from lightledger.pipeline.parameters import STAGE_ORDER

from .checkreads import (_SCAN_BLOCK_BYTES, _read_block, _scan_blocks,  # noqa: F401
                         _scan_reads, clip_level)
from .checkstages import (_check_channels, _check_excluded_channels,  # noqa: F401
                          _dispersion_range, event_coverage)
from .config import load_visit
from .exclusions import apply_exclusions
from .problems import Problems
from .rawio import report_set_aside, survey, usable
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
