"""What every lightledger task shares: the visit, identities, entries.

Products are named by what made them.  Each stage writes into
``NOTEBOOK/STAGE-IDENT/`` where ``IDENT`` is the first 10 hex digits of a
SHA-256 over

* the stage's name and code version (``pipeline.parameters.STAGES``),
* the stage's parameters after defaults and overrides,
* the visit facts the stage uses (target coordinates for ``bin``, the event
  for ``detrend``), and
* the identity of the stage it reads from; the first stage reads the raw
  visit, whose identity covers every raw file's name, size and modification
  time and the content of the instrument profile and its reference files.

Changing a parameter of one stage therefore changes the folder of that stage
and of every stage after it, and nothing before it; earlier folders stay in
place for comparison.  A folder is complete when its ``entry.json`` exists:
it is written last, after every product of the entry.
"""

import getpass
import hashlib
import json
import socket
import time
from datetime import datetime, timezone
from functools import lru_cache
from pathlib import Path

import luigi

from lightledger.pipeline import __version__
from lightledger.pipeline.parameters import STAGE_ORDER, STAGES

from .config import load_visit
from .products import Provenance, relative_input, write_json
from .digests import CACHE_NAME, DigestCache

__all__ = ["VisitTask", "visit_config", "stage_identity", "stage_dir", "ENTRY_NAME",
           "settings_to_text", "settings_from_text"]

ENTRY_NAME = "entry.json"


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
    return (st.st_mtime_ns, st.st_size)


def visit_config(path, settings_text="[]"):
    """The validated visit description, cached while the file is unchanged."""
    if not Path(path).is_file():
        return load_visit(path, settings_from_text(settings_text))   # raises its one-line error
    return _visit_cached(str(Path(path).resolve()), settings_text, _stamp(path))


#: Digests of files known to this process (the notebook's record is read once per notebook).
_DIGESTS = {}


def digest_cache(notebook):
    """The process's :class:`~.digests.DigestCache` of a notebook folder."""
    key = str(Path(notebook).resolve())
    if key not in _DIGESTS:
        _DIGESTS[key] = DigestCache(Path(key) / CACHE_NAME)
    return _DIGESTS[key]


def file_digest(path, notebook=None):
    """SHA-256 of a file, hashed again only when its size, times or inode changed."""
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
    refs = {role: digest(f) for role, f in sorted(visit.profile.files.items()) if f is not None}
    return _hash("raw", raw, profile_content(visit.profile), refs,
                 [visit.target["source_x"], visit.target["source_y"]])


def _stage_facts(visit, stage):
    if stage == "bin":
        return [visit.target["ra"], visit.target["dec"]]
    if stage == "detrend":
        return sorted(visit.event.items())
    if stage == "extract":
        return [visit.target["teff"]]
    return []


def stage_identity(visit, stage):
    """Identity hash (hex) of ``stage`` for this visit and its settings."""
    index = STAGE_ORDER.index(stage)
    upstream = raw_identity(visit) if index == 0 else stage_identity(visit, STAGE_ORDER[index - 1])
    spec = STAGES[stage]
    params = sorted((k, list(v) if isinstance(v, tuple) else v)
                    for k, v in visit.stages[stage].items())
    return _hash(stage, spec.version, params, _stage_facts(visit, stage), upstream)


def stage_dir(visit, stage):
    """``NOTEBOOK/STAGE-IDENT`` folder of a stage."""
    return Path(visit.notebook) / f"{stage}-{stage_identity(visit, stage)[:10]}"


class VisitTask(luigi.Task):
    """Base of every stage task: a visit description plus command-line settings."""

    visit = luigi.Parameter(description="path of the visit description (TOML)")
    settings = luigi.Parameter(default="[]",
                               description="JSON list of [stage, key, value] overrides (--set)")

    #: Stage this task belongs to; set by subclasses.
    stage = None

    @property
    def config(self):
        return visit_config(self.visit, self.settings)

    @property
    def params(self):
        return self.config.stages[self.stage]

    @property
    def folder(self):
        return stage_dir(self.config, self.stage)

    @property
    def identity(self):
        return stage_identity(self.config, self.stage)[:10]

    def stage_task(self, cls, **extra):
        """Another task of the same visit and settings."""
        return cls(visit=self.visit, settings=self.settings, **extra)

    def provenance(self, inputs):
        """Provenance for a product of this task; ``inputs`` is a list of paths."""
        digests = {relative_input(p, self.folder): file_digest(p) for p in inputs}
        return Provenance(self.stage, STAGES[self.stage].version, self.identity, self.params,
                          digests, visit=self.config.name)

    def progress(self, done, total, what):
        """Report progress to Luigi's scheduler (status message and percentage)."""
        percent = 100.0 * done / max(total, 1)
        try:
            self.set_status_message(f"{what}: {done}/{total}")
            self.set_progress_percentage(round(percent, 1))
        except Exception:  # no scheduler attached (a task run by hand)
            pass
        reporter = PROGRESS.get("callback")
        if reporter is not None:
            reporter(self.stage, what, done, total)

    def on_failure(self, exception):
        """Record a one-line reason for the command line, then let Luigi record its own."""
        import traceback

        from lightledger.pipeline.errors import LightledgerError

        if isinstance(exception, LightledgerError):
            text = f"lightledger: error: {exception}"
        else:
            text = (f"lightledger: {self.task_family} failed (a bug; please report it):\n"
                    + "".join(traceback.format_exception(exception)).rstrip())
        try:
            folder = Path(self.config.notebook) / ".failures"
            folder.mkdir(parents=True, exist_ok=True)
            (folder / f"{self.task_id}.txt").write_text(text + "\n", encoding="utf-8")
        except Exception:
            pass
        return super().on_failure(exception)

    def write_entry(self, path, inputs, outputs, metrics, figures, started, *, extra_seconds=0.0):
        """Write the stage's entry.json (the completion marker), atomically.

        ``seconds`` is this task's own time since ``started`` plus ``extra_seconds``
        spent in the stage's other tasks (its chunks).
        """
        entry = {
            "stage": self.stage,
            "identity": self.identity,
            "folder": Path(self.folder).name,
            "visit": self.config.name,
            "visit_file": str(self.config.path),
            "created": datetime.now(timezone.utc).isoformat(timespec="seconds"),
            "user": _user(),
            "host": socket.gethostname(),
            "software_version": __version__,
            "stage_version": STAGES[self.stage].version,
            "seconds": round(time.time() - started + extra_seconds, 2),
            "params": {k: list(v) if isinstance(v, tuple) else v for k, v in self.params.items()},
            "overrides": self.config.overrides.get(self.stage, {}),
            "made_from": (stage_dir(self.config, STAGE_ORDER[STAGE_ORDER.index(self.stage) - 1]).name
                          if self.stage != STAGE_ORDER[0] else str(self.config.raw)),
            "inputs": {relative_input(p, self.folder): file_digest(p) for p in inputs},
            "outputs": {Path(p).name: file_digest(p) for p in outputs},
            "metrics": metrics,
            "figures": [Path(f).name for f in figures],
        }
        write_json(path, entry)


def elapsed_of(paths):
    """Sum of the ELAPSED primary-header keyword (task seconds) of FITS products."""
    from astropy.io import fits

    return float(sum(fits.getheader(p).get("ELAPSED", 0.0) for p in paths))


def _user():
    try:
        return getpass.getuser()
    except Exception:
        return "unknown"


#: Where the command line puts its progress reporter (one per process).
PROGRESS = {}
