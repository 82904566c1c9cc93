"""The notebook page of a visit (``index.html``, ``notebook.json``) and housekeeping.

Every stage folder ``NOTEBOOK/STAGE-IDENT/`` holds an ``entry.json`` written
when the stage completed.  :func:`render_page` gathers them in time order
into a machine-readable ``notebook.json`` and a static, self-contained
``index.html`` (inline style, relative links, nothing requested from a
network).  The page opens with a contents list grouped by stage, the
current chain marked; each entry shows when and by whom it ran, its
parameters with the ones that differ from the previous entry of the same
stage highlighted, its headline figures and its products.  The figures of
the current chain are embedded; those of other entries are linked from
their folders, so the page stays small as entries accumulate.  A stage with
two or more current entries gets one figure overlaying their spectra (the
newest six, labelled with the parameters each changed).  Only an
entry's own PNG files (plain names inside its folder, with the PNG
signature) are ever embedded or linked.

The page is a function of the entries alone (no time of writing in it), so
``lightledger audit`` can generate it again and compare.

:func:`list_entries` and :func:`prune` are the ``lightledger notebook list``
and ``notebook prune`` commands.
"""

import base64
import html
import json
import os
import shutil
from dataclasses import dataclass
from pathlib import Path

from lightledger.pipeline.parameters import STAGE_ORDER

from . import locks
from .base import ENTRY_NAME, read_entry
from .products import atomic_path

__all__ = ["collect_entries", "render_page", "write_page", "parameter_changes", "current_chain",
           "current_roots", "list_entries", "prune", "NotebookEntry", "note_programme",
           "programme_notebooks", "note_last_used"]

_PNG_SIGNATURE = b"\x89PNG\r\n\x1a\n"


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


def _fmt(value):
    if isinstance(value, float):
        return f"{value:.6g}"
    if isinstance(value, list):
        return "[" + ", ".join(_fmt(v) for v in value) + "]"
    return str(value)


_STYLE = """
body { font-family: system-ui, sans-serif; margin: 1.5em auto; max-width: 1100px; color: #222; }
h1 { font-size: 1.5em; } h2 { font-size: 1.1em; margin: 0; }
.entry { border: 1px solid #ccc; border-radius: 6px; padding: 0.8em 1em; margin: 1em 0; }
.entry.superseded { opacity: 0.75; border-style: dashed; }
.entry.current { border-color: #333; border-width: 2px; }
.meta { color: #555; font-size: 0.9em; margin: 0.3em 0 0.6em; }
.stage { display: inline-block; padding: 0 0.5em; border-radius: 4px; color: white; background: #666; }
.calibrate { background: #4a6fa5; } .extract { background: #5a8f5a; }
.bin { background: #a5774a; } .detrend { background: #8a4aa5; } .joint { background: #a54a5a; }
.badge { font-size: 0.8em; border: 1px solid #333; border-radius: 3px; padding: 0 0.3em; margin-left: 0.4em; }
table { border-collapse: collapse; font-size: 0.9em; margin: 0.4em 0; }
td, th { border-bottom: 1px solid #eee; padding: 2px 8px; text-align: left; }
tr.changed td { background: #fff2a8; font-weight: 600; }
.old { color: #a33; text-decoration: line-through; font-weight: normal; margin-right: 0.5em; }
.figs img { max-width: 100%; border: 1px solid #ddd; margin: 0.3em 0; }
.cols { display: flex; gap: 2em; flex-wrap: wrap; }
nav ul { margin: 0.2em 0 0.6em; } nav li { font-size: 0.9em; }
.warn { color: #a33; }
.warnings { color: #a40000; font-weight: bold; }
tr.idle td { color: #999; }
"""


def _own_pngs(entry, notebook):
    """The entry's own PNG figures: plain names inside its folder, with the PNG signature."""
    folder = (Path(notebook) / entry["path"]).resolve()
    found = []
    for name in entry.get("figures", []) if isinstance(entry.get("figures"), list) else []:
        if not isinstance(name, str) or Path(name).name != name or not name.endswith(".png"):
            continue
        path = folder / name
        try:
            if path.is_symlink() or not path.is_file() or path.resolve().parent != folder:
                continue
            with open(path, "rb") as fh:
                if fh.read(8) != _PNG_SIGNATURE:
                    continue
        except OSError:
            continue
        found.append(path)
    return found


def _entry_html(entry, notebook, current):
    stage = html.escape(str(entry["stage"]))
    classes = ["entry"] + (["superseded"] if entry.get("superseded") else []) \
        + (["current"] if current else [])
    folder = html.escape(entry["path"])
    badges = (' <span class="badge">current chain</span>' if current else "") \
        + (' <span class="badge">superseded</span>' if entry.get("superseded") else "")
    seconds = entry.get("seconds", 0)
    seconds = f"{seconds:.1f} s" if isinstance(seconds, (int, float)) else ""
    parts = [f'<section class="{" ".join(classes)}" id="{folder}" data-stage="{stage}" '
             f'data-entry="{folder}">',
             f'<h2><span class="stage {stage}">{stage}</span> {folder}{badges}</h2>',
             f'<div class="meta">{html.escape(str(entry.get("created", "")))} by '
             f'{html.escape(str(entry.get("user", "?")))}@{html.escape(str(entry.get("host", "?")))}, '
             f'{seconds}, lightledger {html.escape(str(entry.get("software_version", "")))}'
             + (f', made from {html.escape(str(entry["made_from"]))}' if entry.get("made_from") else "")
             + (f'; previous entry of this stage {html.escape(entry["previous"])}'
                if entry.get("previous") else "")
             + ("; its input differs from the previous entry's" if entry.get("input_changed") else "")
             + ("; superseded by a forced re-run" if entry.get("superseded") else "") + "</div>",
             *(['<ul class="warnings">'
                + "".join(f"<li>warning: {html.escape(str(w))}</li>" for w in entry["warnings"])
                + "</ul>"] if entry.get("warnings") else []),
             '<div class="cols"><div><table><tr><th>parameter</th><th>value</th></tr>']
    changed = entry.get("changed", {})
    idle = entry.get("not_applying") if isinstance(entry.get("not_applying"), dict) else {}
    for name, value in entry.get("params", {}).items():
        note = (f' title="does not apply: {html.escape(str(idle[name]), quote=True)}"'
                if name in idle else "")
        cls = " ".join(c for c in ("changed" if name in changed else "",
                                   "idle" if name in idle else "") if c)
        row = f'<tr class="{cls}"{note}>' if cls or note else "<tr>"
        if name in changed:
            old = html.escape(_fmt(changed[name][0]))
            parts.append(f'{row}<td>{html.escape(name)}</td><td>'
                         f'<span class="old">{old}</span>{html.escape(_fmt(value))}</td></tr>')
        else:
            parts.append(f"{row}<td>{html.escape(name)}</td><td>{html.escape(_fmt(value))}</td></tr>")
    parts.append("</table></div><div><table><tr><th>headline</th><th>value</th></tr>")
    metrics = entry.get("metrics", {})
    for name, value in (metrics.items() if isinstance(metrics, dict) else []):
        parts.append(f"<tr><td>{html.escape(str(name))}</td><td>{html.escape(_fmt(value))}</td></tr>")
    parts.append("</table></div><div><table><tr><th>products</th></tr>")
    for name in entry.get("outputs", {}):
        if not isinstance(name, str) or Path(name).name != name:
            continue
        href = html.escape(f"{entry['path']}/{name}")
        parts.append(f'<tr><td><a href="{href}">{html.escape(name)}</a></td></tr>')
    parts.append("</table></div></div><div class=\"figs\">")
    for png in _own_pngs(entry, notebook):
        name = html.escape(png.name)
        if current:
            data = base64.b64encode(png.read_bytes()).decode()
            parts.append(f'<img alt="{name}" src="data:image/png;base64,{data}">')
        else:
            parts.append(f'<a href="{folder}/{name}">figure {name}</a>')
    parts.append("</div></section>")
    return "\n".join(parts)


#: At most this many entries of a stage are overlaid in its comparison figure.
OVERLAY_ENTRIES = 6


def _overlay_html(stage, entries, notebook):
    """One embedded figure overlaying the spectra of a stage's newest current entries."""
    current = [e for e in entries if e["stage"] == stage and not e.get("superseded")]
    current = current[-OVERLAY_ENTRIES:]
    if len(current) < 2:
        return ""
    labelled = []
    for k, e in enumerate(current):
        changed = parameter_changes(current[k - 1].get("params", {}), e.get("params", {})) if k else {}
        label = e["path"] + ("".join(f"\n{n} = {_fmt(v[1])}" for n, v in list(changed.items())[:3]))
        labelled.append((label, Path(notebook) / e["path"]))
    try:
        from .figures import overlay_png
        png = overlay_png(stage, labelled)
    except Exception:          # a figure that cannot be drawn never stops the page
        return ""
    if not png:
        return ""
    data = base64.b64encode(png).decode()
    return (f'<div class="figs"><img alt="{html.escape(stage)}: the newest current entries '
            f'compared" src="data:image/png;base64,{data}"></div>')


def _contents_html(entries, chain, notebook):
    stages = sorted({e["stage"] for e in entries}, key=lambda s: (_stage_rank(s), s))
    parts = ["<nav><h2>Contents</h2>"]
    for stage in stages:
        parts.append(f'<div><span class="stage {html.escape(stage)}">{html.escape(stage)}</span><ul>')
        for e in reversed([e for e in entries if e["stage"] == stage]):
            mark = " &larr; current chain" if e["path"] in chain else ""
            old = " (superseded)" if e.get("superseded") else ""
            parts.append(f'<li><a href="#{html.escape(e["path"])}">{html.escape(e["path"])}</a> '
                         f'{html.escape(str(e.get("created", "")))}{old}{mark}</li>')
        parts.append("</ul>" + _overlay_html(stage, entries, notebook) + "</div>")
    parts.append("</nav>")
    return "\n".join(parts)


def render_page(notebook):
    """The texts of ``notebook.json`` and ``index.html`` the entries give (a dict by name)."""
    notebook = Path(notebook)
    unreadable = []
    entries = collect_entries(notebook, unreadable=unreadable)
    chain = current_chain(entries)
    visit = str(entries[-1].get("visit", "")) if entries else notebook.parent.name
    doc = {"visit": visit, "current": chain, "unreadable": unreadable, "entries": [
        {k: v for k, v in e.items() if k != "previous"} | {"previous": e.get("previous"),
                                                            "current": e["path"] in chain}
        for e in entries]}
    body = "\n".join(_entry_html(e, notebook, e["path"] in chain) for e in reversed(entries))
    warn = ""
    if unreadable:
        warn = ('<p class="warn">Folders whose entry.json is not a valid entry (left out): '
                + ", ".join(html.escape(n) for n in unreadable) + "</p>")
    page = (f"<!DOCTYPE html>\n<html lang=\"en\"><head><meta charset=\"utf-8\">"
            f"<title>lightledger notebook: {html.escape(visit)}</title>"
            f"<style>{_STYLE}</style></head><body>"
            f"<h1>lightledger notebook: {html.escape(visit)}</h1>"
            f"<p>{len(entries)} entries, newest first. Highlighted parameters differ from the "
            f"previous entry of the same stage; the figures of the current chain are shown, the "
            f"others are linked from their folders. Machine-readable: "
            f"<a href=\"notebook.json\">notebook.json</a>.</p>\n{warn}"
            f"{_contents_html(entries, chain, notebook)}\n{body}\n</body></html>\n")
    return {"notebook.json": json.dumps(doc, indent=2, default=str) + "\n", "index.html": page}


def write_page(notebook):
    """Write ``index.html`` and ``notebook.json`` into a notebook folder.

    Returns the path of ``index.html`` (None when the folder does not exist).
    Written under the notebook's lock, so concurrent reducers never interleave.
    """
    notebook = Path(notebook)
    if not notebook.is_dir():
        return None
    with locks.locked(locks.notebook_lock_path(notebook)):
        texts = render_page(notebook)
        for name, text in texts.items():
            with atomic_path(notebook / name) as tmp:
                tmp.write_text(text, encoding="utf-8")
    return notebook / "index.html"


# ---------------------------------------------------------------------------
# housekeeping
# ---------------------------------------------------------------------------

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
