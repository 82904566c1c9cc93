"""What every lightledger task shares: the visit, identities, the run plan, entries.

Products are named by what made them.  Each stage writes into
``NOTEBOOK/STAGE-IDENT/`` where ``IDENT`` is the first 10 hex digits of a
SHA-256 over

* the stage's name and code version (``pipeline.parameters.STAGES``),
* the stage's parameters after defaults and overrides,
* the visit facts the stage uses (target coordinates for ``bin``, the event
  for ``detrend``, the stellar temperature for ``extract``), and
* the identity of the stage it reads from; the first stage reads the raw
  visit, whose identity is the **content** of the raw files (with their
  names), of the reference files and of the instrument profile's settings,
  and the source position (:func:`raw_identity`).

Changing a parameter of one stage therefore changes the folder of that stage
and of every stage after it, and nothing before it; earlier folders stay in
place for comparison.  Copying, moving or touching a visit keeps every
identity; changing one byte of a raw or reference file changes them all.

Bookkeeping is done once per run: :func:`make_plan` hashes the raw and
reference files (remembering digests across runs, see :mod:`.digests`),
computes every stage identity and keeps the inventory of exposures, and the
tasks receive the identities as the Luigi parameter ``chain`` (so a task
built from its parameters anywhere, another machine's worker included,
knows its folder without looking at the raw files).  ``complete()`` is one
file test; a chunk reads only its own inputs.

A folder is complete when its ``entry.json`` exists and is valid: it is
written last, after every product of the entry.  Every task makes its output
while holding a lock on it (:mod:`.locks`), so that two reducers of one visit
never make the same product twice.

This module holds :class:`VisitTask`; the rest lives in one module per idea
and is re-exported here: identities (:mod:`.identities`), the run plan, the
visit's settings and chunks (:mod:`.runplan`), entries and made-records
(:mod:`.entries`), and folder-making tasks under locks (:mod:`.foldertask`).
"""

import getpass
import socket
import time
from datetime import datetime, timezone
from pathlib import Path

import luigi

from lightledger.pipeline import __version__
from lightledger.pipeline.errors import LightledgerError
from lightledger.pipeline.parameters import STAGE_ORDER, STAGES

# The pieces every task shares, one idea per module, re-exported here so that
# ``from lightledger.tasks.base import NAME`` keeps working for each of them.
from .entries import (ENTRY_NAME, MADE_SUFFIX, _entry_outputs, _stat_key,  # noqa: F401
                      made_record_path, product_digest, read_entry, read_made_record)
from .foldertask import (PROGRESS, FolderTask, _claim, _guarded, _record,  # noqa: F401
                         guarded, remove_parts, supersede)
from .identities import (_DIGESTS, _MEMORY, _hash, _stage_facts, content_identity,  # noqa: F401
                         digest_cache, file_digest, profile_content, raw_files, raw_identity,
                         raw_identity_from_record, raw_identity_of, stage_dir, stage_facts,
                         stage_hash, stage_identity, stage_params)
from .products import Provenance, relative_input, write_json
from .runplan import (AUTO_CHUNK, RunPlan, _find_plan, _inventory_cached,  # noqa: F401
                      _inventory_refs, _PLANS, _stamp, _visit_cached, chunk_length, chunk_ranges,
                      make_plan, register_plan, settings_from_text, settings_to_text,
                      visit_config)

__all__ = ["FolderTask", "VisitTask", "guarded", "supersede", "remove_parts", "RunPlan",
           "make_plan", "register_plan", "visit_config", "raw_identity", "stage_identity",
           "stage_dir", "stage_hash", "content_identity", "stage_params", "user_name",
           "chunk_ranges", "chunk_length", "AUTO_CHUNK", "read_entry", "ENTRY_NAME",
           "settings_to_text", "settings_from_text", "product_digest"]


# ---------------------------------------------------------------------------
# the task base
# ---------------------------------------------------------------------------

class VisitTask(FolderTask, luigi.Task):
    """Base of every stage task: a visit description, command-line settings, identities.

    Subclasses define ``stage``, ``requires()``, ``output()`` (one file of the
    stage folder) and ``run()``.  Every ``run()`` is wrapped: it checks that the
    visit still has the identities it was scheduled with, moves a forced
    stage's old folder aside, takes the folder's and the output's locks, and
    returns at once when another reducer made the output meanwhile; after a
    successful run it writes the output's made-record (who, when, how long,
    its SHA-256).
    """

    visit = luigi.Parameter(description="path of the visit description (TOML)")
    settings = luigi.Parameter(default="[]",
                               description="JSON list of [stage, key, value] overrides (--set)")
    chain = luigi.Parameter(default="",
                            description="identities of the raw visit and of every stage up to this "
                                        "one, colon-separated (computed once per run); empty: "
                                        "computed from the files")
    force_from = luigi.Parameter(default="",
                                 description="first forced stage (--force), or empty")
    force_after = luigi.FloatParameter(default=0.0,
                                       description="a forced stage is made again unless its entry "
                                                   "is newer than this time (seconds since 1970)")
    run_id = luigi.Parameter(default="", significant=False,
                             description="identifier of the reduction that scheduled this task")

    #: Stage this task belongs to; set by subclasses.
    stage = None

    # -- the plan ---------------------------------------------------------------
    @property
    def plan(self):
        """The run's plan when this process has it (None otherwise)."""
        if "_plan" not in self.__dict__:
            plan = None
            if self.chain:
                plan = _find_plan(self.visit, self.settings, self.chain.split(":")[0])
            else:
                plan = register_plan(make_plan(visit_config(self.visit, self.settings), self.settings))
            self.__dict__["_plan"] = plan
        return self.__dict__["_plan"]

    @property
    def identities(self):
        """[raw identity, calibrate identity, ...] up to this task's stage."""
        if "_ids" not in self.__dict__:
            if self.chain:
                ids = self.chain.split(":")
            else:
                ids = self.plan.chain(self.stage).split(":")
            if len(ids) < STAGE_ORDER.index(self.stage) + 2:
                raise LightledgerError(f"{self.task_id}: the chain parameter is too short for "
                                       f"the {self.stage} stage")
            self.__dict__["_ids"] = ids
        return self.__dict__["_ids"]

    @property
    def config(self):
        plan = self.plan
        if plan is not None:
            return plan.visit
        return visit_config(self.visit, self.settings)

    @property
    def params(self):
        return self.config.stages[self.stage]

    def stage_folder(self, stage):
        """Folder of ``stage`` (this one or an earlier one) in this task's chain."""
        index = STAGE_ORDER.index(stage)
        return Path(self.config.notebook) / f"{stage}-{self.identities[index + 1][:10]}"

    @property
    def folder(self):
        return self.stage_folder(self.stage)

    @property
    def identity(self):
        return self.identities[STAGE_ORDER.index(self.stage) + 1][:10]

    def check_identity(self):
        """Raise when the visit description no longer gives this task's identity."""
        if self.plan is not None:
            return
        index = STAGE_ORDER.index(self.stage)
        ids = self.identities
        if stage_hash(self.config, self.stage, ids[index]) != ids[index + 1]:
            raise LightledgerError(f"{self.visit}: the visit description changed while the "
                                   f"{self.stage} stage was scheduled; run lightledger reduce again")

    def stage_task(self, cls, **extra):
        """Another task of the same visit, settings and run."""
        index = STAGE_ORDER.index(cls.stage)
        forced = bool(self.force_from) and index >= STAGE_ORDER.index(self.force_from)
        return cls(visit=self.visit, settings=self.settings,
                   chain=":".join(self.identities[:index + 2]),
                   force_from=self.force_from if forced else "",
                   force_after=self.force_after if forced else 0.0,
                   run_id=self.run_id, **extra)

    # -- the inventory and chunks ----------------------------------------------
    def exposures(self):
        """The exposures to reduce (rawio.ExposureRef) in start-time order.

        Set-aside exposures are not among them; they keep their rows in the
        inventory product (:meth:`RunPlan.inventory`, the Inventory task).
        """
        plan = self.plan
        if plan is not None and plan.refs is not None:
            return plan.refs
        return _inventory_refs(self.stage_folder("calibrate") / "inventory.ecsv", self.config.raw)

    def chunk_count(self):
        """Number of chunks of ``calibrate.chunk_size`` exposures."""
        return len(chunk_ranges(len(self.exposures()), self.config.stages["calibrate"]["chunk_size"]))

    def chunk_span(self, chunk):
        """(start, stop) exposure numbers of a chunk."""
        return chunk_ranges(len(self.exposures()), self.config.stages["calibrate"]["chunk_size"])[chunk]

    def chunk_exposures(self, chunk):
        """The exposures of one chunk."""
        start, stop = self.chunk_span(chunk)
        return self.exposures()[start:stop]

    def calibrated_chunks(self):
        """Paths of the calibrated frames of every chunk (``frames-NNN.fits``)."""
        folder = self.stage_folder("calibrate")
        return [folder / f"frames-{k:03d}.fits" for k in range(self.chunk_count())]

    # -- digests ----------------------------------------------------------------
    def input_digest(self, path):
        """SHA-256 of an input: a raw or reference file from the plan, a product as recorded."""
        path = Path(path)
        plan = self.plan
        if plan is not None:
            value = plan.digests.get(str(path))
            if value:
                return value
        try:
            inside = path.resolve().is_relative_to(Path(self.config.notebook).resolve())
        except OSError:
            inside = False
        if inside:
            return product_digest(path)
        return file_digest(path, self.config.notebook)

    def provenance(self, inputs):
        """Provenance for a product of this task; ``inputs`` is a list of paths."""
        digests = {relative_input(p, self.folder): self.input_digest(p) for p in inputs}
        return Provenance(self.stage, STAGES[self.stage].version, self.identity, self.params,
                          digests, visit=self.config.name)

    # -- completion -------------------------------------------------------------
    @property
    def forced(self):
        return bool(self.force_from) and \
            STAGE_ORDER.index(self.stage) >= STAGE_ORDER.index(self.force_from)

    # -- progress, failure, entry -------------------------------------------------
    def task_seconds(self, paths):
        """Seconds the tasks that made ``paths`` ran (from their made-records)."""
        return float(sum(read_made_record(p).get("seconds", 0.0) for p in paths))

    def _failure_context(self):
        chunk = getattr(self, "chunk", None)
        where = f"{self.stage} stage" + (f", chunk {chunk}" if chunk is not None else "")
        try:
            return f"{self.config.path} ({where})"
        except Exception:
            return f"{self.visit} ({where})"

    def write_entry(self, path, inputs, outputs, metrics, figures, started, *, extra_seconds=0.0,
                    warnings=(), not_applying=None):
        """Write the stage's entry.json (the completion marker), atomically.

        ``seconds`` is this task's own time since ``started`` plus ``extra_seconds``
        spent in the stage's other tasks (its chunks).  ``warnings`` are one-line
        strings about results that cannot be trusted (shown on the page and the
        console); ``not_applying`` maps parameters that do not apply to this
        visit to the reason (the page greys them).
        """
        index = STAGE_ORDER.index(self.stage)
        ids = self.identities
        visit = self.config
        entry = {
            "stage": self.stage,
            "identity": self.identity,
            "identity_hash": ids[index + 1],
            "upstream": ids[index],
            "folder": Path(self.folder).name,
            "visit": visit.name,
            "visit_file": str(visit.path),
            "target": visit.target.get("name") or "",
            "event": visit.event.get("kind", ""),
            "created": datetime.now(timezone.utc).isoformat(timespec="seconds"),
            "user": _user(),
            "host": socket.gethostname(),
            "run": self.run_id,
            "software_version": __version__,
            "stage_version": STAGES[self.stage].version,
            "seconds": round(time.time() - started + extra_seconds, 2),
            "params": {k: list(v) if isinstance(v, tuple) else v for k, v in self.params.items()},
            "facts": stage_facts(visit, self.stage),
            "overrides": visit.overrides.get(self.stage, {}),
            "made_from": (self.stage_folder(STAGE_ORDER[index - 1]).name if index else "raw"),
            "inputs": {relative_input(p, self.folder): self.input_digest(p) for p in inputs},
            "outputs": {Path(p).name: product_digest(p) for p in [*outputs, *figures]},
            "metrics": metrics,
            "not_applying": {str(k): str(v) for k, v in (not_applying or {}).items()},
            "figures": [Path(f).name for f in figures],
            "warnings": [str(w) for w in warnings],
        }
        if index == 0:
            entry["raw"] = self._raw_record()
        write_json(path, entry)

    def _raw_record(self):
        """What the raw identity was computed from (so that audit can recompute it)."""
        plan = self.plan
        visit = self.config
        if plan is not None:
            raw, references = plan.raw, plan.references
        else:
            raw = [(p.name, file_digest(p, visit.notebook)) for p in raw_files(visit)]
            references = {r: file_digest(f, visit.notebook) for r, f in visit.profile.files.items()
                          if f is not None}
        return {"files": dict(sorted(raw)), "references": dict(sorted(references.items())),
                "profile": profile_content(visit.profile),
                "source": [visit.target["source_x"], visit.target["source_y"]]}


def user_name():
    """The user's login name, or "unknown"."""
    try:
        return getpass.getuser()
    except Exception:
        return "unknown"


_user = user_name

