"""Products: atomic writes, provenance, and the FITS checksum convention.

References: the FITS Standard 4.0 and its checksum convention (CHECKSUM and
DATASUM), verified here by astropy and, where installed, by Debian's
fitsverify, an independent checker.
"""

import shutil
import subprocess

import numpy as np
import pytest
from astropy.io import fits
from astropy.table import Table

from lightledger.tasks.products import (Provenance, atomic_path, read_provenance, table_hdu,
                                        write_ecsv, write_fits, write_fits_stream)


def _prov(tmp_path):
    source = tmp_path / "input.txt"
    source.write_text("raw")
    return Provenance("extract", "1", "abcdef0123", {"method": "optimal", "edges": (1.0, 1.5)},
                      {str(source): "0" * 64}, visit="a fictional visit")


def test_write_fits_records_provenance_and_checksums(tmp_path):
    path = tmp_path / "product.fits"
    write_fits(path, [fits.ImageHDU(np.arange(12.0).reshape(3, 4), name="FLUX")], _prov(tmp_path))
    with fits.open(path, checksum=True) as hdul:
        for hdu in hdul:
            assert hdu.verify_checksum() == 1 and hdu.verify_datasum() == 1
        assert hdul[0].header["LLSTAGE"] == "extract"
        history = "\n".join(str(h) for h in hdul[0].header["HISTORY"])
        assert "param extract.method = optimal" in history
        assert "param extract.edges = [1.0, 1.5]" in history
    prov = read_provenance(path)
    assert prov["params"]["method"] == "optimal"
    assert list(prov["inputs"].values()) == ["0" * 64]
    assert not [p for p in tmp_path.iterdir() if p.name.endswith(".part")]


def test_streamed_fits_has_the_bytes_of_a_whole_write(tmp_path):
    # A product written one extension at a time (from a generator) is the same file, byte
    # for byte, as the one written from the list of extensions; every HDU's checksums hold
    # (FITS standard, checksum convention).
    def tables():
        for m in range(3):
            hdu = table_hdu(Table({"flux": np.arange(500.0) * (m + 1),
                                   "reason": ["x" * (m + 2)] * 500}), f"MODEL_{m:02d}")
            hdu.header["MODEL"] = (f"model {m}", "systematics model")
            yield hdu

    write_fits(tmp_path / "whole.fits", list(tables()), _prov(tmp_path), header={"TIMESYS": "TDB"})
    write_fits_stream(tmp_path / "streamed.fits", tables(), _prov(tmp_path),
                      header={"TIMESYS": "TDB"})
    assert (tmp_path / "whole.fits").read_bytes() == (tmp_path / "streamed.fits").read_bytes()
    with fits.open(tmp_path / "streamed.fits", checksum=True) as hdul:
        assert [h.name for h in hdul] == ["PRIMARY", "MODEL_00", "MODEL_01", "MODEL_02",
                                          "PROVENANCE"]
        assert all(h.verify_checksum() == 1 and h.verify_datasum() == 1 for h in hdul)


@pytest.mark.skipif(shutil.which("fitsverify") is None, reason="fitsverify not installed")
def test_fitsverify_accepts_products(tmp_path):
    path = tmp_path / "product.fits"
    table = Table({"time": np.linspace(0, 1, 5), "flux": np.ones((5, 3)), "ok": np.ones(5, bool)})
    write_fits(path, [fits.ImageHDU(np.ones((2, 2), np.uint16), name="MASK", uint=True),
                      fits.BinTableHDU(table, name="TABLE")], _prov(tmp_path))
    run = subprocess.run(["fitsverify", "-q", "-e", str(path)], capture_output=True, text=True)
    assert run.returncode == 0, run.stdout + run.stderr


def test_failed_write_leaves_no_product(tmp_path):
    path = tmp_path / "product.fits"
    with pytest.raises(RuntimeError):
        with atomic_path(path) as tmp:
            tmp.write_text("half a product")
            raise RuntimeError("killed")
    assert list(tmp_path.iterdir()) == []


def test_ecsv_carries_provenance(tmp_path):
    path = tmp_path / "table.ecsv"
    write_ecsv(path, Table({"a": [1, 2, 3]}), _prov(tmp_path))
    back = Table.read(path, format="ascii.ecsv")
    assert list(back["a"]) == [1, 2, 3]
    assert back.meta["lightledger"]["stage"] == "extract"
    assert read_provenance(path)["params"]["edges"] == [1.0, 1.5]


def test_ecsv_written_in_place_equals_the_in_memory_form(tmp_path):
    # The ECSV writer streams the table to the file a block of rows at a time and overwrites
    # the blank checksum in place; the obviously correct form writes the whole table's text
    # in memory at once, hashes it with the blank (64 zeros) and substitutes the digest.
    # Same bytes, and the file checks itself and reads back whole (astropy ECSV reader).
    import hashlib
    import io

    from lightledger.tasks.products import ecsv_checksum_ok

    rng = np.random.default_rng(0)
    n = 9000                      # more rows than two blocks of the writer (ECSV_ROWS)
    table = Table({"time": np.linspace(0, 1, n), "flux": rng.normal(size=(n, 12)),
                   "white": rng.normal(size=n), "used": rng.random(n) > 0.1,
                   "reason": [f"set aside: a reason ü {k % 7}" if k % 3 else "" for k in range(n)]})
    table["white"].unit = "electron"
    table["white"].description = "white flux"
    table.meta["note"] = {"a": [1, 2]}
    path = tmp_path / "wide.ecsv"
    write_ecsv(path, table, _prov(tmp_path))
    ref = table.copy(copy_data=False)
    ref.meta.update({"lightledger": {**_prov(tmp_path).meta(), "checksum": "sha256:" + "0" * 64}})
    buffer = io.StringIO()
    ref.write(buffer, format="ascii.ecsv")
    data = buffer.getvalue().encode("utf-8")
    digest = hashlib.sha256(data).hexdigest().encode()
    assert path.read_bytes() == data.replace(b"sha256:" + b"0" * 64, b"sha256:" + digest, 1)
    assert ecsv_checksum_ok(path) is True
    back = Table.read(path, format="ascii.ecsv")
    assert len(back) == n and np.array_equal(back["flux"], table["flux"])
    reason = back["reason"]           # ECSV reads an empty string back as missing
    assert list(reason.filled("") if hasattr(reason, "filled") else reason) == \
        list(table["reason"])
