"""The programme page (``programme.html``): every visit's page, the joint fit beside each visit's own.

Self-contained (figures embedded, inline style, no network); written into
the programme's notebook by :func:`lightledger.tasks.programme.reduce_programme`
after the joint stage.
"""

import base64
import html
import json
import os
from pathlib import Path

import numpy as np

from .base import ENTRY_NAME, visit_config
from .products import atomic_path

__all__ = ["write_programme_page"]



_STYLE = ("body{font-family:sans-serif;max-width:1100px;margin:1em auto;color:#222}"
          "table{border-collapse:collapse;font-size:12px;margin:0.5em 0}"
          "td,th{border:1px solid #ccc;padding:2px 6px;text-align:right}"
          "th{background:#eee}img{max-width:100%;border:1px solid #ddd;margin:4px 0}"
          "tr.joint td{font-weight:bold;background:#f4f8ff}")


def _fmt(x, scale=1.0, digits=1):
    if np.ma.is_masked(x):
        return ""
    try:
        v = float(x) * scale
    except (TypeError, ValueError):
        return html.escape(str(x))
    return "" if not np.isfinite(v) else f"{v:.{digits}f}"


def write_programme_page(prog, folder):
    """Write ``programme.html`` into the programme's notebook; returns its path.

    The page links every visit's notebook page, shows the latest joint
    entry's figures, the white-band and per-channel results, and the table
    of each visit fitted alone beside the joint fit with the chi-square of
    their consistency.  Self-contained: figures are embedded.
    """
    from astropy.table import Table

    notebook = Path(prog.notebook)
    notebook.mkdir(parents=True, exist_ok=True)
    parts = [f"<h1>lightledger programme: {html.escape(prog.name)}</h1>",
             f"<p>Programme description: {html.escape(str(prog.path))}</p><h2>Visits</h2><ul>"]
    for file in prog.visits:
        visit = visit_config(file)
        page = Path(visit.notebook) / "index.html"
        rel = Path(_relpath(page, notebook))
        parts.append(f"<li><a href=\"{html.escape(str(rel))}\">{html.escape(visit.name)}</a> "
                     f"({html.escape(str(file))})</li>")
    parts.append("</ul>")
    entry_file = Path(folder) / ENTRY_NAME
    if entry_file.is_file():
        entry = json.loads(entry_file.read_text(encoding="utf-8"))
        parts.append(f"<h2>Joint fit <small>{html.escape(Path(folder).name)}, "
                     f"{html.escape(entry['created'])}, {entry['seconds']} s</small></h2>")
        parts.append("<table>" + "".join(
            f"<tr><th style='text-align:left'>{html.escape(k)}</th><td>{html.escape(str(v))}</td></tr>"
            for k, v in entry["metrics"].items()) + "</table>")
        planet = Path(folder) / "planet.fits"
        tab = Table.read(planet, hdu="PLANET")
        cols = [("channel", 1, 0), ("wave_mid", 1, 3), ("transit_depth", 1e6, 0),
                ("transit_depth_error", 1e6, 0), ("eclipse_depth", 1e6, 0),
                ("eclipse_depth_error", 1e6, 0), ("night_flux", 1e6, 0),
                ("night_flux_error", 1e6, 0), ("amplitude", 1e6, 0), ("amplitude_error", 1e6, 0),
                ("amplitude_error_lo", 1e6, 0), ("amplitude_error_hi", 1e6, 0),
                ("offset_deg", 1, 1), ("offset_error_deg", 1, 1), ("offset_error_lo_deg", 1, 1),
                ("offset_error_hi_deg", 1, 1), ("rms_over_expected", 1, 3)]
        cols = [c for c in cols if c[0] in tab.colnames]     # (products made before the sides)
        parts.append("<h3>Planet per channel (ppm, degrees; channel -1 = white band; "
                     "*_lo, *_hi: the two sides of the 68 % interval)</h3>"
                     + _html_table(tab, cols))
        try:
            grid = Table.read(planet, hdu="GRID")
        except (KeyError, ValueError):
            grid = None
        if grid is not None:
            g_cols = [("model", None, 0), ("rank", 1, 0), ("weight", 1, 3), ("n_params", 1, 0),
                      ("chi2", 1, 1), ("bic", 1, 1), ("aic", 1, 1), ("transit_depth", 1e6, 0),
                      ("transit_depth_error", 1e6, 0), ("eclipse_depth", 1e6, 0),
                      ("eclipse_depth_error", 1e6, 0), ("amplitude", 1e6, 0),
                      ("amplitude_error", 1e6, 0), ("offset_deg", 1, 1), ("status", None, 0)]
            white = grid[grid["channel"] == -1]
            white = white[np.argsort(np.asarray(white["rank"]), kind="stable")]
            parts.append("<h3>Grid of systematics models (white band; ppm): every model fitted "
                         "to every visit, ranked by the information criterion (weight); the "
                         "planet per channel above is marginalised over it</h3>"
                         + _html_table(white, g_cols))
        try:
            alone = Table.read(planet, hdu="ALONE")
            cons = Table.read(planet, hdu="CONSISTENCY")
        except (KeyError, ValueError):
            alone = cons = None
        if alone is not None:
            a_cols = [("name", None, 0), ("channel", 1, 0), ("transit_depth", 1e6, 0),
                      ("transit_depth_error", 1e6, 0), ("eclipse_depth", 1e6, 0),
                      ("eclipse_depth_error", 1e6, 0), ("night_flux", 1e6, 0),
                      ("night_flux_error", 1e6, 0), ("amplitude", 1e6, 0),
                      ("amplitude_error", 1e6, 0), ("offset_deg", 1, 1),
                      ("offset_error_deg", 1, 1)]
            white = alone[alone["channel"] == -1]
            parts.append("<h3>Each visit alone beside the joint fit (white band; ppm)</h3>"
                         + _html_table(white, a_cols, joint_row=True))
            wc = cons[cons["channel"] == -1]
            parts.append("<h3>Consistency of the visits with the joint fit (white band)</h3>"
                         + _html_table(wc, [("quantity", None, 0), ("chi2", 1, 2),
                                            ("n_visits", 1, 0)]))
        for name in entry["figures"]:
            png = Path(folder) / name
            if png.is_file():
                data = base64.b64encode(png.read_bytes()).decode("ascii")
                parts.append(f"<h3>{html.escape(name)}</h3><img alt=\"{html.escape(name)}\" "
                             f"src=\"data:image/png;base64,{data}\">")
        links = ", ".join(f"<a href=\"{html.escape(Path(folder).name)}/{html.escape(n)}\">"
                          f"{html.escape(n)}</a>" for n in entry["outputs"])
        parts.append(f"<p>Products: {links}</p>")
    page = (f"<!DOCTYPE html>\n<html lang=\"en\"><head><meta charset=\"utf-8\">"
            f"<title>lightledger programme: {html.escape(prog.name)}</title>"
            f"<style>{_STYLE}</style></head><body>" + "\n".join(parts) + "</body></html>\n")
    path = notebook / "programme.html"
    with atomic_path(path) as tmp:
        tmp.write_text(page, encoding="utf-8")
    return path


def _relpath(target, start):
    return os.path.relpath(target, start)


def _html_table(tab, cols, joint_row=False):
    head = "".join(f"<th>{html.escape(c)}</th>" for c, _, _ in cols)
    rows = []
    for r in tab:
        cls = " class='joint'" if joint_row and int(r["visit"]) == -1 else ""
        cells = "".join(f"<td>{html.escape(str(r[c])) if s is None else _fmt(r[c], s, d)}</td>"
                        for c, s, d in cols)
        rows.append(f"<tr{cls}>{cells}</tr>")
    return f"<table><tr>{head}</tr>{''.join(rows)}</table>"
