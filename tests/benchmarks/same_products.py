"""Check that two notebooks of one visit hold the same identities and the same data.

    python tests/benchmarks/same_products.py NOTEBOOK_A NOTEBOOK_B

Run by hand around a change that must not alter results (a refactor of the
bookkeeping, say): reduce a visit with the code before and after, then give
the two notebook folders.  Prints, per stage folder, whether both notebooks
have it (same identity) and, per FITS or ECSV product, whether the data are
equal: every image array and every table column compared value by value
(NaN equal to NaN), header cards compared except CHECKSUM, DATASUM and the
task timing ELAPSED, the PROVENANCE table and HISTORY cards reported apart
(they name inputs by their SHA-256, which a change of what is recorded
alters without any change of data).  Exit status 0 when the identities and
every data array are the same.
"""

import sys
import warnings
from pathlib import Path

import numpy as np
from astropy.io import fits
from astropy.table import Table

_IGNORED = {"CHECKSUM", "DATASUM", "ELAPSED", "HISTORY"}


def _same_array(a, b):
    if a is None or b is None:
        return a is None and b is None
    a, b = np.asarray(a), np.asarray(b)
    if a.shape != b.shape or a.dtype != b.dtype:
        return False
    if a.dtype.kind == "f":
        return bool(np.array_equal(a, b, equal_nan=True))
    if a.dtype.names:
        return all(_same_array(a[n], b[n]) for n in a.dtype.names)
    return bool(np.array_equal(a, b))


def _fits_differences(a, b):
    out = []
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        with fits.open(a) as ha, fits.open(b) as hb:
            names_a = [h.name for h in ha]
            names_b = [h.name for h in hb]
            if names_a != names_b:
                return [f"extensions {names_a} != {names_b}"], []
            provenance = []
            for x, y in zip(ha, hb):
                cards_a = {(k, str(v)) for k, v in x.header.items() if k not in _IGNORED}
                cards_b = {(k, str(v)) for k, v in y.header.items() if k not in _IGNORED}
                target = provenance if x.name == "PROVENANCE" else out
                if cards_a != cards_b:
                    target.append(f"{x.name}: header cards differ: {sorted(cards_a ^ cards_b)[:4]}")
                if not _same_array(x.data, y.data):
                    target.append(f"{x.name}: data differ")
    return out, provenance


def _ecsv_differences(a, b):
    ta = Table.read(a, format="ascii.ecsv")
    tb = Table.read(b, format="ascii.ecsv")
    if ta.colnames != tb.colnames or len(ta) != len(tb):
        return ["columns or rows differ"], []
    out = [f"column {n} differs" for n in ta.colnames
           if not _same_array(np.asarray(ta[n]), np.asarray(tb[n]))]
    meta = [] if ta.meta.get("lightledger") == tb.meta.get("lightledger") else ["provenance differs"]
    return out, meta


def compare_notebooks(a, b, out=sys.stdout):
    a, b = Path(a), Path(b)
    folders_a = sorted(p.name for p in a.iterdir() if p.is_dir() and not p.name.startswith("."))
    folders_b = sorted(p.name for p in b.iterdir() if p.is_dir() and not p.name.startswith("."))
    ok = folders_a == folders_b
    print(f"stage folders (identities): {'same' if ok else 'DIFFERENT'}", file=out)
    for name in sorted(set(folders_a) ^ set(folders_b)):
        print(f"  only in {'A' if name in folders_a else 'B'}: {name}", file=out)
    for name in sorted(set(folders_a) & set(folders_b)):
        for product in sorted((a / name).iterdir()):
            if product.suffix not in (".fits", ".ecsv") or product.name.startswith("."):
                continue
            other = b / name / product.name
            if not other.exists():
                print(f"  {name}/{product.name}: missing in B", file=out)
                ok = False
                continue
            diff, prov = (_fits_differences if product.suffix == ".fits" else _ecsv_differences)(
                product, other)
            same_bytes = product.read_bytes() == other.read_bytes()
            status = "same bytes" if same_bytes else ("same data" if not diff else "DATA DIFFER")
            print(f"  {name}/{product.name}: {status}"
                  + (f"; recorded provenance differs ({prov[0]})" if prov and not same_bytes else ""),
                  file=out)
            for line in diff:
                print(f"      {line}", file=out)
            ok &= not diff
    print("identities and data: " + ("the same" if ok else "DIFFERENT"), file=out)
    return ok


if __name__ == "__main__":
    if len(sys.argv) != 3:
        sys.exit(__doc__)
    sys.exit(0 if compare_notebooks(sys.argv[1], sys.argv[2]) else 1)
