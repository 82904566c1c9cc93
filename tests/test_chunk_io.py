"""Reading a chunk's raw reads with one mapping per file (lightledger.tasks.rawio.read_exposures).

The reference reader is astropy.io.fits itself: the chunk reader must return
the same values, as float32, while mapping each raw file once.
"""

import numpy as np
import pytest
from astropy.io import fits

from lightledger.tasks import rawio
from lightledger.tasks.config import load_visit


@pytest.fixture(scope="module")
def stare(raw_stare):
    # 60 exposures in files of 50: a chunk 40..59 spans two 4-D files
    return load_visit(raw_stare)


def test_chunk_reader_matches_exposure_reader_and_opens_each_file_once(stare, monkeypatch):
    refs = rawio.inventory(stare.raw, stare.profile)[40:60]
    assert len({r.file for r in refs}) == 2
    opened = []
    real_memmap = np.memmap

    def counting_memmap(name, *args, **kwargs):
        opened.append(str(name))
        return real_memmap(name, *args, **kwargs)

    monkeypatch.setattr(rawio.np, "memmap", counting_memmap)
    cube = rawio.read_exposures(refs, stare.profile)
    assert sorted(opened) == sorted({r.file for r in refs})
    monkeypatch.undo()
    assert cube.dtype == np.float32 and cube.shape == (20,) + refs[0].shape
    for k, ref in enumerate(refs):
        with fits.open(ref.file) as hdul:      # the reference reader
            np.testing.assert_array_equal(cube[k], hdul["READS"].data[ref.index])
        np.testing.assert_array_equal(cube[k], rawio.read_exposure(ref, stare.profile))


def test_chunk_reader_names_a_damaged_file(stare, tmp_path):
    refs = rawio.inventory(stare.raw, stare.profile)[:3]
    bad = tmp_path / "cut.fits"
    bad.write_bytes(open(refs[0].file, "rb").read()[:20000])
    moved = [rawio.ExposureRef(**{**ref.__dict__, "file": str(bad)}) for ref in refs]
    with pytest.raises(rawio.InputFileError, match="cut.fits"):
        rawio.read_exposures(moved, stare.profile)
