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
"""

import getpass
import hashlib
import inspect
import json
import os
import socket
import time
from contextlib import contextmanager
from dataclasses import dataclass
from datetime import datetime, timezone
from functools import lru_cache
from pathlib import Path

import luigi

from lightledger.pipeline import __version__
from lightledger.pipeline.errors import LightledgerError
from lightledger.pipeline.parameters import STAGE_ORDER, STAGES

from . import locks
from .config import load_visit
from .digests import CACHE_NAME, DigestCache, sha256_of
from .products import Provenance, known_digest, part_pattern, relative_input, write_json

__all__ = ["FolderTask", "VisitTask", "guarded", "supersede", "remove_parts", "RunPlan",
           "make_plan", "register_plan", "visit_config", "raw_identity", "stage_identity",
           "stage_dir", "stage_hash", "content_identity", "stage_params", "user_name",
           "chunk_ranges", "chunk_length", "AUTO_CHUNK", "read_entry", "ENTRY_NAME",
           "settings_to_text", "settings_from_text", "product_digest"]

ENTRY_NAME = "entry.json"
#: Suffix of the hidden record a task writes beside its output once made.
MADE_SUFFIX = ".made"


def settings_to_text(settings):
    """Canonical text of a list of (stage, key, value) overrides (a Luigi parameter)."""
    return json.dumps([list(s) for s in sorted(settings or [], key=lambda s: (s[0], s[1]))])


def settings_from_text(text):
    return [tuple(s) for s in json.loads(text or "[]")]


@lru_cache(maxsize=32)
def _visit_cached(path, settings_text, stamp):
    return load_visit(path, settings_from_text(settings_text))


def _stamp(path):
    st = Path(path).stat()
    return (st.st_mtime_ns, st.st_size, st.st_ino)


def visit_config(path, settings_text="[]"):
    """The validated visit description, cached while the file is unchanged."""
    if not Path(path).is_file():
        return load_visit(path, settings_from_text(settings_text))   # raises its one-line error
    return _visit_cached(str(Path(path).resolve()), settings_text, _stamp(path))


#: Least and most exposures of an automatic chunk (``calibrate.chunk_size = 0``).
AUTO_CHUNK = (16, 64)


def chunk_length(n_exposures, chunk_size):
    """Exposures per chunk: ``chunk_size``, or for 0 a quarter of the visit within :data:`AUTO_CHUNK`.

    A quarter keeps two workers busy on a short visit; the upper bound keeps a
    chunk's memory (its raw reads and calibrated frames) the same for every
    longer visit, and the lower bound keeps a task long against the
    scheduler's and the products' fixed cost per task.
    """
    if chunk_size:
        return int(chunk_size)
    lo, hi = AUTO_CHUNK
    return int(min(hi, max(lo, -(-n_exposures // 4))))


def chunk_ranges(n_exposures, chunk_size):
    """(start, stop) exposure ranges of each chunk (``chunk_size`` 0 = automatic)."""
    size = chunk_length(n_exposures, chunk_size)
    return [(i, min(i + size, n_exposures)) for i in range(0, n_exposures, size)]


# ---------------------------------------------------------------------------
# identities
# ---------------------------------------------------------------------------

#: Digest records of notebooks known to this process.
_DIGESTS = {}


def digest_cache(notebook):
    """The process's :class:`~.digests.DigestCache` of a notebook folder."""
    key = str(Path(notebook).resolve())
    if key not in _DIGESTS:
        _DIGESTS[key] = DigestCache(Path(key) / CACHE_NAME)
    return _DIGESTS[key]


def file_digest(path, notebook=None):
    """SHA-256 of an input file, hashed again only when its size, times or inode changed."""
    cache = digest_cache(notebook) if notebook is not None else _MEMORY
    return cache.digest(path)


_MEMORY = DigestCache(None)


def _hash(*parts):
    text = json.dumps(parts, sort_keys=True, default=str)
    return hashlib.sha256(text.encode()).hexdigest()


def profile_content(profile):
    """What the reduction uses of an instrument profile (not its path, name or layout)."""
    return {"gain": profile.gain, "read_noise": profile.read_noise,
            "saturation": profile.saturation, "full_shape": list(profile.full_shape),
            "flat_range": list(profile.flat_range) if profile.flat_range else None,
            "dispersion": list(profile.dispersion), "column_offset": profile.column_offset,
            "row_offset": profile.row_offset, "tilt": profile.tilt, "width": profile.width,
            "keywords": dict(sorted(profile.keywords.items())),
            "extensions": dict(sorted(profile.extensions.items()))}


def raw_files(visit):
    """The raw FITS files of a visit, by name."""
    return sorted(Path(visit.raw).glob("*.fits"))


def raw_identity_of(raw, references, visit):
    """Raw identity from ``raw`` [(name, sha256)] and ``references`` {role: sha256}."""
    return _hash("raw", sorted(raw), profile_content(visit.profile), dict(sorted(references.items())),
                 [visit.target["source_x"], visit.target["source_y"]])


def raw_identity(visit, digests=None):
    """Identity of the raw visit: the content of its raw and reference files.

    Parameters
    ----------
    visit : config.Visit
    digests : callable, optional
        ``digests(path) -> sha256 hex``; default :func:`file_digest` with the
        notebook's record.

    Notes
    -----
    SHA-256 over the raw files' names and contents, the profile's content
    (:func:`profile_content`), each reference file's content and the source
    position.  Paths, modification times and the visit description's bytes
    play no part, so a copied, moved or touched visit keeps its identity.
    """
    digest = digests or (lambda p: file_digest(p, visit.notebook))
    raw = [(p.name, digest(p)) for p in raw_files(visit)]
    refs = {role: digest(f) for role, f in visit.profile.files.items() if f is not None}
    return raw_identity_of(raw, refs, visit)


def stage_facts(visit, stage):
    """The visit facts a stage uses besides its parameters (part of its identity)."""
    exclude = getattr(visit, "exclude", None) or {}
    if stage == "bin":   # coordinates for the times; name and event for the products' metadata
        return [visit.target["ra"], visit.target["dec"], visit.target.get("name") or "",
                sorted(visit.event.items())]
    if stage == "detrend":
        facts = sorted(visit.event.items())
        return facts + [["exclude.channels", exclude["channels"]]] if exclude.get("channels") \
            else facts
    if stage == "extract":
        return [visit.target["teff"]]
    if stage == "calibrate":   # the observer's exclusions change the inventory
        return [[f"exclude.{k}", exclude[k]] for k in ("files", "exposures", "times")
                if exclude.get(k)]
    return []


_stage_facts = stage_facts


def stage_params(visit, stage):
    """A stage's resolved parameters as a sorted list of [name, value] (JSON-ready)."""
    return sorted((k, list(v) if isinstance(v, tuple) else v) for k, v in visit.stages[stage].items())


def content_identity(stage, params, facts, upstream):
    """Identity (hex) from what a stage used: its code version, parameters, facts and upstream.

    ``params`` is a sorted list of [name, value], ``facts`` JSON-ready, and
    ``upstream`` the identity (or colon-joined identities) it reads from; the
    entry records all four, so that ``audit`` recomputes the identity.
    """
    return _hash(stage, STAGES[stage].version, params, facts, upstream)


def stage_hash(visit, stage, upstream):
    """Identity (hex) of ``stage`` given the identity of what it reads from."""
    return content_identity(stage, stage_params(visit, stage), stage_facts(visit, stage), upstream)


def stage_identity(visit, stage):
    """Identity hash (hex) of ``stage`` for this visit and its settings, from the files."""
    index = STAGE_ORDER.index(stage)
    upstream = raw_identity(visit) if index == 0 else stage_identity(visit, STAGE_ORDER[index - 1])
    return stage_hash(visit, stage, upstream)


def stage_dir(visit, stage):
    """``NOTEBOOK/STAGE-IDENT`` folder of a stage."""
    return Path(visit.notebook) / f"{stage}-{stage_identity(visit, stage)[:10]}"


# ---------------------------------------------------------------------------
# the run plan: what a run computes once and hands to its tasks
# ---------------------------------------------------------------------------

@dataclass
class RunPlan:
    """Bookkeeping of one run, computed once (see :func:`make_plan`).

    Attributes
    ----------
    visit : config.Visit
    settings : str
        Canonical text of the command-line overrides.
    digests : dict
        Absolute path (str) of every raw and reference file to its SHA-256.
    raw : list of (name, sha256)
        The raw files.
    references : dict
        Reference-file role to SHA-256.
    raw_identity : str
    identities : dict
        Stage name to its identity (hex).
    refs : list of rawio.ExposureRef or None
        The exposures to reduce in start-time order, when taken.
    inventory : list of rawio.ExposureRef or None
        Every exposure, set-aside ones included (flagged, with their reason),
        from the validation pass (:func:`lightledger.tasks.check.check_visit`).
    """

    visit: object
    settings: str
    digests: dict
    raw: list
    references: dict
    raw_identity: str
    identities: dict
    refs: list | None = None
    inventory: list | None = None

    def chain(self, stage):
        """The ``chain`` parameter of a task of ``stage``: raw and stage identities up to it."""
        index = STAGE_ORDER.index(stage)
        return ":".join([self.raw_identity] + [self.identities[s] for s in STAGE_ORDER[:index + 1]])

    def folder(self, stage):
        return Path(self.visit.notebook) / f"{stage}-{self.identities[stage][:10]}"


def make_plan(visit, settings_text="[]", refs=None, inventory=None):
    """Hash the raw and reference files (once, remembered) and compute every identity.

    Parameters
    ----------
    visit : config.Visit
    settings_text : str
    refs : list of rawio.ExposureRef, optional
        The exposures to reduce, when the caller has taken the inventory.
    inventory : list of rawio.ExposureRef, optional
        Every exposure, set-aside ones included.

    Returns
    -------
    RunPlan
    """
    cache = digest_cache(visit.notebook)
    digests = {}
    raw = []
    for path in raw_files(visit):
        digests[str(path)] = value = cache.digest(path)
        raw.append((path.name, value))
    references = {}
    for role, path in visit.profile.files.items():
        if path is not None:
            digests[str(Path(path))] = references[role] = cache.digest(path)
    cache.save()
    raw_ident = raw_identity_of(raw, references, visit)
    identities, upstream = {}, raw_ident
    for stage in STAGE_ORDER:
        identities[stage] = upstream = stage_hash(visit, stage, upstream)
    return RunPlan(visit=visit, settings=settings_text, digests=digests, raw=raw,
                   references=references, raw_identity=raw_ident, identities=identities, refs=refs,
                   inventory=inventory)


#: Plans of the runs this process made or was handed (forked workers inherit them).
_PLANS = {}


def register_plan(plan):
    """Make ``plan`` the one tasks of its visit, settings and raw identity use in this process."""
    key = (str(Path(plan.visit.path).resolve()), plan.settings, plan.raw_identity)
    if len(_PLANS) > 16:
        _PLANS.clear()
    _PLANS[key] = plan
    return plan


def _find_plan(visit, settings, raw_ident):
    return _PLANS.get((str(Path(visit).resolve()), settings, raw_ident))


# ---------------------------------------------------------------------------
# digests of products and the records of who made them
# ---------------------------------------------------------------------------

def made_record_path(path):
    """Hidden record beside a task's output: ``.NAME.made`` (JSON)."""
    path = Path(path)
    return path.parent / f".{path.name}{MADE_SUFFIX}"


def _stat_key(path):
    st = os.stat(path)
    return [st.st_size, st.st_mtime_ns, st.st_ino]


def read_made_record(path):
    """The record of who made a task's output (dict), or {} when there is none."""
    try:
        doc = json.loads(made_record_path(path).read_text(encoding="utf-8"))
    except (OSError, ValueError):
        return {}
    return doc if isinstance(doc, dict) else {}


@lru_cache(maxsize=64)
def _entry_outputs(path, stamp):
    entry = read_entry(path)
    return entry.get("outputs", {}) if entry else {}


def product_digest(path):
    """SHA-256 of a product, from what was recorded when it was written where possible.

    Looks in this process's record of writes, then in the made-record of a
    task's output (valid while the file's size, time and inode are those
    recorded), then in the folder's entry (valid for files not modified after
    it); hashes the file otherwise.
    """
    path = Path(path)
    value = known_digest(path)
    if value:
        return value
    try:
        key = _stat_key(path)
    except FileNotFoundError:
        raise LightledgerError(f"{path}: missing; it should have been made before this step") from None
    record = read_made_record(path)
    if record.get("stat") == key and record.get("sha256"):
        return record["sha256"]
    entry = path.parent / ENTRY_NAME
    try:
        est = os.stat(entry)
        if est.st_mtime_ns >= key[1]:
            value = _entry_outputs(str(entry), (est.st_mtime_ns, est.st_size, est.st_ino)).get(path.name)
            if value:
                return value
    except FileNotFoundError:
        pass
    return sha256_of(path)


# ---------------------------------------------------------------------------
# entries
# ---------------------------------------------------------------------------

def read_entry(path, stage=None):
    """The contents of an ``entry.json`` (dict), or None when missing or not a valid entry."""
    try:
        entry = json.loads(Path(path).read_text(encoding="utf-8"))
    except (OSError, ValueError):
        return None
    if not isinstance(entry, dict) or not isinstance(entry.get("stage"), str) \
            or not isinstance(entry.get("params"), dict) or not isinstance(entry.get("outputs"), dict):
        return None
    if stage is not None and entry["stage"] != stage:
        return None
    return entry


# ---------------------------------------------------------------------------
# the task base
# ---------------------------------------------------------------------------

class FolderTask:
    """What a task that makes one notebook folder shares: locks, forcing, made-records.

    A subclass (a :class:`luigi.Task`) provides ``folder``, ``output()``,
    ``force_after``, ``run_id`` and ``forced``; its ``run()`` is wrapped
    (:func:`guarded`): the folder's shared lock and the output's exclusive
    lock are held while it runs, leftover temporary files of the output are
    removed, a forced stage's old folder is moved aside first, the run
    returns at once when another reducer made the output meanwhile, and the
    output's made-record is written after it.
    """

    def __init_subclass__(cls, **kwargs):
        super().__init_subclass__(**kwargs)
        if "run" in cls.__dict__:
            cls.run = guarded(cls.__dict__["run"])

    def check_identity(self):
        """Raise when the task's inputs no longer give its identity (default: nothing to check)."""

    def made_by_this_run(self):
        """True when this task's output was made by the run that scheduled it."""
        return bool(self.run_id) and read_made_record(self.output().path).get("run") == self.run_id

    def supersede_if_old(self):
        """Move a forced stage's complete folder aside when its entry predates the run.

        Done under the folder's exclusive lock, so never while another task
        writes into it; a folder whose entry is newer than the run's start was
        made again by a run that started later, or is being made (no entry):
        it is kept.
        """
        folder = self.folder
        entry = folder / ENTRY_NAME
        try:
            if os.stat(entry).st_mtime >= self.force_after:
                return
        except FileNotFoundError:
            return
        with locks.locked(locks.folder_lock_path(folder)):
            try:
                if os.stat(entry).st_mtime >= self.force_after:
                    return
            except FileNotFoundError:
                return
            supersede(folder)


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

    def complete(self):
        """One file test (two for a forced stage; an entry is also parsed)."""
        path = Path(self.output().path)
        try:
            st = os.stat(path)
        except FileNotFoundError:
            return False
        entry = self.folder / ENTRY_NAME
        if self.forced:
            try:
                est = st if path == entry else os.stat(entry)
            except FileNotFoundError:
                est = None          # the folder is being made anew
            if est is not None and est.st_mtime < self.force_after:
                return False
        if path.name == ENTRY_NAME:
            return read_entry(path, self.stage) is not None
        return True

    # -- progress, failure, entry -------------------------------------------------
    def progress(self, done, total, what, *, part=None):
        """Report progress to Luigi's scheduler and to the command line's bar of the stage.

        A task that is its whole stage gives its own ``done`` of ``total``
        steps; a chunk task gives ``part`` (its chunk number), the units it
        has done and the stage's total units (see ``tasks/console.py``).
        """
        percent = 100.0 * done / max(total, 1)
        try:
            self.set_status_message(f"{what}: {done}/{total}")
            self.set_progress_percentage(round(percent, 1))
        except Exception:  # no scheduler attached (a task run by hand)
            pass
        reporter = PROGRESS.get("callback")
        if reporter is not None:
            reporter(self.stage, what, done, total, part)

    def on_failure(self, exception):
        """Record the reason and exit status for the command line, then let Luigi record its own.

        A user's mistake or a failure of the machine is one line per problem
        (see :func:`lightledger.tasks.problems.describe_failure`); a pipeline
        error that names no file is prefixed with the visit and the task.
        """
        from .problems import describe_failure

        status, text = describe_failure(exception, context=self._failure_context())
        if status == 1:
            text = text.replace("lightledger: internal error", f"lightledger: {self.task_family} "
                                                                "failed: internal error", 1)
        try:
            folder = Path(self.config.notebook) / ".failures" / (self.run_id or "by-hand")
            folder.mkdir(parents=True, exist_ok=True)
            (folder / f"{self.task_id}.txt").write_text(f"{status}\n{text}\n", encoding="utf-8")
        except Exception:
            pass
        return super().on_failure(exception)

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


def raw_identity_from_record(record):
    """Recompute the raw identity from an entry's ``raw`` record (see ``write_entry``)."""
    return _hash("raw", sorted([n, d] for n, d in record["files"].items()), record["profile"],
                 dict(sorted(record["references"].items())), record["source"])


def supersede(folder):
    """Rename a stage folder to ``NAME.superseded-TIME`` (the caller holds its lock)."""
    folder = Path(folder)
    stamp = datetime.now(timezone.utc).strftime("%Y%m%dT%H%M%S")
    target = folder.with_name(f"{folder.name}.superseded-{stamp}")
    n = 1
    while target.exists():
        n += 1
        target = folder.with_name(f"{folder.name}.superseded-{stamp}-{n}")
    folder.rename(target)
    folder.mkdir()          # its replacement is being made: the folder says so at once
    return target


def remove_parts(folder, name=None):
    """Remove temporary files of dead writers in a folder (of one product, or all).

    The caller holds the product's lock (or the folder's exclusive lock), so
    no live process is writing them.
    """
    pattern = part_pattern(name) if name else ".*.part"
    removed = 0
    for part in Path(folder).glob(pattern):
        try:
            part.unlink()
            removed += 1
        except FileNotFoundError:
            pass
    return removed


def guarded(run):
    """Wrap a task's ``run`` (plain or generator) with the checks and locks of :class:`FolderTask`."""
    if inspect.isgeneratorfunction(run):
        def wrapper(self):
            with _claim(self) as fresh:
                if fresh:
                    yield from run(self)
                    _record(self)
    else:
        def wrapper(self):
            with _claim(self) as fresh:
                if fresh:
                    result = run(self)
                    _record(self)
                    return result
    wrapper.__name__ = run.__name__
    wrapper.__doc__ = run.__doc__
    wrapper.__wrapped__ = run
    return wrapper


_guarded = guarded


@contextmanager
def _claim(task):
    task.check_identity()
    if task.forced:
        task.supersede_if_old()
    folder = task.folder
    output = Path(task.output().path)
    shared = locks.acquire(locks.folder_lock_path(folder), shared=True)
    try:
        own = locks.acquire(locks.product_lock_path(folder, output.name))
        try:
            if task.complete():
                yield False          # another reducer made it while this one waited
                return
            remove_parts(folder, output.name)
            task.__dict__["_started"] = time.time()
            yield True
        finally:
            locks.release(own)
    finally:
        locks.release(shared)


def _record(task):
    output = Path(task.output().path)
    if not output.exists():
        return
    record = {"run": task.run_id, "task": task.task_family,
              "seconds": round(time.time() - task.__dict__.get("_started", time.time()), 3),
              "host": socket.gethostname(), "pid": os.getpid(),
              "stat": _stat_key(output), "sha256": known_digest(output) or sha256_of(output)}
    write_json(made_record_path(output), record)


@lru_cache(maxsize=4)
def _inventory_cached(path, stamp, raw):
    from astropy.table import Table

    from .rawio import refs_from_table, usable
    return usable(refs_from_table(Table.read(path, format="ascii.ecsv"), raw))


def _inventory_refs(path, raw):
    """Exposures from an inventory product, read once per process while it is unchanged."""
    try:
        stamp = _stamp(path)
    except FileNotFoundError:
        raise LightledgerError(f"{path}: the inventory is missing; run lightledger reduce again") from None
    return _inventory_cached(str(path), stamp, str(raw))


def user_name():
    """The user's login name, or "unknown"."""
    try:
        return getpass.getuser()
    except Exception:
        return "unknown"


_user = user_name


#: Where the command line puts its progress reporter (one per process).
PROGRESS = {}
