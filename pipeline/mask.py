"""The project's data-quality bitfield.

Each calibrated pixel carries an unsigned integer whose bits say why it should
not be trusted.  A boolean mask (True = do not use) is obtained with
:func:`to_boolean`, which wraps
:func:`astropy.nddata.bitmask.bitfield_to_boolean_mask`.

The bits run from the mildest to the gravest: the low six are informative (the
pixel still holds a usable value), the high three make a pixel unusable.

=====  ===============  ======================================================
value  name             meaning
=====  ===============  ======================================================
1      UNSCANNED        outside the rows that a scan crossed (scan mode)
2      SKY_CLIPPED      rejected by the background estimator's clipping
4      RAMP_BREAK       a cosmic-ray hit broke the ramp; the read differences
                        around the break were left out of the slope
8      PROFILE_REJECT   rejected by the profile fit of optimal extraction
16     PATCHED          value replaced from the spatial profile
32     OVERFILLED       one or more reads at or above the saturation level,
                        clipped or wrapped around in storage were dropped
64     NO_SLOPE         fewer than two usable reads remain: no slope
128    INVALID_VALUE    the raw data or a reference value was NaN or infinite
256    LISTED_BAD       listed in the bad-pixel reference file, or unusable
                        in another reference file
=====  ===============  ======================================================

Bits 64, 128 and 256 (:data:`UNUSABLE_FLAGS`) make a pixel unusable for
extraction; the others are informative (an OVERFILLED or RAMP_BREAK pixel
still has a valid slope from its clean reads).

In FITS products the legend travels with the bitfield: :func:`legend_cards`
gives one header keyword ``LLFLAGn`` per bit (n = 0 for value 1, 1 for value
2, ...) whose value is the name and whose comment is the meaning, and
``LLFLGBAD``, the sum of the unusable bits.
"""

import numpy as np

__all__ = ["FLAGS", "MEANINGS", "UNSCANNED", "SKY_CLIPPED", "RAMP_BREAK", "PROFILE_REJECT",
           "PATCHED", "OVERFILLED", "NO_SLOPE", "INVALID_VALUE", "LISTED_BAD",
           "UNUSABLE_FLAGS", "MASK_DTYPE", "to_boolean", "count_by_flag", "legend_cards",
           "flags_from_header"]

UNSCANNED = 1
SKY_CLIPPED = 2
RAMP_BREAK = 4
PROFILE_REJECT = 8
PATCHED = 16
OVERFILLED = 32
NO_SLOPE = 64
INVALID_VALUE = 128
LISTED_BAD = 256

#: Every flag by name, in bit order.
FLAGS = {
    "UNSCANNED": UNSCANNED,
    "SKY_CLIPPED": SKY_CLIPPED,
    "RAMP_BREAK": RAMP_BREAK,
    "PROFILE_REJECT": PROFILE_REJECT,
    "PATCHED": PATCHED,
    "OVERFILLED": OVERFILLED,
    "NO_SLOPE": NO_SLOPE,
    "INVALID_VALUE": INVALID_VALUE,
    "LISTED_BAD": LISTED_BAD,
}

#: One line per flag, short enough for a FITS header comment.
MEANINGS = {
    "UNSCANNED": "outside the rows a scan crossed",
    "SKY_CLIPPED": "rejected by the background clipping",
    "RAMP_BREAK": "cosmic-ray break left out of the ramp",
    "PROFILE_REJECT": "rejected by the optimal-extraction fit",
    "PATCHED": "value replaced from the spatial profile",
    "OVERFILLED": "reads at/above saturation dropped",
    "NO_SLOPE": "fewer than two usable reads",
    "INVALID_VALUE": "raw or reference value not finite",
    "LISTED_BAD": "in the bad-pixel file or a bad reference",
}

#: Flags that make a pixel unusable for extraction.
UNUSABLE_FLAGS = NO_SLOPE | INVALID_VALUE | LISTED_BAD

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
    # imported here: astropy.nddata (with its coordinates and WCS) takes about a second to
    # import, which a command that converts no mask should not pay
    from astropy.nddata.bitmask import bitfield_to_boolean_mask

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


def legend_cards():
    """Header cards that describe the bitfield, for the HDU that holds it.

    Returns
    -------
    cards : list of (keyword, value, comment)
        ``LLFLAGn`` = flag name, comment ``"=VALUE: meaning"``, one per bit
        (n is the bit's position, value 2**n), then ``LLFLGBAD`` = the sum of
        :data:`UNUSABLE_FLAGS`.
    """
    cards = []
    for name, value in FLAGS.items():
        position = int(value).bit_length() - 1
        cards.append((f"LLFLAG{position}", name, f"={value}: {MEANINGS[name]}"))
    cards.append(("LLFLGBAD", int(UNUSABLE_FLAGS), "sum of the flags that make a pixel unusable"))
    return cards


def flags_from_header(header):
    """Flag name to value, read back from the ``LLFLAGn`` keywords of a header.

    Parameters
    ----------
    header : mapping
        A FITS header (or dict) written with :func:`legend_cards`.

    Returns
    -------
    flags : dict of str to int
        In bit order; empty when the header holds no legend.
    """
    found = {}
    for position in range(16):
        key = f"LLFLAG{position}"
        if key in header:
            found[str(header[key])] = 1 << position
    return found
