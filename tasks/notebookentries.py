"""A notebook's entries and their lineage, read from every stage folder's ``entry.json``.

:func:`collect_entries` gathers the valid entries in time order, each with
what changed since the previous entry of its stage; :func:`upstream_entry`,
:func:`entry_sources` and :func:`current_chain` follow what each entry was
made from (superseded copies included).  Read by the page
(:mod:`.notebookpage`), housekeeping (:mod:`.notebook`) and ``compare``.
"""

from pathlib import Path

from lightledger.pipeline.parameters import STAGE_ORDER

from .entries import ENTRY_NAME, read_entry

__all__ = ["collect_entries", "parameter_changes", "upstream_entry", "current_chain",
           "entry_sources"]


def _stage_folder_names(notebook):
    from .audit import stage_folders

    return stage_folders(notebook)


def collect_entries(notebook, *, unreadable=None):
    """Every valid entry of a notebook folder, oldest first.

    Returns a list of dicts (the entry.json contents) with added keys
    ``path`` (the folder, relative to the notebook), ``superseded``,
    ``changed`` (the parameter names that differ from the previous entry of
    the same stage), ``previous`` and ``input_changed``.  Folders whose
    ``entry.json`` exists but is not a valid entry are appended to
    ``unreadable`` (a list) when given, and skipped.
    """
    notebook = Path(notebook)
    entries = []
    for folder in _stage_folder_names(notebook):
        file = folder / ENTRY_NAME
        if not file.exists():
            continue
        entry = read_entry(file)
        if entry is None:
            if unreadable is not None:
                unreadable.append(folder.name)
            continue
        entry["path"] = folder.name
        entry["superseded"] = ".superseded-" in folder.name
        entries.append(entry)
    entries.sort(key=lambda e: (str(e.get("created", "")), e["path"]))
    previous = {}
    for entry in entries:
        before = previous.get(entry["stage"])
        entry["changed"] = parameter_changes(before["params"], entry["params"]) if before else {}
        entry["previous"] = before["path"] if before else None
        entry["input_changed"] = bool(before) and before.get("made_from") != entry.get("made_from")
        previous[entry["stage"]] = entry
    return entries


def parameter_changes(before, after):
    """``{name: (old, new)}`` for every parameter whose value differs."""
    names = sorted(set(before) | set(after))
    return {n: (before.get(n), after.get(n)) for n in names if before.get(n) != after.get(n)}


def _stage_rank(stage):
    return STAGE_ORDER.index(stage) if stage in STAGE_ORDER else len(STAGE_ORDER)


def upstream_entry(entry, entries):
    """The entry ``entry`` was made from (the current folder preferred), or None."""
    want = entry.get("upstream")
    made_from = entry.get("made_from")
    found = None
    for other in entries:
        if other is entry:
            continue
        if (want and other.get("identity_hash") == want) or \
                (not want and made_from and other["path"] == made_from):
            if found is None or (found.get("superseded") and not other.get("superseded")):
                found = other
    return found


def current_chain(entries):
    """Folder names of the current chain: the newest current entry of the last stage and its
    lineage back to the first stage."""
    current = [e for e in entries if not e.get("superseded")]
    if not current:
        return []
    last = max(_stage_rank(e["stage"]) for e in current)
    tip = [e for e in current if _stage_rank(e["stage"]) == last][-1]
    chain, entry = [], tip
    while entry is not None and entry["path"] not in chain:
        chain.append(entry["path"])
        entry = upstream_entry(entry, current) or upstream_entry(entry, entries)
    return chain[::-1]


def entry_sources(entry, entries):
    """Folder names of the entries ``entry`` was made from.

    Each input an entry records names a folder relative to its own
    (``../bin-IDENT/lightcurves.fits``) and the SHA-256 of the bytes it read;
    when that folder was superseded by a forced re-run, the superseded copy
    whose entry recorded those bytes is the source.  Falls back to the entry
    of the upstream identity.
    """
    from .audit import STAGE_FOLDER

    by_path = {e["path"]: e for e in entries}
    sources = []
    for name, digest in (entry.get("inputs") or {}).items():
        rel = Path(str(name))
        parent = rel.parent.name
        match = STAGE_FOLDER.match(parent)
        if not match or parent == entry["path"]:
            continue
        stem = parent.split(".superseded-")[0]
        candidates = [parent] + sorted((p for p in by_path if p.startswith(stem + ".superseded-")),
                                       reverse=True)
        found = next((c for c in candidates if c in by_path
                      and by_path[c].get("outputs", {}).get(rel.name) == digest), None)
        found = found or (parent if parent in by_path else None)
        if found and found not in sources:
            sources.append(found)
    if not sources:
        up = upstream_entry(entry, entries)
        if up is not None:
            sources.append(up["path"])
    return sources
