"""Auditing a notebook: entries, products, checksums, recorded inputs and lineage.

``audit(PATH)`` takes a product, a stage folder, a notebook folder or a visit
description (whose notebook is audited) and reports one line per problem:

* every stage folder (current or superseded) has a valid ``entry.json``: a
  missing entry whose folder records that it was written is a problem, a
  garbage entry is a problem; a folder still being made by a running
  reduction, or left without entry by an interrupted one, is noted (the next
  reduction completes it);
* every output an entry lists (FITS, ECSV, figures) exists with the SHA-256
  the entry recorded; FITS products pass their CHECKSUM and DATASUM, ECSV
  products their own ``lightledger.checksum``;
* the content a stage used (its parameters, the visit facts, its code
  version, what it was made from; for the first stage the raw and reference
  files' digests and the profile's settings) still gives the entry's
  identity: an entry edited by hand does not;
* every input an entry or a product records (by path relative to its folder
  and by SHA-256) exists with those bytes; when the folder it named was
  superseded by a forced re-run, the input is looked for in the superseded
  folders and matched by its SHA-256;
* products made from a damaged product are reported as stale;
* ``notebook.json`` and ``index.html`` are generated from the entries again
  and compared with the files (out of date after an interrupted run: written
  again, with a note).

Every file is read inside a guard: an unreadable file is a problem line,
never a traceback.
"""

import re
import warnings
from dataclasses import dataclass, field
from pathlib import Path

from lightledger.pipeline.errors import InputFileError

from . import locks
from .entries import ENTRY_NAME, MADE_SUFFIX, read_entry
from .digests import sha256_of
from .products import ecsv_checksum_ok, read_provenance

__all__ = ["AuditReport", "audit", "find_products", "stage_folders", "resolve_recorded",
           "STAGE_FOLDER"]

_PRODUCT_SUFFIXES = (".fits", ".ecsv")
#: Name of a stage folder: STAGE-IDENT, or STAGE-IDENT.superseded-TIME for one moved aside.
STAGE_FOLDER = re.compile(r"^(?P<stage>[a-z][a-z0-9_]*)-(?P<ident>[0-9a-f]{10})"
                          r"(?P<superseded>\.superseded-[0-9A-Za-z_-]+)?$")


@dataclass
class AuditReport:
    """Result of an audit: printable lines, one message per problem, notes."""

    lines: list = field(default_factory=list)
    problems: list = field(default_factory=list)
    notes: list = field(default_factory=list)
    n_products: int = 0
    n_entries: int = 0


def stage_folders(notebook):
    """Stage folders (current and superseded) directly under a notebook folder."""
    notebook = Path(notebook)
    try:
        return sorted(p for p in notebook.iterdir() if p.is_dir() and STAGE_FOLDER.match(p.name))
    except OSError:
        return []


def _target(path):
    """(kind, path): 'notebook', 'folder' or 'product'."""
    path = Path(path)
    if not path.exists():
        raise InputFileError(f"{path}: no such file or folder to audit")
    if path.is_file() and path.suffix == ".toml":
        from .config import load_visit
        from .programme import is_programme, load_programme
        notebook = Path(load_programme(path).notebook if is_programme(path)
                        else load_visit(path).notebook)
        if not notebook.is_dir():
            raise InputFileError(f"{notebook}: {path.name} has no notebook yet; run lightledger "
                                 f"reduce first")
        return "notebook", notebook.resolve()
    if path.is_file():
        return "product", path.resolve()
    if STAGE_FOLDER.match(path.name):
        return "folder", path.resolve()
    if stage_folders(path):
        return "notebook", path.resolve()
    if (path / "notebook").is_dir() and stage_folders(path / "notebook"):
        return "notebook", (path / "notebook").resolve()
    raise InputFileError(f"{path}: no notebook entries or products found")


def find_products(path):
    """Products (FITS and ECSV files) under ``path`` (a product, a folder or a notebook)."""
    kind, path = _target(path)
    if kind == "product":
        return [path]
    folders = [path] if kind == "folder" else stage_folders(path)
    return [p for f in folders for p in _folder_products(f)]


def _folder_products(folder):
    try:
        return sorted(p.resolve() for p in Path(folder).iterdir()
                      if p.suffix in _PRODUCT_SUFFIXES and not p.name.startswith(".") and p.is_file())
    except OSError:
        return []


def resolve_recorded(base, name, digest, sha=sha256_of):
    """Where an input recorded as ``name`` (relative to ``base``) with ``digest`` is now.

    Returns ``(path, status)``: status ``"ok"`` (the path holds those bytes,
    possibly in a superseded copy of the folder it named), ``"changed"`` or
    ``"missing"``.
    """
    path = (Path(base) / name).resolve() if not Path(name).is_absolute() else Path(name)
    status = "missing"
    if path.is_file():
        if not digest or _safe_sha(sha, path) == digest:
            return path, "ok"
        status = "changed"
    parent = path.parent
    if STAGE_FOLDER.match(parent.name) and not STAGE_FOLDER.match(parent.name).group("superseded"):
        for old in sorted(parent.parent.glob(f"{parent.name}.superseded-*"), reverse=True):
            candidate = old / path.name
            if candidate.is_file() and digest and _safe_sha(sha, candidate) == digest:
                return candidate, "ok"
    return path, status


def _safe_sha(sha, path):
    try:
        return sha(path)
    except OSError:
        return None


class _Checker:
    """Checks entries and products once each and remembers what they were made from."""

    def __init__(self):
        self.problems = {}   # product or folder -> its own problems
        self.inputs = {}     # product -> {resolved input path: recorded sha256}
        self._sha = {}
        self.notes = []

    def sha(self, path):
        path = Path(path)
        if path not in self._sha:
            self._sha[path] = sha256_of(path)
        return self._sha[path]

    # -- entries -------------------------------------------------------------------
    def check_folder(self, folder):
        """Problems of a stage folder's entry (outputs, identity, inputs)."""
        folder = Path(folder)
        entry_path = folder / ENTRY_NAME
        problems = []
        if not entry_path.exists():
            if (folder / f".{ENTRY_NAME}{MADE_SUFFIX}").exists():
                problems.append(f"{folder}: its entry.json is missing (it was written; removed "
                                f"since?)")
            elif not self._idle(folder):
                self.notes.append(f"{folder.name}: being made by a running reduction")
            else:
                self.notes.append(f"{folder.name}: incomplete (no entry.json): an interrupted run; "
                                  f"the next reduce completes it")
            return problems, None
        entry = read_entry(entry_path)
        if entry is None:
            problems.append(f"{entry_path}: not a valid notebook entry (unreadable, not JSON, or "
                            f"missing stage, params or outputs)")
            return problems, None
        problems += self._identity_problems(folder, entry)
        for name, digest in entry["outputs"].items():
            if not isinstance(name, str) or Path(name).name != name or name.startswith("."):
                problems.append(f"{entry_path}: output name {name!r} is not a file of its folder")
                continue
            path = folder / name
            if not path.is_file():
                problems.append(f"{path}: missing (its entry lists it)")
            else:
                try:
                    if self.sha(path) != digest:
                        problems.append(f"{path}: its bytes differ from the SHA-256 its entry "
                                        f"recorded")
                except OSError as exc:
                    problems.append(f"{path}: unreadable ({exc.strerror or exc})")
        for name, digest in (entry.get("inputs") or {}).items():
            source, status = resolve_recorded(folder, name, digest, self.sha)
            if status == "missing":
                problems.append(f"{folder.name}: input {source} is missing")
            elif status == "changed":
                problems.append(f"{folder.name}: input {source} has changed since the entry was "
                                f"made")
        return problems, entry

    @staticmethod
    def _idle(folder):
        with locks.locked(locks.folder_lock_path(folder), blocking=False) as held:
            return held

    @staticmethod
    def _identity_problems(folder, entry):
        """The content the stage used must still give its identity and folder name."""
        from lightledger.pipeline.parameters import STAGES

        from .identities import _hash, raw_identity_from_record

        match = STAGE_FOLDER.match(folder.name)
        problems = []
        if match and (match.group("stage") != entry["stage"]
                      or (entry.get("identity") and match.group("ident") != entry["identity"])):
            problems.append(f"{folder}/{ENTRY_NAME}: records stage {entry['stage']} identity "
                            f"{entry.get('identity')}, not the folder's")
        ident = entry.get("identity_hash")
        if not ident or "upstream" not in entry or entry["stage"] not in STAGES:
            return problems          # an entry of an older version: nothing to recompute
        try:
            params = sorted((k, v) for k, v in entry["params"].items())
            if _hash(entry["stage"], entry["stage_version"], params, entry.get("facts", []),
                     entry["upstream"]) != ident or (match and not ident.startswith(match.group("ident"))):
                problems.append(f"{folder}/{ENTRY_NAME}: its parameters, visit facts and upstream "
                                f"no longer give its identity (edited?)")
            raw = entry.get("raw")
            if raw is not None and raw_identity_from_record(raw) != entry["upstream"]:
                problems.append(f"{folder}/{ENTRY_NAME}: its raw and reference file digests no "
                                f"longer give its raw identity (edited?)")
        except (TypeError, KeyError, AttributeError, ValueError) as exc:
            problems.append(f"{folder}/{ENTRY_NAME}: malformed identity record ({exc})")
        return problems

    # -- products ------------------------------------------------------------------
    def check(self, product):
        """Problems of one product (checksums, recorded inputs); remembered."""
        product = Path(product)
        if product in self.problems:
            return self.problems[product]
        problems = []
        if product.suffix == ".fits":
            problems += _checksum_problems(product)
        elif product.suffix == ".ecsv":
            try:
                ok = ecsv_checksum_ok(product)
            except OSError as exc:
                ok = False
                problems.append(f"{product}: unreadable ({exc.strerror or exc})")
            if ok is False and not problems:
                problems.append(f"{product}: its bytes differ from its own checksum "
                                f"(lightledger.checksum)")
        prov = {}
        if not problems:
            try:
                with warnings.catch_warnings():
                    warnings.simplefilter("ignore")
                    prov = read_provenance(product)
            except Exception:  # a damaged product: one line, never a traceback
                problems.append(f"{product}: its provenance is unreadable (damaged product)")
        inputs = {}
        recorded = prov.get("inputs", {}) if isinstance(prov, dict) else {}
        for name, digest in (recorded.items() if isinstance(recorded, dict) else []):
            source, status = resolve_recorded(product.parent, name, digest, self.sha)
            inputs[source] = digest
            if status == "missing":
                problems.append(f"{product}: input {source} is missing")
            elif status == "changed":
                problems.append(f"{product}: input {source} has changed since the product was made")
        self.problems[product] = problems
        self.inputs[product] = inputs
        return problems

    def is_product(self, path):
        """True for a notebook product (it sits in a stage folder)."""
        return Path(path).suffix in _PRODUCT_SUFFIXES and bool(STAGE_FOLDER.match(Path(path).parent.name))

    def upstream_problem(self, product, seen=None):
        """The first damaged product further up the lineage of ``product``, or None."""
        seen = set() if seen is None else seen
        for source in self.inputs.get(product, {}):
            if source in seen or not self.is_product(source) or not source.exists():
                continue
            seen.add(source)
            if self.check(source):
                return source
            found = self.upstream_problem(source, seen)
            if found:
                return found
        return None


def _checksum_problems(path):
    from astropy.io import fits

    problems = []
    try:
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")
            with fits.open(path, checksum=False) as hdul:
                for i, hdu in enumerate(hdul):
                    name = hdu.name or str(i)
                    if "CHECKSUM" not in hdu.header or "DATASUM" not in hdu.header:
                        problems.append(f"{path}: HDU {name} has no CHECKSUM/DATASUM")
                        continue
                    if hdu.verify_datasum() != 1:
                        problems.append(f"{path}: HDU {name} DATASUM does not match its data")
                    elif hdu.verify_checksum() != 1:
                        problems.append(f"{path}: HDU {name} CHECKSUM does not match its header")
    except Exception:  # a truncated or garbled file; astropy's hints would not help here
        problems.append(f"{path}: not a readable FITS file (truncated, damaged or not FITS)")
    return problems


def audit(path):
    """Audit one product, a stage folder, or every entry and product of a notebook.

    Parameters
    ----------
    path : str or Path

    Returns
    -------
    AuditReport
    """
    kind, path = _target(path)
    report = AuditReport()
    checker = _Checker()
    if kind == "product":
        products = [path]
        folders = []
    else:
        folders = [path] if kind == "folder" else stage_folders(path)
        products = [p for f in folders for p in _folder_products(f)]
    report.n_products = len(products)
    for folder in folders:
        problems, entry = checker.check_folder(folder)
        report.problems += problems
        report.n_entries += entry is not None
    for product in products:
        own = checker.check(product)
        report.problems += own
        if not own:
            bad = checker.upstream_problem(product)
            if bad is not None:
                report.problems.append(f"{product}: stale: made from {bad.parent.name}/{bad.name}, "
                                       f"which is damaged or whose own inputs are missing or changed")
    if kind == "notebook":
        report.notes += _page_notes(path, report)
    report.notes = checker.notes + report.notes
    report.lines += _lineage(products, checker)
    return report


def _page_notes(notebook, report):
    """Compare notebook.json and index.html with what the entries give; write them again if not."""
    from .notebook import render_page, write_page

    try:
        expected = render_page(notebook)
    except Exception as exc:
        report.problems.append(f"{notebook}: the notebook page cannot be generated from the "
                               f"entries ({type(exc).__name__}: {exc})")
        return []
    stale = []
    for name, text in expected.items():
        try:
            same = (Path(notebook) / name).read_text(encoding="utf-8") == text
        except (OSError, UnicodeDecodeError):
            same = False
        if not same:
            stale.append(name)
    if not stale:
        return []
    try:
        write_page(notebook)
    except OSError as exc:
        report.problems.append(f"{notebook}: {' and '.join(stale)} differ from the entries and "
                               f"cannot be written again ({exc.strerror or exc})")
        return []
    return [f"{' and '.join(stale)} did not match the entries (an interrupted or concurrent run); "
            f"written again from them"]


def _lineage(products, checker):
    """Lines of the lineage tree from the most downstream products back to the raw files."""
    consumed = {src for ins in checker.inputs.values() for src in ins}
    tips = [p for p in products if p not in consumed and p.suffix == ".fits"
            and ".superseded-" not in p.parent.name] or products[-1:]
    lines = ["lineage:"]
    shown = set()

    def walk(path, depth):
        label = f"{path.parent.name}/{path.name}"
        lines.append("  " * depth + ("- " if depth else "") + label + (" (above)" if path in shown else ""))
        if path in shown:
            return
        shown.add(path)
        if path not in checker.inputs and path.exists() and checker.is_product(path):
            checker.check(path)
        ins = checker.inputs.get(path, {})
        made = [p for p in ins if p.exists() and checker.is_product(p)]
        others = sorted(p.name for p in ins if p not in made)
        for source in made:
            walk(source, depth + 1)
        if others:
            head = ", ".join(others[:4]) + (f" and {len(others) - 4} more" if len(others) > 4 else "")
            lines.append("  " * (depth + 1) + f"- {len(others)} raw or reference files: {head}")

    for tip in tips:
        walk(tip, 0)
    return lines
