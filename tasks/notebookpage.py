"""The notebook page of a visit: ``index.html`` and ``notebook.json`` from the entries.

:func:`render_page` gathers the entries (:mod:`.notebookentries`) in time
order into a machine-readable ``notebook.json`` and a static, self-contained
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
"""

import base64
import html
import json
from pathlib import Path

from . import locks
from .notebookentries import _stage_rank, collect_entries, current_chain, parameter_changes
from .products import atomic_path

__all__ = ["render_page", "write_page", "OVERLAY_ENTRIES"]


_PNG_SIGNATURE = b"\x89PNG\r\n\x1a\n"


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
