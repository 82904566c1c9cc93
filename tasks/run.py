"""Running the chain of stages for one visit through Luigi."""

import logging
import shutil
import time
import uuid
from dataclasses import dataclass, field
from pathlib import Path

import luigi

from lightledger.pipeline.errors import LightledgerError
from lightledger.pipeline.parameters import STAGE_ORDER

from . import locks
from .base import (ENTRY_NAME, PROGRESS, FolderTask, make_plan, read_entry, register_plan,
                   remove_parts, settings_to_text, visit_config)
from .check import check_visit, parse_settings
from .fitpool import PROCESSES
from .heap import give_back

__all__ = ["RunResult", "reduce_visit", "stage_task", "sweep", "check_force", "exit_status",
           "others_running", "ran_tasks", "preload"]


@dataclass
class RunResult:
    """What a reduction did."""

    ok: bool
    final: Path | None
    page: Path | None
    ran: list = field(default_factory=list)      # task families that ran, in no order
    messages: list = field(default_factory=list)  # one line per failure
    warnings: list = field(default_factory=list)  # lines: the validation pass's warnings
    flags: list = field(default_factory=list)     # lines: results that cannot be trusted
    set_aside: list = field(default_factory=list)  # "FILE[index]: reason" per set-aside exposure
    status: int = 0                               # exit status of the command line
    notes: list = field(default_factory=list)     # things the user should know (not failures)
    headlines: list = field(default_factory=list)  # headline figures of the chain's entries


def stage_task(stage, plan, *, force_from="", force_after=0.0, run_id=""):
    """The Luigi task that completes ``stage`` for a visit, given the run's plan."""
    from . import stages

    cls = {"calibrate": stages.Calibrate, "extract": stages.Extract, "bin": stages.Bin,
           "detrend": stages.Detrend}[stage]
    forced = bool(force_from) and STAGE_ORDER.index(stage) >= STAGE_ORDER.index(force_from)
    return cls(visit=str(plan.visit.path), settings=plan.settings, chain=plan.chain(stage),
               force_from=force_from if forced else "", force_after=force_after if forced else 0.0,
               run_id=run_id)


def check_force(force, until, *, extra=()):
    """The first forced stage, or "" (a forced stage after ``until`` is a user's mistake).

    ``extra`` names stages after the visit's (a programme's ``joint``), forced alone.
    """
    if not force:
        return ""
    order = [*STAGE_ORDER, *extra]
    for stage in force:
        if stage == "joint" and stage not in order:
            raise LightledgerError("--force joint: a visit has no joint stage; only a programme "
                                   "description's reduction fits its visits jointly")
        if stage not in order:
            raise LightledgerError(f"--force {stage}: not a stage; stages are {', '.join(order)}")
    visit_stages = [s for s in force if s in STAGE_ORDER]
    if not visit_stages:
        return min(force, key=order.index)
    force = visit_stages
    first = min(force, key=STAGE_ORDER.index)
    late = [s for s in force if STAGE_ORDER.index(s) > STAGE_ORDER.index(until)]
    if late:
        raise LightledgerError(f"--force {late[0]} with --until {until}: the run stops before "
                               f"{late[0]}, so it cannot make it again")
    return first


def sweep(notebook, folders=None):
    """Remove temporary files that dead runs left in a notebook's stage folders.

    A folder is swept only when no process writes into it (its exclusive lock
    is free at once); busy folders are left for a later run.
    """
    notebook = Path(notebook)
    if not notebook.is_dir():
        return 0
    removed = 0
    candidates = folders if folders is not None else [
        p for p in notebook.iterdir() if p.is_dir() and not p.name.startswith(".")]
    for folder in candidates:
        folder = Path(folder)
        if not folder.is_dir() or not any(folder.glob(".*.part")):
            continue
        with locks.locked(locks.folder_lock_path(folder), blocking=False) as held:
            if held:
                removed += remove_parts(folder)
    if any(notebook.glob(".*.part")):
        with locks.locked(locks.notebook_lock_path(notebook), blocking=False) as held:
            if held:
                removed += remove_parts(notebook)
    return removed


def reduce_visit(visit_path, *, settings=(), workers=1, until=None, force=(), progress=None,
                 scheduler=None, warn=None):
    """Reduce a visit up to ``until`` (default: every stage).

    Parameters
    ----------
    visit_path : str or Path
        Visit description.
    settings : list of (stage, key, value) or of "STAGE.KEY=VALUE" texts
        Overrides from ``--set``.
    workers : int
        Luigi workers.
    until : str, optional
        Last stage to run.
    force : list of str
        Stages to make again although complete (with every stage after them up
        to ``until``); a folder made again is kept beside the new one, renamed
        ``...superseded-TIME``, at the moment its replacement starts.
    progress : callable, optional
        ``progress(stage, what, done, total, part)``; see ``tasks/console.py``.
    scheduler : (host, port), optional
        A central ``luigid`` scheduler; default the local scheduler.
    warn : callable, optional
        ``warn(line)`` for each warning of the validation pass, before any
        stage runs (they are also in the result's ``warnings``).

    Returns
    -------
    RunResult

    Raises
    ------
    LightledgerError
        Every problem of the visit description, its profile, the raw and
        reference files and the stage parameters, one per line
        (:func:`lightledger.tasks.check.check_visit`), or options that
        contradict each other, found before any task runs.

    Notes
    -----
    The bookkeeping is done here, once: the validation pass lists every
    exposure (set-aside ones with their reasons), the digests of the raw and
    reference files and every identity are computed
    (:func:`lightledger.tasks.base.make_plan`); the tasks receive the
    identities as parameters and the plan in memory.
    """
    started = time.time()
    until = until or STAGE_ORDER[-1]
    if until not in STAGE_ORDER:
        raise LightledgerError(f"--until {until}: not a stage; stages are {', '.join(STAGE_ORDER)}")
    force_from = check_force(list(force or ()), until)
    if workers < 1:
        raise LightledgerError("--workers must be at least 1")
    # the validation pass: every problem of the visit at once, before any stage runs
    report = check_visit(visit_path, settings, until=until, progress=_check_progress(progress))
    for problem in report.warnings:
        if warn is not None:
            warn(problem.line)
    report.raise_errors()
    settings = parse_settings(settings)
    settings_text = settings_to_text(settings)
    visit = visit_config(visit_path, settings_text)
    plan = register_plan(make_plan(visit, settings_text, report.usable, inventory=report.refs))
    give_back()      # the validation pass read every exposure: return its buffers before the stages
    run_id = uuid.uuid4().hex
    notebook = Path(visit.notebook)
    notebook.mkdir(parents=True, exist_ok=True)
    sweep(notebook)
    notes, repairs = [], []
    stages = STAGE_ORDER[:STAGE_ORDER.index(until) + 1]
    for k, stage in enumerate(stages):
        # a stage whose entry is broken or gone, below a complete one, is made again in place
        # (same identity, same bytes); Luigi would not look below the complete stage
        entry = plan.folder(stage) / ENTRY_NAME
        if not plan.folder(stage).is_dir() or read_entry(entry, stage) is not None:
            continue
        later = [s for s in stages[k + 1:] if read_entry(plan.folder(s) / ENTRY_NAME, s) is not None]
        if entry.exists():
            notes.append(f"{entry}: not a valid notebook entry; the {stage} stage is made again")
        elif later:
            notes.append(f"{entry}: missing; the {stage} stage is made again")
        if later:
            repairs.append(stage_task(stage, plan, run_id=run_id))
    task = stage_task(until, plan, force_from=force_from, force_after=started if force_from else 0.0,
                      run_id=run_id)
    failures = notebook / ".failures" / run_id

    PROGRESS["callback"] = progress
    PROCESSES["count"] = workers        # a stage's own independent fits (the detrend grid)
    logging.getLogger("luigi-interface").setLevel(logging.CRITICAL)
    kwargs = dict(workers=workers, detailed_summary=True, log_level="CRITICAL")
    if scheduler:
        # Stay alive while other machines' workers run tasks this build needs, so that every
        # reducer sharing the scheduler finishes with the complete chain.
        config = luigi.configuration.get_config()
        config.set("worker", "keep_alive", "true")
        config.set("worker", "wait_interval", "1.0")
        kwargs.update(scheduler_host=scheduler[0], scheduler_port=scheduler[1])
    else:
        kwargs.update(local_scheduler=True)
    if workers > 1 and not task.complete():
        preload(visit)
    try:
        summary = luigi.build([*repairs, task], **kwargs)
        ran = _ran_families(summary)
        # With a central scheduler another machine may still be running tasks this chain
        # needs when this worker runs out of work: wait for them, building again until the
        # chain completes (a dead worker's tasks return to pending and are taken here).
        deadline = time.monotonic() + 12 * 3600
        while scheduler and not task.complete() and others_running(summary) \
                and not (failures.exists() and any(failures.iterdir())) \
                and time.monotonic() < deadline:
            time.sleep(2.0)
            summary = luigi.build([task], **kwargs)
            ran += _ran_families(summary)
    finally:
        PROGRESS.pop("callback", None)
        PROCESSES["count"] = 1

    messages, statuses = [], []
    if failures.exists():
        for file in sorted(failures.glob("*.txt")):
            text = file.read_text(encoding="utf-8").rstrip()
            status, _, rest = text.partition("\n")
            if status.isdigit():               # "STATUS\nTEXT" (VisitTask.on_failure)
                text = rest
                statuses.append(int(status))
            else:
                statuses.append(2 if text.startswith("lightledger: error:") else 1)
            if text not in messages:       # chunks that fail alike say so once
                messages.append(text)
        shutil.rmtree(failures, ignore_errors=True)
    ok = task.complete() and all(t.complete() for t in repairs)
    if not ok and not messages:
        messages.append(f"lightledger: error: the reduction did not complete ({summary.status})")

    from .notebook import note_last_used, write_page
    if ok:
        note_last_used(notebook, "visit", [plan.folder(s) for s in stages])
    page = write_page(notebook)
    final = task.final_product() if ok else None
    status = 0 if ok else exit_status(statuses)
    lines = headlines([plan.folder(s) / ENTRY_NAME for s in stages]) if ok else []
    return RunResult(ok=ok, final=final, page=page, ran=sorted(ran), messages=messages,
                     warnings=[p.line for p in report.warnings],
                     flags=_entry_warnings(plan, until),
                     set_aside=[f"{r.label}: {r.reason}" for r in report.set_aside], status=status,
                     notes=notes, headlines=lines)


#: Words that mark a headline figure among an entry's metrics.
_HEADLINE_WORDS = ("depth", "rms / expected", "flag", "outlier", "exposures", "channels")


def headlines(entry_paths):
    """One line per stage entry with its headline figures (depths, rms over expected, flags)."""
    lines = []
    for path in entry_paths:
        entry = read_entry(path)
        if entry is None or not isinstance(entry.get("metrics"), dict):
            continue
        shown = [f"{name} {_headline_value(value)}" for name, value in entry["metrics"].items()
                 if any(word in str(name) for word in _HEADLINE_WORDS) and value is not None]
        if shown:
            lines.append(f"{entry['stage']:>9}: " + ", ".join(shown))
    return lines


def _headline_value(value):
    if isinstance(value, float):
        return f"{value:.6g}"
    if isinstance(value, list):
        return "[" + ", ".join(_headline_value(v) for v in value) + "]"
    return str(value)


def _entry_warnings(plan, until):
    """``lightledger: warning: ...`` lines the chain's entries hold (results not to be trusted)."""
    import json

    lines = []
    for stage in STAGE_ORDER[:STAGE_ORDER.index(until) + 1]:
        entry = plan.folder(stage) / "entry.json"
        try:
            found = json.loads(entry.read_text(encoding="utf-8")).get("warnings", [])
        except (OSError, ValueError):
            continue
        lines += [f"lightledger: warning: {w}" for w in found]
    return lines


def exit_status(statuses):
    """Exit status of a failed run: 1 if a task met a bug, else 2 for the user's input, 3 if
    only the machine failed (disk full, file-size limit, permission denied)."""
    if not statuses or 1 in statuses:
        return 1
    return 3 if all(s == 3 for s in statuses) else 2


def _check_progress(progress):
    if progress is None:
        return None
    return lambda done, total: progress("check", "exposures read", done, total)


def preload(visit):
    """Load here what the tasks import on first use, before Luigi forks a process per task.

    A forked worker inherits every loaded module; a module first imported inside a task would
    be imported again in every task's process (about a second each for matplotlib or
    astropy.nddata), which made two workers slower than one.
    """
    import importlib

    names = ["lightledger.tasks.figures", "astropy.nddata.bitmask", "scipy.ndimage",
             "scipy.interpolate", "erfa"]
    if visit.stages["calibrate"]["background_method"] == "2d":
        names += ["astropy.stats", "photutils.background", "photutils.segmentation"]
    for name in names:
        importlib.import_module(name)


def others_running(summary):
    """True when the build left tasks to workers of other processes or machines."""
    from luigi.execution_summary import _summary_dict

    sets = _summary_dict(summary.worker)
    return bool(sets["run_by_other_worker"] or sets["upstream_run_by_other_worker"]
                or sets["still_pending_ext"] or sets["still_pending_not_ext"])


def ran_tasks(summary):
    """The tasks that this build ran.

    Not those found complete, nor those another reducer made while this one
    waited for the product's lock (their made-record names another run).
    """
    from luigi.execution_summary import _partition_tasks

    return [task for task in _partition_tasks(summary.worker)["completed"]
            if not isinstance(task, FolderTask) or task.made_by_this_run()]


def _ran_families(summary):
    """Families of the tasks that this build ran, sorted (see :func:`ran_tasks`)."""
    return sorted(task.task_family for task in ran_tasks(summary))


# the names these had before they were shared with tasks/programme.py
_check_force, _status, _others_running, _preload = check_force, exit_status, others_running, preload
