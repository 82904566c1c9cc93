"""Running the chain of stages for one visit through Luigi."""

import logging
import shutil
import time
from dataclasses import dataclass, field
from datetime import datetime, timezone
from pathlib import Path

import luigi

from lightledger.pipeline.errors import LightledgerError
from lightledger.pipeline.parameters import STAGE_ORDER

from . import figures  # noqa: F401  (matplotlib loads once here, not in every worker)
from .base import PROGRESS, digest_cache, raw_identity, settings_to_text, stage_dir, visit_config
from .rawio import inventory

__all__ = ["RunResult", "reduce_visit", "stage_task"]


@dataclass
class RunResult:
    """What a reduction did."""

    ok: bool
    final: Path | None
    page: Path | None
    ran: list = field(default_factory=list)      # task families that ran, in no order
    messages: list = field(default_factory=list)  # one line per failure


def stage_task(stage, visit, settings_text):
    """The Luigi task that completes ``stage`` for a visit."""
    from . import stages

    cls = {"calibrate": stages.Calibrate, "extract": stages.Extract, "bin": stages.Bin,
           "detrend": stages.Detrend}[stage]
    return cls(visit=str(visit), settings=settings_text)


def _supersede(visit, stages_to_force):
    """Move the folders of forced stages (and everything after) aside, kept for comparison."""
    if not stages_to_force:
        return
    first = min(STAGE_ORDER.index(s) for s in stages_to_force)
    stamp = datetime.now(timezone.utc).strftime("%Y%m%dT%H%M%S")
    for stage in STAGE_ORDER[first:]:
        folder = stage_dir(visit, stage)
        if folder.exists():
            folder.rename(folder.with_name(f"{folder.name}.superseded-{stamp}"))


def reduce_visit(visit_path, *, settings=(), workers=1, until=None, force=(), progress=None,
                 scheduler=None):
    """Reduce a visit up to ``until`` (default: every stage).

    Parameters
    ----------
    visit_path : str or Path
        Visit description.
    settings : list of (stage, key, value)
        Overrides from ``--set``.
    workers : int
        Luigi workers.
    until : str, optional
        Last stage to run.
    force : list of str
        Stages to run again although complete.
    progress : callable, optional
        ``progress(stage, what, done, total)``.
    scheduler : (host, port), optional
        A central ``luigid`` scheduler; default the local scheduler.

    Returns
    -------
    RunResult

    Raises
    ------
    LightledgerError
        When the visit description, its profile or the raw files are unusable
        (found before any task runs).
    """
    settings_text = settings_to_text(settings)
    visit = visit_config(visit_path, settings_text)
    refs = inventory(visit.raw, visit.profile)   # fails early, with one line, on bad raw files
    if not refs:
        raise LightledgerError(f"{visit.raw}: the visit holds no exposures")
    if workers < 1:
        raise LightledgerError("--workers must be at least 1")
    raw_identity(visit)                     # hashes new or changed files once, then remembers
    digest_cache(visit.notebook).save()
    _supersede(visit, force)
    until = until or STAGE_ORDER[-1]
    task = stage_task(until, visit.path, settings_text)
    failures = Path(visit.notebook) / ".failures"
    if failures.exists():
        shutil.rmtree(failures)

    PROGRESS["callback"] = progress
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
    try:
        summary = luigi.build([task], **kwargs)
        ran = _ran_families(summary)
        # With a central scheduler another machine may still be running tasks this chain
        # needs when this worker runs out of work: wait for them, building again until the
        # chain completes (a dead worker's tasks return to pending and are taken here).
        deadline = time.monotonic() + 12 * 3600
        while scheduler and not task.complete() and _others_running(summary) \
                and not (failures.exists() and any(failures.iterdir())) \
                and time.monotonic() < deadline:
            time.sleep(2.0)
            summary = luigi.build([task], **kwargs)
            ran += _ran_families(summary)
    finally:
        PROGRESS.pop("callback", None)

    messages = []
    if failures.exists():
        for file in sorted(failures.glob("*.txt")):
            text = file.read_text().rstrip()
            if text not in messages:       # chunks that fail alike say so once
                messages.append(text)
    ok = task.complete()
    if not ok and not messages:
        messages.append(f"lightledger: error: the reduction did not complete ({summary.status})")

    from .notebook import write_page
    page = write_page(visit.notebook)
    final = task.final_product() if ok else None
    return RunResult(ok=ok, final=final, page=page, ran=sorted(ran), messages=messages)


def _others_running(summary):
    """True when the build left tasks to workers of other processes or machines."""
    from luigi.execution_summary import _summary_dict

    sets = _summary_dict(summary.worker)
    return bool(sets["run_by_other_worker"] or sets["upstream_run_by_other_worker"]
                or sets["still_pending_ext"] or sets["still_pending_not_ext"])


def _ran_families(summary):
    """Families of the tasks that this build ran (not those found complete), sorted."""
    from luigi.execution_summary import _partition_tasks

    return sorted(task.task_family for task in _partition_tasks(summary.worker)["completed"])
