"""Identities: what names a stage folder, computed from what the stage used.

A stage folder is ``NOTEBOOK/STAGE-IDENT/`` with ``IDENT`` the first 10 hex
digits of a SHA-256 over the stage's name and code version, its resolved
parameters, the visit facts it uses (:func:`stage_facts`) and the identity of
the stage it reads from (:func:`content_identity`, :func:`stage_hash`); the
first stage reads the raw visit, whose identity is the content of the raw
and reference files, the profile's settings and the source position
(:func:`raw_identity`).  File digests are remembered across runs per
notebook (:func:`digest_cache`, :mod:`.digests`).  See :mod:`.base`.
"""

import hashlib
import json
from pathlib import Path

from lightledger.pipeline.parameters import STAGE_ORDER, STAGES

from .digests import CACHE_NAME, DigestCache

__all__ = ["digest_cache", "file_digest", "profile_content", "raw_files", "raw_identity_of",
           "raw_identity", "stage_facts", "stage_params", "content_identity", "stage_hash",
           "stage_identity", "stage_dir", "raw_identity_from_record"]


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


def raw_identity_from_record(record):
    """Recompute the raw identity from an entry's ``raw`` record (see ``write_entry``)."""
    return _hash("raw", sorted([n, d] for n, d in record["files"].items()), record["profile"],
                 dict(sorted(record["references"].items())), record["source"])
