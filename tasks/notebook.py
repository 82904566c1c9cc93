"""Notebook housekeeping: listing and pruning entries, and the records that keep them current.

Every stage folder ``NOTEBOOK/STAGE-IDENT/`` holds an ``entry.json`` written
when the stage completed; the page built from them (``index.html``,
``notebook.json``) is described in :mod:`.notebookpage`.

:func:`list_entries` and :func:`prune` are the ``lightledger notebook list``
and ``notebook prune`` commands; they and the records that keep entries
current (:func:`note_programme`, :func:`note_last_used`) live here.  The
entries and their lineage are read by :mod:`.notebookentries`, the page is
written by :mod:`.notebookpage`; both are re-exported here.
"""

import json
import os
import shutil
from dataclasses import dataclass
from pathlib import Path

from . import locks
from .entries import ENTRY_NAME
# the entries and their lineage, and the page, one module each, re-exported here so that
# ``from lightledger.tasks.notebook import NAME`` keeps working
from .notebookentries import (_stage_folder_names, _stage_rank, collect_entries,  # noqa: F401
                              current_chain, entry_sources, parameter_changes, upstream_entry)
from .notebookpage import (OVERLAY_ENTRIES, _PNG_SIGNATURE, _STYLE, _contents_html,  # noqa: F401
                           _entry_html, _fmt, _overlay_html, _own_pngs, render_page, write_page)
from .products import atomic_path

__all__ = ["collect_entries", "render_page", "write_page", "parameter_changes", "current_chain",
           "current_roots", "list_entries", "prune", "NotebookEntry", "note_programme",
           "programme_notebooks", "note_last_used"]


@dataclass
class NotebookEntry:
    """One stage folder as ``notebook list`` shows it."""

    folder: str
    stage: str
    created: str
    identity: str
    size: int
    state: str           # current, superseded, incomplete, unreadable
    made_from: str
    in_chain: bool


def _size(folder):
    total = 0
    for path in Path(folder).rglob("*"):
        try:
            if path.is_file():
                total += path.stat().st_size
        except OSError:
            pass
    return total


def _notebook_of(path):
    """The notebook folder of a notebook, a visit description, a stage folder or a product."""
    from .audit import _target

    kind, found = _target(path)
    if kind == "folder":
        return found.parent
    if kind == "product":
        return found.parent.parent
    return found


def list_entries(path):
    """Every stage folder of a notebook, oldest first, as :class:`NotebookEntry`."""
    notebook = _notebook_of(path)
    unreadable = []
    entries = collect_entries(notebook, unreadable=unreadable)
    chain = set(current_chain(entries))
    by_path = {e["path"]: e for e in entries}
    rows = []
    for folder in _stage_folder_names(notebook):
        entry = by_path.get(folder.name)
        stage = folder.name.split("-", 1)[0]
        if entry is None:
            state = "unreadable" if folder.name in unreadable else "incomplete"
            rows.append(NotebookEntry(folder.name, stage, "", folder.name.split("-", 1)[1][:10],
                                      _size(folder), state, "", False))
            continue
        rows.append(NotebookEntry(folder.name, entry["stage"], str(entry.get("created", "")),
                                  str(entry.get("identity", "")), _size(folder),
                                  "superseded" if entry["superseded"] else "current",
                                  str(entry.get("made_from", "")), folder.name in chain))
    rows.sort(key=lambda r: (r.created or "~", r.folder))
    return notebook, rows


#: Hidden file of a visit's notebook naming the programme notebooks whose joint fits read it.
PROGRAMMES_NAME = ".programmes.json"


def note_programme(notebook, programme_notebook):
    """Record in a visit's notebook that a programme's joint fit reads its entries.

    The programme notebook is kept by its path relative to the visit's
    notebook (so copying the programme's folder whole keeps the record true).
    ``notebook prune`` of the visit's notebook then keeps every entry a
    current joint entry of the programme was made from.
    """
    notebook = Path(notebook)
    notebook.mkdir(parents=True, exist_ok=True)
    rel = os.path.relpath(Path(programme_notebook).resolve(), notebook.resolve())
    with locks.locked(locks.notebook_lock_path(notebook)):
        known = programme_notebooks(notebook, relative=True)
        if rel in known:
            return
        with atomic_path(notebook / PROGRAMMES_NAME) as tmp:
            tmp.write_text(json.dumps(sorted(known + [rel]), indent=1) + "\n", encoding="utf-8")


def programme_notebooks(notebook, *, relative=False):
    """The programme notebooks recorded by :func:`note_programme` (paths; relative if asked)."""
    try:
        names = json.loads((Path(notebook) / PROGRAMMES_NAME).read_text(encoding="utf-8"))
    except (OSError, ValueError):
        return []
    names = [n for n in names if isinstance(n, str)] if isinstance(names, list) else []
    return names if relative else [(Path(notebook) / n).resolve() for n in names]


#: Hidden file of a notebook naming the folders the last reductions used, by who reduced.
LAST_USED_NAME = ".last-used.json"


def note_last_used(notebook, who, folders):
    """Record the stage folders a reduction ended with (made or reused), under ``who``.

    ``who`` is ``"visit"`` for a visit's own reduction, or the programme
    notebook's path relative to this one; each keeps its own last record.
    """
    notebook = Path(notebook)
    if not notebook.is_dir():
        return
    with locks.locked(locks.notebook_lock_path(notebook)):
        doc = _last_used(notebook)
        doc[str(who)] = sorted(Path(f).name for f in folders)
        with atomic_path(notebook / LAST_USED_NAME) as tmp:
            tmp.write_text(json.dumps(doc, indent=1, sort_keys=True) + "\n", encoding="utf-8")


def _last_used(notebook):
    try:
        doc = json.loads((Path(notebook) / LAST_USED_NAME).read_text(encoding="utf-8"))
    except (OSError, ValueError):
        return {}
    return {str(k): [n for n in v if isinstance(n, str)] for k, v in doc.items()
            if isinstance(v, list)} if isinstance(doc, dict) else {}


def current_roots(entries, notebook=None):
    """Folder names of the entries a notebook treats as current.

    The newest entry (not superseded) of every stage, the current chain,
    and (given the notebook) the folders the last reductions ended with
    (:func:`note_last_used`), so that going back to earlier settings keeps
    the entries they reuse; everything these were made from is current too
    (see :func:`prune`).
    """
    newest = {}
    for e in entries:
        if not e.get("superseded"):
            newest[e["stage"]] = e["path"]
    roots = set(newest.values()) | set(current_chain(entries))
    if notebook is not None:
        for names in _last_used(notebook).values():
            roots.update(names)
    return roots


def _external_roots(notebook):
    """Folder names of a visit notebook that current joint entries of programmes read."""
    notebook = Path(notebook).resolve()
    names = set()
    for other in programme_notebooks(notebook):
        if not Path(other).is_dir():
            continue
        theirs = collect_entries(other)
        keep = current_roots(theirs, other)
        for entry in theirs:
            if entry["path"] not in keep:
                continue
            for name in (entry.get("inputs") or {}):
                folder = (Path(other) / entry["path"] / str(name)).resolve().parent
                if folder.parent == notebook:
                    names.add(folder.name)
    return names


def _needed(entries, roots=None):
    """Folder names the roots depend on, themselves included (default roots: every entry not
    superseded)."""
    by_path = {e["path"]: e for e in entries}
    needed = set()
    stack = list(roots) if roots is not None else [e["path"] for e in entries
                                                   if not e.get("superseded")]
    while stack:
        name = stack.pop()
        if name in needed or name not in by_path:
            continue
        needed.add(name)
        stack += entry_sources(by_path[name], entries)
    return needed


def prune(path, *, dry_run=False, reasons=None):
    """Remove entries nothing current needs, and interrupted runs' folders.

    Current are the newest entry of every stage that was not superseded, the
    current chain, the folders the last reductions ended with (made or
    reused), and the entries a programme's current joint fit reads
    (programmes recorded by :func:`note_programme`); every entry they were
    made from, however far up their lineage, is kept.  Everything else goes:
    superseded entries and older entries that nothing current references.
    A folder a running reduction is writing into (its lock is tried without
    waiting) is left.  Returns ``(notebook, removed folder names, bytes
    freed)``; with ``dry_run`` nothing is removed.  ``reasons``, a dict
    when given, receives why each folder goes.
    """
    notebook = _notebook_of(path)
    unreadable = []
    entries = collect_entries(notebook, unreadable=unreadable)
    needed = _needed(entries, current_roots(entries, notebook) | _external_roots(notebook))
    by_path = {e["path"]: e for e in entries}
    removed, freed = [], 0
    for folder in _stage_folder_names(notebook):
        entry = by_path.get(folder.name)
        if entry is None:
            # an interrupted run's partial folder; a garbage entry is left for the user to see
            doomed = folder.name not in unreadable and not (folder / ENTRY_NAME).exists()
            why = "an interrupted run's folder (no entry)"
        else:
            doomed = folder.name not in needed
            why = ("superseded" if entry.get("superseded") else
                   "older entry that no current entry was made from")
        if not doomed:
            continue
        lock = locks.folder_lock_path(folder)
        fd = locks.acquire(lock, blocking=False)
        if fd is None:
            continue                    # a reduction is writing into it: leave it
        try:
            size = _size(folder)
            if not dry_run:
                shutil.rmtree(folder, ignore_errors=True)
                shutil.rmtree(lock.with_suffix(""), ignore_errors=True)   # its products' locks
                lock.unlink(missing_ok=True)    # waiters notice and lock a new file
        finally:
            locks.release(fd)
        removed.append(folder.name)
        freed += size
        if reasons is not None:
            reasons[folder.name] = why
    if removed and not dry_run:
        write_page(notebook)
    return notebook, removed, freed
