"""Auditing products: checksums, recorded inputs and lineage.

For every product found under the path given (a product, a stage folder, a
notebook folder, or a visit description whose notebook is audited):

* FITS products: every HDU's CHECKSUM and DATASUM are verified;
* every product: its SHA-256 is compared with the one its entry recorded;
* every input the product records is looked up: **missing** (gone),
  **changed** (its bytes differ from the recorded SHA-256), or **stale** (the
  input itself is intact but something it was made from is missing or
  changed);
* the lineage is printed from the raw files to the light curves.

Each problem is one line naming the product and what is wrong.
"""

import json
import warnings
from dataclasses import dataclass, field
from pathlib import Path

from astropy.io import fits

from lightledger.pipeline.errors import InputFileError

from .base import ENTRY_NAME
from .products import read_provenance
from .rawio import sha256_of

__all__ = ["AuditReport", "audit", "find_products"]


@dataclass
class AuditReport:
    """Result of an audit: printable lines and one message per problem."""

    lines: list = field(default_factory=list)
    problems: list = field(default_factory=list)
    n_products: int = 0


def find_products(path):
    """Products (FITS and ECSV) under ``path``, and the notebook folder they belong to."""
    path = Path(path)
    if not path.exists():
        raise InputFileError(f"{path}: no such file or folder to audit")
    if path.is_file() and path.suffix == ".toml":
        from .config import load_visit
        path = Path(load_visit(path).notebook)
        if not path.is_dir():
            raise InputFileError(f"{path}: the visit has no notebook yet; run lightledger reduce first")
    if path.is_file():
        return [path]
    products = sorted(p for p in path.rglob("*") if p.suffix in (".fits", ".ecsv")
                      and not p.name.startswith(".") and p.is_file())
    if not products:
        raise InputFileError(f"{path}: no products (FITS or ECSV) found")
    return products


def _checksum_problems(path):
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
                    if hdu.verify_checksum() != 1:
                        problems.append(f"{path}: HDU {name} CHECKSUM does not match")
    except Exception as exc:  # a truncated or garbled file
        problems.append(f"{path}: not a readable FITS file ({exc})")
    return problems


def _recorded_digest(path):
    """SHA-256 that the product's entry recorded for it, or None."""
    entry = path.parent / ENTRY_NAME
    if not entry.is_file():
        return None
    try:
        outputs = json.loads(entry.read_text(encoding="utf-8")).get("outputs", {})
    except (OSError, json.JSONDecodeError):
        return None
    return outputs.get(path.name)


def audit(path):
    """Audit one product or every product under a folder.

    Parameters
    ----------
    path : str or Path

    Returns
    -------
    AuditReport
    """
    report = AuditReport()
    products = find_products(path)
    report.n_products = len(products)
    own = {}      # product -> list of its own problems
    inputs_of = {}
    for product in products:
        problems = []
        if product.suffix == ".fits":
            problems += _checksum_problems(product)
        recorded = _recorded_digest(product)
        if recorded is not None and sha256_of(product) != recorded:
            problems.append(f"{product}: bytes differ from the SHA-256 its entry recorded")
        try:
            prov = read_provenance(product)
        except Exception as exc:
            problems.append(f"{product}: provenance unreadable ({exc})")
            prov = {}
        inputs = prov.get("inputs", {})
        inputs_of[product] = inputs
        for name, digest in inputs.items():
            source = Path(name)
            if not source.exists():
                problems.append(f"{product}: input {source} is missing")
            elif digest and sha256_of(source) != digest:
                problems.append(f"{product}: input {source} has changed since the product was made")
        own[product] = problems

    def upstream_bad(product, seen):
        for name in inputs_of.get(product, {}):
            source = Path(name)
            if source in seen:
                continue
            seen.add(source)
            if source in own and (own[source] or upstream_bad(source, seen)):
                return True
            if source not in own and source.suffix in (".fits", ".ecsv") and source.exists():
                inputs_of[source] = read_provenance(source).get("inputs", {})
                own[source] = [f"{source}: input {n} is missing" for n in inputs_of[source]
                               if not Path(n).exists()]
                if own[source] or upstream_bad(source, seen):
                    return True
        return False

    for product in products:
        report.problems += own[product]
        direct = {Path(n) for n in inputs_of.get(product, {})}
        if not own[product]:
            for source in direct:
                if source.exists() and upstream_bad(source, {source}) or (
                        source in own and own[source]):
                    report.problems.append(f"{product}: stale: its input {source} was made from "
                                           f"inputs that are missing or changed")
                    break
    report.lines += _lineage(products, inputs_of)
    return report


def _lineage(products, inputs_of):
    """Lines of the lineage tree from the most downstream products to the raw files."""
    consumed = {Path(n) for ins in inputs_of.values() for n in ins}
    tips = [p for p in products if p not in consumed and p.suffix == ".fits"] or products[-1:]
    lines = ["lineage:"]
    shown = set()

    def walk(path, depth):
        label = f"{path.parent.name}/{path.name}"
        repeat = path in shown
        lines.append("  " * depth + ("- " if depth else "") + label + (" (above)" if repeat else ""))
        if repeat:
            return
        shown.add(path)
        ins = inputs_of.get(path)
        if ins is None and path.exists() and path.suffix in (".fits", ".ecsv"):
            try:
                ins = read_provenance(path).get("inputs", {})
            except Exception:
                ins = {}
            inputs_of[path] = ins
        raws = [Path(n) for n in (ins or {}) if Path(n).suffix in (".fits", ".ecsv")
                and (Path(n).parent.name.split("-")[0] in
                     ("calibrate", "extract", "bin", "detrend"))]
        others = [Path(n) for n in (ins or {}) if Path(n) not in raws]
        for source in raws:
            walk(source, depth + 1)
        if others:
            names = sorted(p.name for p in others)
            head = ", ".join(names[:4]) + (f" and {len(names) - 4} more" if len(names) > 4 else "")
            lines.append("  " * (depth + 1) + f"- {len(names)} files: {head}")

    for tip in tips:
        walk(tip, 0)
    return lines
