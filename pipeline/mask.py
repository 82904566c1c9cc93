"""The project's data-quality bitfield.

Each calibrated pixel carries an unsigned integer whose bits say why it should
not be trusted.  A boolean mask (True = do not use) is obtained with
:func:`to_boolean`, which wraps
:func:`astropy.nddata.bitmask.bitfield_to_boolean_mask`.

=====  ===================  ====================================================
bit    name                 meaning
=====  ===================  ====================================================
1      UNUSABLE             listed in the bad-pixel reference file
2      SATURATED            one or more reads above the saturation level were
                            dropped from the ramp
4      JUMP                 a cosmic-ray jump was found and the ramp split there
8      SHORT_RAMP           fewer than two usable reads remain: no slope
16     BACKGROUND_OUTLIER   rejected by the background estimator's clipping
32     NOT_FINITE           the raw data or a reference value was NaN or inf
64     EXTRACTION_OUTLIER   rejected by the profile fit of optimal extraction
128    FILLED               value replaced from the spatial profile
256    OUTSIDE_BAND         outside the rows that a scan crossed (scan mode)
=====  ===================  ====================================================

Bits 1, 8 and 32 make a pixel unusable for extraction; the others are
informative (a SATURATED or JUMP pixel still has a valid slope from its clean
reads).
"""

import numpy as np
from astropy.nddata.bitmask import bitfield_to_boolean_mask

__all__ = ["FLAGS", "UNUSABLE", "SATURATED", "JUMP", "SHORT_RAMP",
           "BACKGROUND_OUTLIER", "NOT_FINITE", "EXTRACTION_OUTLIER", "FILLED",
           "OUTSIDE_BAND", "UNUSABLE_FLAGS", "to_boolean", "count_by_flag"]

UNUSABLE = 1
SATURATED = 2
JUMP = 4
SHORT_RAMP = 8
BACKGROUND_OUTLIER = 16
NOT_FINITE = 32
EXTRACTION_OUTLIER = 64
FILLED = 128
OUTSIDE_BAND = 256

#: Every flag by name, in bit order.
FLAGS = {
    "UNUSABLE": UNUSABLE,
    "SATURATED": SATURATED,
    "JUMP": JUMP,
    "SHORT_RAMP": SHORT_RAMP,
    "BACKGROUND_OUTLIER": BACKGROUND_OUTLIER,
    "NOT_FINITE": NOT_FINITE,
    "EXTRACTION_OUTLIER": EXTRACTION_OUTLIER,
    "FILLED": FILLED,
    "OUTSIDE_BAND": OUTSIDE_BAND,
}

#: Flags that make a pixel unusable for extraction.
UNUSABLE_FLAGS = UNUSABLE | SHORT_RAMP | NOT_FINITE

MASK_DTYPE = np.uint16


def to_boolean(bits, flags=UNUSABLE_FLAGS):
    """Boolean mask, True where any of ``flags`` is set in ``bits``.

    Parameters
    ----------
    bits : array_like of int
        Bitfield of the project's flags.
    flags : int, optional
        The flags that count as bad; default :data:`UNUSABLE_FLAGS`.

    Returns
    -------
    mask : ndarray of bool
        Same shape as ``bits``; the input is not modified.
    """
    bits = np.asarray(bits)
    # bitfield_to_boolean_mask treats the listed bits as "ignore" unless
    # flip_bits is set; we want True where any of them is present.
    return bitfield_to_boolean_mask(bits, ignore_flags=int(flags), flip_bits=True,
                                    good_mask_value=False, dtype=bool)


def count_by_flag(bits):
    """Number of pixels carrying each flag.

    Parameters
    ----------
    bits : array_like of int

    Returns
    -------
    counts : dict of str to int
        One entry per name in :data:`FLAGS`.
    """
    bits = np.asarray(bits)
    return {name: int(np.count_nonzero(bits & value)) for name, value in FLAGS.items()}
