"""The run plan: what a run computes once and hands to its tasks.

The validated visit description with the command line's settings
(:func:`visit_config`, cached while the file is unchanged), the chunks of
exposures (:func:`chunk_ranges`), and the :class:`RunPlan` of a run
(:func:`make_plan`: every file digest and stage identity, the exposures),
registered in the process (:func:`register_plan`) so that tasks built from
their parameters find it; without a plan a task reads the inventory product
(:func:`_inventory_refs`).  See :mod:`.base`.
"""

import json
from dataclasses import dataclass
from functools import lru_cache
from pathlib import Path

from lightledger.pipeline.errors import LightledgerError
from lightledger.pipeline.parameters import STAGE_ORDER

from .config import load_visit
from .identities import digest_cache, raw_files, raw_identity_of, stage_hash

__all__ = ["settings_to_text", "settings_from_text", "visit_config", "AUTO_CHUNK", "chunk_length",
           "chunk_ranges", "RunPlan", "make_plan", "register_plan"]


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
