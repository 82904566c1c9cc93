"""Programmes of visits: one planet, several visits, one joint fit.

A programme description (TOML) lists visit descriptions and the planet they
share::

    [programme]
    name = "..."
    visits = ["visit-a/visit.toml", "visit-b/visit.toml"]
    notebook = "notebook"        # optional, beside the programme file

    [planet]
    t0 = ...  period = ...  rp_rs = ...  a_rs = ...  inclination = ...
    u1 = ...  u2 = ...  eccentricity = ...  omega = ...     # optional

    [stages.joint]               # optional, see `lightledger params`
    phase_bins = [0.0, 0.25, 0.5, 0.75, 1.0]

``lightledger reduce PROGRAMME.toml`` runs every visit's calibrate, extract
and bin stages as for a single visit (each in its visit's own notebook; one
Luigi build, so chunks of every visit run in parallel across workers and
machines) and then :class:`JointDetrend`: each visit's own systematics
(chosen by its ``[stages.detrend]``), one planet per channel fitted jointly
(:func:`lightledger.pipeline.programme.fit_programme`), and each visit fitted
alone for comparison.  The joint entry lives in the programme's notebook as
``joint-IDENT/``, where IDENT hashes the joint stage's version and
parameters, the planet, and every visit's ``bin`` identity and systematics
choices: a tweak to one visit re-runs that visit's later stages and the joint
fit, nothing else.  The programme page (``programme.html``) links every
visit's page and shows the joint fit beside each visit's own.
"""

import json
import logging
import os
import shutil
import time
from dataclasses import dataclass, field
from pathlib import Path

import luigi

from lightledger.pipeline.errors import LightledgerError
from lightledger.pipeline.parameters import STAGE_ORDER

from .base import PROGRESS, read_entry, settings_to_text, visit_config
from .joint import JointDetrend, joint_members
from .programmefile import (PROGRAMME_SCHEMA, Programme, is_programme, joint_dir, joint_facts,
                            joint_identity, joint_params, load_programme, split_settings)
from .programmepage import write_programme_page

__all__ = ["PROGRAMME_SCHEMA", "Programme", "load_programme", "is_programme", "JointDetrend",
           "ProgrammeResult", "reduce_programme", "joint_dir", "joint_identity", "joint_facts",
           "joint_params", "joint_members", "write_programme_page"]


# --------------------------------------------------------------------------
# Running a programme
# --------------------------------------------------------------------------

@dataclass
class ProgrammeResult:
    """What a programme's reduction did (the fields of a visit's RunResult, and the tasks)."""

    ok: bool
    final: Path | None
    page: Path | None
    ran: list = field(default_factory=list)        # task families that ran
    ran_tasks: list = field(default_factory=list)  # (family, visit or programme file)
    messages: list = field(default_factory=list)
    warnings: list = field(default_factory=list)
    set_aside: list = field(default_factory=list)
    status: int = 0
    flags: list = field(default_factory=list)      # lines: results that cannot be trusted
    notes: list = field(default_factory=list)
    headlines: list = field(default_factory=list)  # headline figures of the joint entry


def reduce_programme(path, *, settings=(), workers=1, until=None, force=(), progress=None,
                     scheduler=None, warn=None):
    """Reduce every visit of a programme and fit them jointly.

    Parameters
    ----------
    path : str or Path
        Programme description.
    settings : list of (stage, key, value) or of "STAGE.KEY=VALUE" texts
        ``--set`` overrides: ``joint.*`` for the joint stage, the others for
        every visit.
    workers : int
        Luigi workers.
    until : str, optional
        ``calibrate``, ``extract`` or ``bin`` to stop every visit there
        (``detrend`` or None: the joint fit).
    force : list of str
        Stages to make again in every visit (the joint fit is then made again
        too).
    progress : callable, optional
        ``progress(stage, what, done, total)``.
    scheduler : (host, port), optional
        A central ``luigid`` scheduler.
    warn : callable, optional
        ``warn(line)`` for each warning of the visits' validation passes.

    Returns
    -------
    ProgrammeResult

    Raises
    ------
    LightledgerError
        The programme description's problems, or every problem of the first
        visit that has any (:func:`lightledger.tasks.check.check_visit`),
        before any task runs.
    """
    import uuid

    from .base import make_plan, register_plan
    from .check import check_visit, parse_settings
    from .notebook import note_last_used, note_programme, write_page
    from .run import (check_force, exit_status, headlines, others_running, preload, ran_tasks,
                      stage_task, sweep)

    started = time.time()
    settings = parse_settings(settings)
    settings_text = settings_to_text(settings)
    prog = load_programme(path, settings)
    _, visit_text = split_settings(settings_text)
    visit_settings = [s for s in settings if s[0] != "joint"]
    until = until or STAGE_ORDER[-1]
    if until not in STAGE_ORDER:
        raise LightledgerError(f"--until {until}: not a stage; stages are {', '.join(STAGE_ORDER)}")
    last = "bin" if until == "detrend" else until
    force_from = check_force(list(force or ()), until, extra=("joint",))
    if force_from == "joint" and until != "detrend":
        raise LightledgerError(f"--force joint with --until {until}: the run stops before the "
                               "joint fit, so it cannot make it again")
    if workers < 1:
        raise LightledgerError("--workers must be at least 1")
    plans, warnings_, set_aside = [], [], []
    for file in prog.visits:
        # each visit's validation pass up to bin: the joint fit replaces its detrend stage
        report = check_visit(file, visit_settings, until="bin",
                             progress=None if progress is None else
                             lambda d, t: progress("check", "exposures read", d, t))
        for problem in report.warnings:
            warnings_.append(problem.line)
            if warn is not None:
                warn(problem.line)
        report.raise_errors()
        visit = visit_config(file, visit_text)
        plans.append(register_plan(make_plan(visit, visit_text, report.usable,
                                             inventory=report.refs)))
        set_aside += [f"{r.label}: {r.reason}" for r in report.set_aside]
    run_id = uuid.uuid4().hex
    for plan in plans:
        Path(plan.visit.notebook).mkdir(parents=True, exist_ok=True)
        sweep(plan.visit.notebook)
    prog.notebook.mkdir(parents=True, exist_ok=True)
    sweep(prog.notebook)
    force_after = started if force_from else 0.0
    if until == "detrend":
        # the old folder of a forced joint stage is moved aside by the task, under its lock
        task = JointDetrend(programme=str(prog.path), settings=settings_text,
                            chains=json.dumps([p.chain("bin") for p in plans]),
                            force_from=force_from, force_after=force_after, run_id=run_id)
        for plan in plans:      # so that pruning a visit's notebook keeps what the fit reads
            note_programme(plan.visit.notebook, prog.notebook)
        tasks = [task]
    else:
        visit_force = force_from if force_from in STAGE_ORDER else ""
        tasks = [stage_task(last, p, force_from=visit_force,
                            force_after=force_after if visit_force else 0.0,
                            run_id=run_id) for p in plans]
    failure_dirs = [Path(p.visit.notebook) / ".failures" / run_id for p in plans] \
        + [prog.notebook / ".failures" / run_id]
    PROGRESS["callback"] = progress
    logging.getLogger("luigi-interface").setLevel(logging.CRITICAL)
    kwargs = dict(workers=workers, detailed_summary=True, log_level="CRITICAL")
    if scheduler:
        config = luigi.configuration.get_config()
        config.set("worker", "keep_alive", "true")
        config.set("worker", "wait_interval", "1.0")
        kwargs.update(scheduler_host=scheduler[0], scheduler_port=scheduler[1])
    else:
        kwargs.update(local_scheduler=True)
    if workers > 1 and not all(t.complete() for t in tasks):
        preload(plans[0].visit)
    try:
        summary = luigi.build(tasks, **kwargs)
        done = ran_tasks(summary)
        # with a central scheduler, wait for other machines' workers still making what the
        # programme needs (as a visit's reduction does)
        deadline = time.monotonic() + 12 * 3600
        while scheduler and not all(t.complete() for t in tasks) and others_running(summary) \
                and not any(f.exists() and any(f.iterdir()) for f in failure_dirs) \
                and time.monotonic() < deadline:
            time.sleep(2.0)
            summary = luigi.build(tasks, **kwargs)
            done += ran_tasks(summary)
    finally:
        PROGRESS.pop("callback", None)
    ran_list = sorted((t.task_family, str(getattr(t, "visit", getattr(t, "programme", ""))))
                      for t in done)
    messages, statuses = [], []
    for folder in failure_dirs:
        if not folder.exists():
            continue
        for file in sorted(folder.glob("*.txt")):
            text = file.read_text(encoding="utf-8").rstrip()
            status, _, rest = text.partition("\n")
            if status.isdigit():
                text = rest
                statuses.append(int(status))
            else:
                statuses.append(2 if text.startswith("lightledger: error:") else 1)
            if text not in messages:
                messages.append(text)
        shutil.rmtree(folder, ignore_errors=True)
    ok = all(t.complete() for t in tasks)
    if not ok and not messages:
        messages.append(f"lightledger: error: the reduction did not complete ({summary.status})")
    for plan in plans:
        if ok:
            stages_run = STAGE_ORDER[:STAGE_ORDER.index(last) + 1]
            note_last_used(plan.visit.notebook,
                           os.path.relpath(prog.notebook.resolve(),
                                           Path(plan.visit.notebook).resolve()),
                           [plan.folder(s) for s in stages_run])
        write_page(plan.visit.notebook)
    page = final = None
    entries = []
    if until == "detrend":
        if ok:
            note_last_used(prog.notebook, "programme", [tasks[0].folder])
        write_page(prog.notebook)
        page = write_programme_page(prog, tasks[0].folder)
        final = tasks[0].final_product() if ok else None
        entries = [tasks[0].output().path]
    elif ok:
        final = tasks[-1].final_product()
    flags = []
    for path in entries:
        entry = read_entry(path) or {}
        flags += [f"lightledger: warning: {w}" for w in entry.get("warnings", [])]
    return ProgrammeResult(ok=ok, final=final, page=page, ran=sorted(f for f, _ in ran_list),
                           ran_tasks=ran_list, messages=messages, warnings=warnings_,
                           set_aside=set_aside, status=0 if ok else exit_status(statuses),
                           flags=flags, headlines=headlines(entries) if ok else [])
