"""The notebook page of a visit: ``index.html`` and ``notebook.json``.

Every stage folder ``NOTEBOOK/STAGE-IDENT/`` holds an ``entry.json`` written
when the stage completed.  This module gathers them in time order into a
machine-readable ``notebook.json`` and a static, self-contained
``index.html`` (inline style, figures embedded as data URIs, relative links
to the products; it requests nothing from a network).  For each entry the
page shows when and by whom it ran, the stage, its parameters with the ones
that differ from the previous entry of the same stage highlighted, its
headline figures, its figures and links to its products.
"""

import base64
import html
import json
from pathlib import Path

from .base import ENTRY_NAME
from .products import atomic_path, write_json

__all__ = ["collect_entries", "write_page", "parameter_changes"]


def collect_entries(notebook):
    """Every entry of a notebook folder, oldest first.

    Returns a list of dicts (the entry.json contents) with an added key
    ``path`` (the folder, relative to the notebook) and ``changed`` (the
    parameter names that differ from the previous entry of the same stage).
    """
    notebook = Path(notebook)
    entries = []
    for file in sorted(notebook.glob(f"*/{ENTRY_NAME}")):
        try:
            entry = json.loads(file.read_text(encoding="utf-8"))
        except (OSError, json.JSONDecodeError):
            continue
        entry["path"] = file.parent.name
        entry["superseded"] = ".superseded-" in file.parent.name
        entries.append(entry)
    entries.sort(key=lambda e: (e.get("created", ""), e["path"]))
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
.meta { color: #555; font-size: 0.9em; margin: 0.3em 0 0.6em; }
.stage { display: inline-block; padding: 0 0.5em; border-radius: 4px; color: white; }
.calibrate { background: #4a6fa5; } .extract { background: #5a8f5a; }
.bin { background: #a5774a; } .detrend { background: #8a4aa5; }
table { border-collapse: collapse; font-size: 0.9em; margin: 0.4em 0; }
td, th { border-bottom: 1px solid #eee; padding: 2px 8px; text-align: left; }
tr.changed td { background: #fff2a8; font-weight: 600; }
.old { color: #a33; text-decoration: line-through; font-weight: normal; margin-right: 0.5em; }
.figs img { max-width: 100%; border: 1px solid #ddd; margin: 0.3em 0; }
.cols { display: flex; gap: 2em; flex-wrap: wrap; }
"""


def _entry_html(entry, notebook):
    folder = Path(notebook) / entry["path"]
    stage = html.escape(entry["stage"])
    cls = "entry superseded" if entry.get("superseded") else "entry"
    parts = [f'<section class="{cls}" data-stage="{stage}" data-entry="{html.escape(entry["path"])}">',
             f'<h2><span class="stage {stage}">{stage}</span> {html.escape(entry["path"])}</h2>',
             f'<div class="meta">{html.escape(entry.get("created", ""))} by '
             f'{html.escape(entry.get("user", "?"))}@{html.escape(entry.get("host", "?"))}, '
             f'{entry.get("seconds", 0):.1f} s, lightledger {html.escape(entry.get("software_version", ""))}'
             + (f', made from {html.escape(entry["made_from"])}' if entry.get("made_from") else "")
             + (f'; previous entry of this stage {html.escape(entry["previous"])}'
                if entry.get("previous") else "")
             + ("; its input differs from the previous entry's" if entry.get("input_changed") else "")
             + ("; superseded by a forced re-run" if entry.get("superseded") else "") + "</div>",
             '<div class="cols"><div><table><tr><th>parameter</th><th>value</th></tr>']
    changed = entry.get("changed", {})
    for name, value in entry.get("params", {}).items():
        if name in changed:
            old = html.escape(_fmt(changed[name][0]))
            parts.append(f'<tr class="changed"><td>{html.escape(name)}</td><td>'
                         f'<span class="old">{old}</span>{html.escape(_fmt(value))}</td></tr>')
        else:
            parts.append(f"<tr><td>{html.escape(name)}</td><td>{html.escape(_fmt(value))}</td></tr>")
    parts.append("</table></div><div><table><tr><th>headline</th><th>value</th></tr>")
    for name, value in entry.get("metrics", {}).items():
        parts.append(f"<tr><td>{html.escape(name)}</td><td>{html.escape(_fmt(value))}</td></tr>")
    parts.append("</table></div><div><table><tr><th>products</th></tr>")
    for name in entry.get("outputs", {}):
        href = html.escape(f"{entry['path']}/{name}")
        parts.append(f'<tr><td><a href="{href}">{html.escape(name)}</a></td></tr>')
    parts.append("</table></div></div><div class=\"figs\">")
    for name in entry.get("figures", []):
        png = folder / name
        if png.is_file():
            data = base64.b64encode(png.read_bytes()).decode()
            parts.append(f'<img alt="{html.escape(name)}" src="data:image/png;base64,{data}">')
    parts.append("</div></section>")
    return "\n".join(parts)


def write_page(notebook):
    """Write ``index.html`` and ``notebook.json`` into a notebook folder.

    Returns the path of ``index.html`` (None when the folder does not exist).
    """
    notebook = Path(notebook)
    if not notebook.is_dir():
        return None
    entries = collect_entries(notebook)
    visit = entries[-1]["visit"] if entries else notebook.parent.name
    doc = {"visit": visit, "entries": [
        {k: v for k, v in e.items() if k != "previous"} | {"previous": e.get("previous")}
        for e in entries]}
    write_json(notebook / "notebook.json", doc)
    body = "\n".join(_entry_html(e, notebook) for e in reversed(entries))
    page = (f"<!DOCTYPE html>\n<html lang=\"en\"><head><meta charset=\"utf-8\">"
            f"<title>lightledger notebook: {html.escape(visit)}</title>"
            f"<style>{_STYLE}</style></head><body>"
            f"<h1>lightledger notebook: {html.escape(visit)}</h1>"
            f"<p>{len(entries)} entries, newest first. Highlighted parameters differ from the "
            f"previous entry of the same stage. Machine-readable: "
            f"<a href=\"notebook.json\">notebook.json</a>.</p>\n{body}\n</body></html>\n")
    path = notebook / "index.html"
    with atomic_path(path) as tmp:
        tmp.write_text(page, encoding="utf-8")
    return path
