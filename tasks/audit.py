"""Auditing products: checksums, recorded inputs and lineage.

For every product found under the path given (a product, a stage folder, a
notebook folder, or a visit description whose notebook is audited):

* FITS products: every HDU's CHECKSUM and DATASUM are verified;
* every product: its SHA-256 is compared with the one its entry recorded;
* every input the product records is looked up: **missing** (gone),
  **changed** (its bytes differ from the recorded SHA-256), or **stale** (the
  input itself is intact but something it was made from, further up the
  lineage, is missing or changed);
* the lineage is printed from the light curves back to the raw files.

Each problem is one line naming the product and what is wrong.
"""

import json
import warnings
from dataclasses import dataclass, field
from pathlib import Path

from astropy.io import fits

from lightledger.pipeline.errors import InputFileError

from .base import ENTRY_NAME
from .products import read_provenance, resolve_input
from .rawio import sha256_of

__all__ = ["AuditReport", "audit", "find_products"]

_PRODUCT_SUFFIXES = (".fits", ".ecsv")


@dataclass
class AuditReport:
    """Result of an audit: printable lines and one message per problem."""

    lines: list = field(default_factory=list)
    problems: list = field(default_factory=list)
    n_products: int = 0


def find_products(path):
    """Products (FITS and ECSV files with provenance) under ``path``."""
    path = Path(path)
    if not path.exists():
        raise InputFileError(f"{path}: no such file or folder to audit")
    if path.is_file() and path.suffix == ".toml":
        from .config import load_visit
        path = Path(load_visit(path).notebook)
        if not path.is_dir():
            raise InputFileError(f"{path}: the visit has no notebook yet; run lightledger reduce first")
    if path.is_file():
        return [path.resolve()]
    products = sorted(p.resolve() for p in path.rglob("*") if p.suffix in _PRODUCT_SUFFIXES
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
                    elif hdu.verify_checksum() != 1:
                        problems.append(f"{path}: HDU {name} CHECKSUM does not match its header")
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


class _Checker:
    """Checks products once each and remembers what they were made from."""

    def __init__(self):
        self.problems = {}   # product -> its own problems
        self.inputs = {}     # product -> {resolved input path: recorded sha256}

    def check(self, product):
        if product in self.problems:
            return self.problems[product]
        problems = []
        if product.suffix == ".fits":
            problems += _checksum_problems(product)
        recorded = _recorded_digest(product)
        if recorded is not None and sha256_of(product) != recorded:
            problems.append(f"{product}: its bytes differ from the SHA-256 its entry recorded")
        try:
            prov = read_provenance(product)
        except Exception as exc:
            problems.append(f"{product}: provenance unreadable ({exc})")
            prov = {}
        inputs = {resolve_input(product, name): digest
                  for name, digest in prov.get("inputs", {}).items()}
        for source, digest in inputs.items():
            if not source.exists():
                problems.append(f"{product}: input {source} is missing")
            elif digest and sha256_of(source) != digest:
                problems.append(f"{product}: input {source} has changed since the product was made")
        self.problems[product] = problems
        self.inputs[product] = inputs
        return problems

    def upstream_problem(self, product, seen=None):
        """The first problem found further up the lineage of ``product``, or None."""
        seen = set() if seen is None else seen
        for source in self.inputs.get(product, {}):
            if source in seen or source.suffix not in _PRODUCT_SUFFIXES or not source.exists():
                continue
            seen.add(source)
            if not read_provenance(source):
                continue   # a raw file: checked by its consumer
            own = self.check(source)
            if own:
                return source
            found = self.upstream_problem(source, seen)
            if found:
                return found
        return None


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
    checker = _Checker()
    for product in products:
        own = checker.check(product)
        report.problems += own
        if not own:
            bad = checker.upstream_problem(product)
            if bad is not None:
                report.problems.append(f"{product}: stale: made from {bad.parent.name}/{bad.name}, "
                                       f"whose own inputs are missing or changed")
    report.lines += _lineage(products, checker)
    return report


def _lineage(products, checker):
    """Lines of the lineage tree from the most downstream products back to the raw files."""
    consumed = {src for ins in checker.inputs.values() for src in ins}
    tips = [p for p in products if p not in consumed and p.suffix == ".fits"] or products[-1:]
    lines = ["lineage:"]
    shown = set()

    def walk(path, depth):
        label = f"{path.parent.name}/{path.name}"
        lines.append("  " * depth + ("- " if depth else "") + label + (" (above)" if path in shown else ""))
        if path in shown:
            return
        shown.add(path)
        if path not in checker.inputs and path.exists() and read_provenance(path):
            checker.check(path)
        ins = checker.inputs.get(path, {})
        made = [p for p in ins if p.exists() and p.suffix in _PRODUCT_SUFFIXES and read_provenance(p)]
        others = sorted(p.name for p in ins if p not in made)
        for source in made:
            walk(source, depth + 1)
        if others:
            head = ", ".join(others[:4]) + (f" and {len(others) - 4} more" if len(others) > 4 else "")
            lines.append("  " * (depth + 1) + f"- {len(others)} raw or reference files: {head}")

    for tip in tips:
        walk(tip, 0)
    return lines
