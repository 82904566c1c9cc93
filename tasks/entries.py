"""What a stage folder records: its ``entry.json`` and the made-records of task outputs.

An entry (``entry.json``, written last) marks a folder complete and records
every product's SHA-256; a task's output has a hidden made-record
``.NAME.made`` beside it (run, seconds, SHA-256).  :func:`product_digest`
takes a product's digest from these records where they are still valid.
See :mod:`.base`.
"""

import json
import os
from functools import lru_cache
from pathlib import Path

from lightledger.pipeline.errors import LightledgerError

from .digests import sha256_of
from .products import known_digest

__all__ = ["ENTRY_NAME", "MADE_SUFFIX", "made_record_path", "read_made_record", "product_digest",
           "read_entry"]


ENTRY_NAME = "entry.json"


#: Suffix of the hidden record a task writes beside its output once made.
MADE_SUFFIX = ".made"


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
