"""Writing products: the one place every FITS, ECSV, figure and entry goes through.

Every product is written to a temporary file beside its final name and moved
into place with :func:`os.replace` only once complete, so a killed run never
leaves a partial product where a complete one is expected.  FITS products get
CHECKSUM and DATASUM (the FITS checksum convention), and a primary header
that records:

=========  ==========================================================
LLSTAGE    the stage that made the product
LLSTGVER   the stage's code version
LLVERS     the lightledger version
LLIDENT    the identity hash of the stage entry (the folder's suffix)
LLVISIT    the visit's name
=========  ==========================================================

plus HISTORY cards listing every parameter and every input with its SHA-256,
and a binary table extension PROVENANCE with the same in columns
``kind`` (``param`` or ``input``), ``name``, ``value`` and ``sha256``.
"""

import hashlib
import io
import json
import os
import re
import tempfile
from contextlib import contextmanager
from pathlib import Path

import numpy as np
from astropy.io import fits
from astropy.table import Table

from lightledger.pipeline import __version__

from .config import fits_text
from .digests import current_umask, sha256_of

__all__ = ["Provenance", "relative_input", "resolve_input", "atomic_path", "part_pattern", "table_hdu",
           "write_fits", "write_ecsv", "write_json", "save_figure", "read_provenance",
           "known_digest", "ecsv_checksum_ok"]

#: SHA-256 of the files this process wrote: path -> ((size, mtime_ns, inode), sha256).
_WRITTEN = {}


def _remember(path):
    """Hash a file just written, once, and remember it while it is unchanged."""
    path = os.path.abspath(path)
    st = os.stat(path)
    digest = sha256_of(path)
    if len(_WRITTEN) > 4096:
        _WRITTEN.clear()
    _WRITTEN[path] = ((st.st_size, st.st_mtime_ns, st.st_ino), digest)
    return digest


def known_digest(path):
    """SHA-256 of a file this process wrote, if it is unchanged since; else None."""
    path = os.path.abspath(path)
    known = _WRITTEN.get(path)
    if known is None:
        return None
    try:
        st = os.stat(path)
    except FileNotFoundError:
        return None
    return known[1] if known[0] == (st.st_size, st.st_mtime_ns, st.st_ino) else None


class Provenance:
    """What made a product: stage, parameters, inputs.

    Parameters
    ----------
    stage : str
    stage_version : str
    identity : str
        Identity hash of the stage entry.
    params : dict
        Stage parameters (name to value).
    inputs : dict
        Input name (its path relative to the product's folder, see
        :func:`relative_input`) to SHA-256 hex digest.
    visit : str
        Visit name.
    """

    def __init__(self, stage, stage_version, identity, params, inputs, visit=""):
        self.stage = stage
        self.stage_version = str(stage_version)
        self.identity = identity
        self.params = dict(params)
        self.inputs = dict(inputs)
        self.visit = visit

    def header_cards(self, header):
        header["LLSTAGE"] = (self.stage, "lightledger stage that made this product")
        header["LLSTGVER"] = (self.stage_version, "code version of that stage")
        header["LLVERS"] = (__version__, "lightledger version")
        header["LLIDENT"] = (self.identity, "identity hash of the notebook entry")
        # FITS headers hold printable ASCII only: a free-text visit name is transliterated
        # there (the original is in entry.json and the ECSV metadata)
        header["LLVISIT"] = (fits_text(self.visit, 60), "visit name")
        for key, value in sorted(self.params.items()):
            header.add_history(fits_text(f"param {self.stage}.{key} = {_text(value)}"))
        for path, digest in sorted(self.inputs.items()):
            header.add_history(fits_text(f"input {Path(path).name} sha256 {digest}"))

    def table_hdu(self):
        rows = [("param", k, fits_text(_text(v)), "") for k, v in sorted(self.params.items())]
        rows += [("input", fits_text(str(p), reversible=True), "", d)
                 for p, d in sorted(self.inputs.items())]
        if not rows:
            rows = [("none", "", "", "")]
        kinds, names, values, digests = zip(*rows)
        table = Table([list(kinds), list(names), list(values), list(digests)],
                      names=("kind", "name", "value", "sha256"))
        hdu = fits.BinTableHDU(table, name="PROVENANCE")
        return hdu

    def meta(self):
        return {"stage": self.stage, "stage_version": self.stage_version,
                "software_version": __version__, "identity": self.identity,
                "visit": self.visit, "params": {k: _jsonable(v) for k, v in self.params.items()},
                "inputs": self.inputs}


def _text(value):
    if isinstance(value, (list, tuple)):
        return "[" + ", ".join(_text(v) for v in value) + "]"
    return str(value)


def _jsonable(value):
    if isinstance(value, tuple):
        return [_jsonable(v) for v in value]
    if isinstance(value, (np.floating, np.integer)):
        return value.item()
    if isinstance(value, Path):
        return str(value)
    return value


def relative_input(path, folder):
    """Name of an input as recorded: its path relative to the product's folder.

    Relative names keep a notebook (with its raw files beside it) valid when
    the whole visit folder is moved or copied.  Both paths are taken as given
    (made absolute, symbolic links not followed): the visit description's
    paths are resolved when it is read, so no file is looked at here.
    """
    return os.path.relpath(os.path.abspath(path), os.path.abspath(folder))


def resolve_input(product, name):
    """Absolute path of an input recorded by ``product`` (see :func:`relative_input`)."""
    name = Path(name)
    return name if name.is_absolute() else (Path(product).parent / name).resolve()


def part_pattern(name):
    """Glob pattern of the temporary files :func:`atomic_path` makes for a final ``name``."""
    name = Path(name)
    return f".{name.stem}-*{name.suffix}.part"


@contextmanager
def atomic_path(path):
    """Yield a temporary path beside ``path``; move it into place on success.

    On an exception the temporary file is removed and ``path`` is untouched.
    The final file gets the permissions of any file the user creates (mode
    0666 less the umask), not the owner-only mode of a temporary file.
    """
    path = Path(path)
    path.parent.mkdir(parents=True, exist_ok=True)
    fd, tmp = tempfile.mkstemp(prefix=f".{path.stem}-", suffix=path.suffix + ".part",
                               dir=path.parent)
    os.close(fd)
    try:
        yield Path(tmp)
        with open(tmp, "rb+") as fh:
            os.fsync(fh.fileno())
        os.chmod(tmp, 0o666 & ~current_umask())
        os.replace(tmp, path)
    except BaseException as exc:
        # a full disk or a file-size limit: say so with the product's name
        # (some writers lose the system's errno)
        from .problems import diagnose_write

        machine = diagnose_write(exc, path, tmp) if isinstance(exc, OSError) else None
        if os.path.exists(tmp):
            os.unlink(tmp)
        if machine is not None:
            raise machine from exc
        raise


#: Units that the FITS standard lacks, and what FITS tables say instead.
_FITS_UNITS = {"electron": "count", "electron2": "count2", "electron / s": "count / s"}


def table_hdu(table, name):
    """A binary table HDU of an astropy Table, with FITS-standard units.

    Columns in electrons are written with TUNIT ``count`` (a count of
    electrons; the FITS standard has no electron unit) and every column's
    description, when it has one, becomes its TCOMMn comment.
    """
    table = table.copy(copy_data=False)
    table.meta.clear()   # header keywords are set explicitly by the caller
    comments = {}
    for col in table.itercols():
        unit = col.unit.to_string() if col.unit is not None else None
        if unit in _FITS_UNITS:
            col.unit = _FITS_UNITS[unit]
            comments[col.name] = (col.description or col.name) + " (electrons)"
        elif col.description:
            comments[col.name] = col.description
    hdu = fits.BinTableHDU(table, name=name)
    for i, colname in enumerate(table.colnames, start=1):
        if colname in comments:
            hdu.header[f"TCOMM{i}"] = comments[colname][:68]
    return hdu


def _primary(path, provenance, header):
    """The primary HDU of a FITS product at ``path``: provenance cards and ``header``'s keywords."""
    if path.suffix != ".fits":
        raise ValueError(f"{path}: products are plain .fits files")
    primary = fits.PrimaryHDU()
    provenance.header_cards(primary.header)
    for key, value in (header or {}).items():
        primary.header[key] = value
    return primary


def write_fits(path, hdus, provenance, *, header=None):
    """Write a FITS product with provenance and checksums, atomically.

    Parameters
    ----------
    path : str or Path
        Final name; must end in ``.fits``.
    hdus : list of astropy.io.fits HDUs
        Extensions (an ImageHDU, BinTableHDU, ...); a primary HDU is made.
    provenance : Provenance
    header : dict, optional
        Extra primary-header keywords: name to value or (value, comment).

    Returns
    -------
    sha256 : str
        SHA-256 of the written file.
    """
    path = Path(path)
    primary = _primary(path, provenance, header)
    hdul = fits.HDUList([primary, *hdus, provenance.table_hdu()])
    for hdu in hdul:
        # astropy dates the comments of CHECKSUM and DATASUM with the wall clock; a fixed text
        # keeps the bytes (and so the checksums) of a product a function of its content only
        hdu._get_timestamp = _checksum_comment
    with atomic_path(path) as tmp:
        hdul.writeto(tmp, overwrite=True, checksum=True)
    return _remember(path)


def write_fits_stream(path, hdus, provenance, *, header=None):
    """:func:`write_fits` for many large extensions: one extension in memory at a time.

    ``hdus`` may be any iterable (e.g. a generator making each table only when
    it is written); each extension is serialised with its checksums, its bytes
    appended, and dropped before the next is made.  The file has the same
    bytes as :func:`write_fits` of the same extensions (every HDU's header,
    data and checksums depend only on that HDU).

    Returns
    -------
    sha256 : str
        SHA-256 of the written file.
    """
    path = Path(path)
    primary = _primary(path, provenance, header)

    def serialised(hdu):
        """The bytes ``hdu`` has in a file after a bare primary HDU (checksums included)."""
        bare = fits.PrimaryHDU()
        buf = io.BytesIO()
        for h in (bare, hdu):
            h._get_timestamp = _checksum_comment
        fits.HDUList([bare, hdu]).writeto(buf, checksum=True)
        return buf.getvalue()[len(_bare_primary()):]

    with atomic_path(path) as tmp:
        primary._get_timestamp = _checksum_comment
        fits.HDUList([primary]).writeto(tmp, overwrite=True, checksum=True)
        with open(tmp, "ab") as out:
            for hdu in _then(hdus, provenance.table_hdu):
                out.write(serialised(hdu))
    return _remember(path)


def _then(items, last):
    """Every item of ``items``, then ``last()``."""
    yield from items
    yield last()


def _bare_primary():
    """The bytes of a primary HDU without data and without cards of our own, with checksums."""
    bare = fits.PrimaryHDU()
    bare._get_timestamp = _checksum_comment
    buf = io.BytesIO()
    fits.HDUList([bare]).writeto(buf, checksum=True)
    return buf.getvalue()


def _checksum_comment():
    return "by lightledger"


#: Placeholder of an ECSV product's own checksum while the checksum is computed.
_ECSV_BLANK = "sha256:" + "0" * 64
_ECSV_CHECKSUM = re.compile(rb"checksum: '?sha256:([0-9a-f]{64})")


def write_ecsv(path, table, provenance):
    """Write an astropy Table as ECSV with provenance in its metadata, atomically.

    The metadata's ``lightledger.checksum`` is ``sha256:HEX``, the SHA-256 of
    the file's bytes with HEX replaced by 64 zeros (a checksum the file
    carries, as FITS files carry CHECKSUM; see :func:`ecsv_checksum_ok`).

    Returns the SHA-256 of the written file.
    """
    table = table.copy(copy_data=False)
    table.meta.update({"lightledger": {**provenance.meta(), "checksum": _ECSV_BLANK}})
    with atomic_path(path) as tmp:
        # written with the blank checksum straight to the file (no copies of the text in
        # memory), then hashed block by block and the blank overwritten in place
        with open(tmp, "w", encoding="utf-8", newline="") as out:
            _write_ecsv_rows(out, table)
        with open(tmp, "r+b") as out:
            digest, offset = hashlib.sha256(), None
            start, tail = 0, b""
            for block in iter(lambda: out.read(1 << 20), b""):
                digest.update(block)
                if offset is None:
                    found = _ECSV_CHECKSUM.search(tail + block)
                    if found is not None:
                        offset = start - len(tail) + found.start(1)
                    tail = (tail + block)[-128:]
                start += len(block)
            if offset is None:      # the YAML writer quoted or folded it (never seen): a bug
                raise RuntimeError(f"{path}: could not place the ECSV checksum")
            out.seek(offset)
            out.write(digest.hexdigest().encode())
    return _remember(path)


#: Rows of an ECSV table formatted at a time (the writer holds every formatted row in memory).
ECSV_ROWS = 4096


def _write_ecsv_rows(out, table):
    """Write ``table`` as ECSV to the text file ``out``, ``ECSV_ROWS`` rows at a time.

    The first block is written with the header (metadata and column
    descriptions, which do not depend on the rows); each later block is
    written from a copy without metadata and its header lines dropped (the
    lines before its rows).  ECSV formats every value on its own, so the file
    is the one a single write of the whole table gives.
    """
    n = len(table)
    table[:min(n, ECSV_ROWS)].write(out, format="ascii.ecsv")
    if n <= ECSV_ROWS:
        return
    bare = table.copy(copy_data=False)
    bare.meta.clear()
    for start in range(ECSV_ROWS, n, ECSV_ROWS):
        block = bare[start:start + ECSV_ROWS]
        text = io.StringIO()
        block.write(text, format="ascii.ecsv")
        lines = text.getvalue().splitlines(keepends=True)
        out.writelines(lines[len(lines) - len(block):])


def ecsv_checksum_ok(path):
    """True when an ECSV product's bytes match its own checksum, False when not, None if absent."""
    data = Path(path).read_bytes()
    found = _ECSV_CHECKSUM.search(data)
    if found is None:
        return None
    blank = data[:found.start(1)] + b"0" * 64 + data[found.end(1):]
    return hashlib.sha256(blank).hexdigest() == found.group(1).decode()


def write_json(path, document):
    """Write a JSON document atomically (UTF-8, indented)."""
    with atomic_path(path) as tmp:
        with open(tmp, "w", encoding="utf-8") as fh:
            json.dump(document, fh, indent=2, sort_keys=False, default=_jsonable)
            fh.write("\n")
    return _remember(path)


def save_figure(fig, path, *, dpi=110):
    """Save a matplotlib figure as PNG atomically and close it."""
    import matplotlib.pyplot as plt

    try:
        with atomic_path(path) as tmp:
            fig.savefig(tmp, format="png", dpi=dpi)
    finally:
        plt.close(fig)
    return _remember(path)


def read_provenance(path):
    """The provenance recorded in a FITS or ECSV product.

    Returns
    -------
    dict with keys stage, stage_version, identity, params (dict) and
    inputs (dict path -> sha256); empty dict when the file has none.
    """
    path = Path(path)
    if path.suffix == ".fits":
        with fits.open(path) as hdul:
            hdr = hdul[0].header
            if "LLSTAGE" not in hdr or "PROVENANCE" not in hdul:
                return {}
            table = Table(hdul["PROVENANCE"].data)
            params = {r["name"]: r["value"] for r in table if r["kind"] == "param"}
            inputs = {r["name"]: r["sha256"] for r in table if r["kind"] == "input"}
            return {"stage": hdr["LLSTAGE"], "stage_version": hdr.get("LLSTGVER", ""),
                    "identity": hdr.get("LLIDENT", ""), "params": params, "inputs": inputs}
    if path.suffix == ".ecsv":
        table = Table.read(path, format="ascii.ecsv")
        meta = table.meta.get("lightledger", {})
        return dict(meta)
    return {}
