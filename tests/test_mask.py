"""The project's data-quality bitfield and its legend in FITS headers."""

import numpy as np
from astropy.io import fits

from lightledger.pipeline import mask as dq


def test_flags_are_distinct_single_bits_in_order():
    values = list(dq.FLAGS.values())
    # each flag is one bit, and FLAGS lists them in bit order (the legend relies on it)
    assert all(v > 0 and v & (v - 1) == 0 for v in values)
    assert values == sorted(values) and len(set(values)) == len(values)
    assert set(dq.MEANINGS) == set(dq.FLAGS)


def test_unusable_flags_are_the_gravest_bits():
    # the bits that make a pixel unusable sit above every informative bit
    informative = [v for v in dq.FLAGS.values() if not v & dq.UNUSABLE_FLAGS]
    assert dq.UNUSABLE_FLAGS == dq.NO_SLOPE | dq.INVALID_VALUE | dq.LISTED_BAD
    assert max(informative) < min(v for v in dq.FLAGS.values() if v & dq.UNUSABLE_FLAGS)


def test_to_boolean_selects_only_the_unusable_flags():
    bits = np.array([0, dq.RAMP_BREAK, dq.OVERFILLED | dq.SKY_CLIPPED, dq.NO_SLOPE,
                     dq.INVALID_VALUE | dq.UNSCANNED, dq.LISTED_BAD], dq.MASK_DTYPE)
    assert dq.to_boolean(bits).tolist() == [False, False, False, True, True, True]
    assert dq.to_boolean(bits, dq.RAMP_BREAK).tolist() == [False, True, False, False, False, False]
    assert dq.count_by_flag(bits)["RAMP_BREAK"] == 1


def test_legend_round_trips_through_a_fits_header(tmp_path):
    hdu = fits.ImageHDU(np.zeros((2, 2), np.uint16), name="FLAGS", uint=True)
    for key, value, comment in dq.legend_cards():
        hdu.header[key] = (value, comment)
    path = tmp_path / "flags.fits"
    fits.HDUList([fits.PrimaryHDU(), hdu]).writeto(path)
    header = fits.getheader(path, "FLAGS")
    assert dq.flags_from_header(header) == dq.FLAGS
    assert header["LLFLGBAD"] == dq.UNUSABLE_FLAGS
    # every comment survives whole (no truncation) and names the value
    for key, value, comment in dq.legend_cards():
        assert header.comments[key] == comment
