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

from lightledger.tasks.products import (Provenance, atomic_path, read_provenance, write_ecsv,
                                        write_fits)


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
