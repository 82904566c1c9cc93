"""Comparing two notebook entries or two products.

``compare(A, B)`` takes two stage folders (entries) or two product files
(FITS or ECSV) and returns printable lines:

1. **what they are**: stage, visit, target and event of each; a warning when
   A and B come from different visits, targets or events (or different raw
   data of one visit);
2. **their lineages**: both are walked back to the raw files through the
   entries they were made from, and every parameter that differs in any
   stage (and every visit fact a stage used) is listed as
   ``stage.key: A -> B``;
3. **the numbers** of every table the two products share:

   * depths: per channel and the white band, A, B and their difference in
     units of the combined error;
   * light curves (raw or detrended): per channel and the white band, the
     out-of-event scatter and the point-to-point scatter (ppm, from the
     median absolute deviation of successive differences) of each, and
     the differences between A and B in units of their errors (median,
     largest) when they have the same exposures; the event comes from the
     visit's ephemeris as the stages recorded it;
   * spectra: the per-pixel differences in units of their errors, over all
     exposures and in ten wavelength ranges;
   * any other table: the largest difference of each numeric column.

The scatter out of the event, not the rms of the whole light curve, is what
a tweak of the reduction should be judged by (the event itself, orbit ramps
and other systematics dominate a raw rms); the point-to-point scatter is
insensitive to slow trends altogether.

This module finds what A and B are and compares their lineages; the numbers
are compared in :mod:`.comparenumbers`.
"""

from pathlib import Path

from lightledger.pipeline.errors import InputFileError

from .audit import resolve_recorded
from .comparenumbers import (_PLANET, _depths, _ecsv_kind, _fmt, _generic,  # noqa: F401
                             _light_curves, _narrow, _numbers, _planet, _read, _scatter, _series,
                             _spectra, out_of_event)
from .entries import ENTRY_NAME, read_entry
from .notebookentries import collect_entries, entry_sources, parameter_changes

__all__ = ["compare", "main_product", "lineage"]

_MAIN = ("detrended.fits", "planet.fits", "lightcurves.fits", "spectra.fits", "exposures.ecsv")


def main_product(folder):
    """The product of a stage folder that :func:`compare` reads."""
    for name in _MAIN:
        if (Path(folder) / name).is_file():
            return Path(folder) / name
    raise InputFileError(f"{folder}: no product to compare in this folder")


# ---------------------------------------------------------------------------
# what A and B are, and where they come from
# ---------------------------------------------------------------------------

class _Side:
    """One side of a comparison: its entry (if any), product, lineage and label."""

    def __init__(self, path):
        path = Path(path)
        if not path.exists():
            raise InputFileError(f"{path}: no such entry or product")
        if path.is_dir():
            entry = read_entry(path / ENTRY_NAME)
            if entry is None:
                if (path / ENTRY_NAME).exists():
                    raise InputFileError(f"{path / ENTRY_NAME}: not a valid notebook entry")
                raise InputFileError(f"{path}: not a complete notebook entry (no {ENTRY_NAME})")
            self.folder, self.product = path.resolve(), main_product(path).resolve()
            self.label = path.name
        else:
            self.product = path.resolve()
            self.folder = self.product.parent
            entry = read_entry(self.folder / ENTRY_NAME)
            self.label = f"{self.folder.name}/{self.product.name}"
            if entry is None:
                entry = _entry_from_provenance(self.product)
        self.entry = entry
        self.lineage = lineage(self.folder) if (self.folder / ENTRY_NAME).exists() else {}
        if not self.lineage and entry is not None:
            self.lineage = {entry["stage"]: entry}

    @property
    def stage(self):
        return self.entry["stage"] if self.entry else "?"

    def describe(self):
        e = self.entry or {}
        event = self.event()
        what = [f"{self.label} ({self.stage})"]
        if e.get("visit"):
            what.append(f"visit \"{e['visit']}\"")
        target = self.target()
        if target:
            what.append(f"target {target}")
        if event:
            what.append(f"{event.get('kind', '?')} at t0 {event.get('t0')}")
        return ", ".join(what)

    def visit(self):
        return next((e.get("visit") for e in self.lineage.values() if e.get("visit")),
                    (self.entry or {}).get("visit"))

    def target(self):
        for e in self.lineage.values():
            if e.get("target"):
                return e["target"]
        return None

    def raw_identity(self):
        first = self.lineage.get("calibrate")
        return first.get("upstream") if first else None

    def event(self):
        """The event ephemeris the stages used (detrend facts), else the visit description's."""
        for e in self.lineage.values():
            if e.get("stage") == "detrend" and isinstance(e.get("facts"), list):
                try:
                    return {k: v for k, v in e["facts"]}
                except (TypeError, ValueError):
                    pass
        notebook = self.folder.parent
        for e in _notebook_entries(notebook):
            if e.get("stage") == "detrend" and e.get("visit") == self.visit() \
                    and isinstance(e.get("facts"), list):
                try:
                    return {k: v for k, v in e["facts"]}
                except (TypeError, ValueError):
                    pass
        for candidate in [(self.entry or {}).get("visit_file"), notebook.parent / "visit.toml"]:
            if not candidate:
                continue
            try:
                from .config import load_visit
                return dict(load_visit(candidate).event)
            except Exception:
                continue
        return None


def _entry_from_provenance(product):
    from .products import read_provenance
    try:
        prov = read_provenance(product)
    except Exception as exc:
        raise InputFileError(f"{product}: not a readable lightledger product ({exc})") from None
    if not prov:
        raise InputFileError(f"{product}: not a lightledger product (no provenance)")
    return {"stage": prov.get("stage", "?"), "params": dict(prov.get("params", {})),
            "visit": prov.get("visit", ""), "outputs": {}}


_ENTRIES = {}


def _notebook_entries(notebook):
    key = str(notebook)
    if key not in _ENTRIES:
        _ENTRIES.clear()
        _ENTRIES[key] = collect_entries(notebook) if Path(notebook).is_dir() else []
    return _ENTRIES[key]


def lineage(folder):
    """{stage: entry} of a stage folder and of every entry it was made from."""
    folder = Path(folder).resolve()
    entries = collect_entries(folder.parent)
    by_path = {e["path"]: e for e in entries}
    start = by_path.get(folder.name)
    if start is None:
        return {}
    found, stack, seen = {}, [start], set()
    while stack:
        entry = stack.pop()
        if entry["path"] in seen:
            continue
        seen.add(entry["path"])
        found.setdefault(entry["stage"], entry)
        stack += [by_path[p] for p in entry_sources(entry, entries) if p in by_path]
    if start["stage"] == "joint":       # a programme's fit reads the visits' notebooks
        for name, digest in (start.get("inputs") or {}).items():
            source = (folder / str(name)).resolve()
            if not source.is_file():
                source, _ = resolve_recorded(folder, str(name), digest)
            if source.parent.parent != folder.parent:
                for stage, entry in lineage(source.parent).items():
                    found.setdefault(f"{entry.get('visit', '?')}: {stage}", entry)
    return found


# ---------------------------------------------------------------------------
# the comparison
# ---------------------------------------------------------------------------

def compare(a, b):
    """Lines describing how entry or product ``b`` differs from ``a``."""
    _ENTRIES.clear()
    side_a, side_b = _Side(a), _Side(b)
    lines = [f"A: {side_a.describe()}", f"B: {side_b.describe()}"]
    lines += _warnings(side_a, side_b)
    lines += _lineage_differences(side_a, side_b)
    lines += _numbers(side_a, side_b)
    return lines


def _warnings(a, b):
    out = []
    if a.visit() and b.visit() and a.visit() != b.visit():
        out.append(f"warning: A and B come from different visits (\"{a.visit()}\" and \"{b.visit()}\")")
    if a.target() and b.target() and a.target() != b.target():
        out.append(f"warning: A and B come from different targets ({a.target()} and {b.target()})")
    ea, eb = a.event(), b.event()
    if ea and eb and any(ea.get(k) != eb.get(k) for k in ("kind", "t0", "period")):
        out.append(f"warning: A and B come from different events ({ea.get('kind')} at t0 "
                   f"{ea.get('t0')}, {eb.get('kind')} at t0 {eb.get('t0')})")
    ra, rb = a.raw_identity(), b.raw_identity()
    if ra and rb and ra != rb:
        out.append(f"warning: A and B were made from different raw data or reference files "
                   f"(raw identities {ra[:10]} and {rb[:10]})")
    if a.stage != b.stage:
        out.append(f"note: A is a {a.stage} product and B a {b.stage} product; only the stages "
                   f"they share are compared")
    return out


def _lineage_differences(a, b):
    stages = [s for s in a.lineage if s in b.lineage]
    out = []
    for stage in _ordered(stages):
        ea, eb = a.lineage[stage], b.lineage[stage]
        for key, (va, vb) in parameter_changes(ea.get("params", {}), eb.get("params", {})).items():
            out.append(f"  {stage}.{key}: {_fmt(va)} -> {_fmt(vb)}")
        if ea.get("facts") is not None and eb.get("facts") is not None and ea["facts"] != eb["facts"]:
            out.append(f"  {stage} visit facts: {_fmt(ea['facts'])} -> {_fmt(eb['facts'])}")
        if ea.get("stage_version") != eb.get("stage_version"):
            out.append(f"  {stage} code version: {ea.get('stage_version')} -> {eb.get('stage_version')}")
    chain_a = " <- ".join(a.lineage[s]["path"] for s in reversed(_ordered(list(a.lineage)))
                          if "path" in a.lineage[s])
    chain_b = " <- ".join(b.lineage[s]["path"] for s in reversed(_ordered(list(b.lineage)))
                          if "path" in b.lineage[s])
    head = []
    if chain_a or chain_b:
        head = [f"lineage A: {chain_a or '(no entries)'}", f"lineage B: {chain_b or '(no entries)'}"]
    if out:
        return head + [f"parameters that differ (in {len(stages)} stages of both lineages):"] + out
    return head + [f"parameters: identical in every stage of both lineages ({', '.join(_ordered(stages))})"
                   if stages else "parameters: no common stage to compare"]


def _ordered(stages):
    """Stages in the reduction's order; a programme's visits' stages ("VISIT: stage") first."""
    from lightledger.pipeline.parameters import STAGE_ORDER

    def key(name):
        visit, _, stage = name.rpartition(": ")
        return (0 if visit else 1, visit, STAGE_ORDER.index(stage) if stage in STAGE_ORDER else 99,
                stage)
    return sorted(stages, key=key)
