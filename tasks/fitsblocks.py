"""The FITS structure of a file, walked block by block before astropy parses a card.

FITS Standard 4.0, sections 3.3-4.4: 2880-byte blocks, 80-character ASCII
cards ending with END, data sized by BITPIX, NAXISn, PCOUNT and GCOUNT.
:func:`fits_structure` lists every HDU (where its header and data start, its
kind, name, BITPIX and shape) or raises naming what is damaged, so that a
truncated file or a zeroed header is named at once instead of being searched
for a header through its data; :func:`_read_array` and :func:`_scaled` read
and scale small image arrays.  Used by :mod:`.rawio`.
"""

import math
import os
import warnings
from dataclasses import dataclass

import numpy as np
from astropy.io import fits

__all__ = ["BLOCK", "HDUInfo", "fits_structure"]


#: FITS block length in bytes (FITS Standard 4.0, sect. 3.1).
BLOCK = 2880


_MAX_HEADER_BLOCKS = 1000


_BITPIX = {8: "u1", 16: ">i2", 32: ">i4", 64: ">i8", -32: ">f4", -64: ">f8"}


class _Damage(Exception):
    """A file that does not follow the FITS structure (message: what is wrong)."""


@dataclass(frozen=True)
class HDUInfo:
    """One HDU found by :func:`fits_structure`."""

    index: int
    header_offset: int
    data_offset: int
    data_bytes: int
    header: fits.Header
    kind: str            # "PRIMARY", "IMAGE", "BINTABLE", "TABLE", ...
    name: str            # EXTNAME ('' when absent; 'PRIMARY' for the primary HDU)
    bitpix: int
    shape: tuple         # numpy order (NAXISn .. NAXIS1)


def _card(header, key, default=None):
    """A header value; an unparsable card raises _Damage naming it."""
    try:
        return header[key] if key in header else default
    except Exception as exc:     # astropy's VerifyError on a damaged card
        raise _Damage(f"header card {key} cannot be parsed ({_short(exc)})") from None


def _card_int(header, key, where, default=None):
    if key not in header:
        if default is not None:
            return default
        raise _Damage(f"{where} header has no {key} card")
    try:
        value = header[key]
    except Exception as exc:     # astropy's VerifyError on a damaged card
        raise _Damage(f"{where} header card {key} cannot be parsed ({_short(exc)})") from None
    if isinstance(value, bool) or not isinstance(value, (int, np.integer)):
        raise _Damage(f"{where} header card {key} must be an integer, found {value!r}")
    return int(value)


def _read_header(fh, offset, size, index):
    where = "primary" if index == 0 else f"HDU {index}"
    blocks = []
    fh.seek(offset)
    for _ in range(_MAX_HEADER_BLOCKS):
        block = fh.read(BLOCK)
        if len(block) < BLOCK:
            if not blocks and not block:
                return None, offset
            raise _Damage(f"{where} header is cut short at byte {offset + len(b''.join(blocks)) + len(block)} "
                          f"(the file is truncated)")
        if not blocks:
            first = block[:8].decode("ascii", "replace").rstrip()
            expected = "SIMPLE" if index == 0 else "XTENSION"
            if first != expected:
                if index == 0:
                    raise _Damage("not a FITS file (it does not begin with a SIMPLE card)")
                raise _Damage(f"{where} header at byte {offset} is damaged (it does not begin "
                              f"with XTENSION)")
        if any(b < 0x20 or b > 0x7E for b in block):
            raise _Damage(f"{where} header at byte {offset} holds bytes that are not ASCII text "
                          f"(damaged)")
        blocks.append(block)
        for k in range(0, BLOCK, 80):
            if block[k:k + 8] == b"END     " and not block[k + 8:k + 80].strip():
                text = b"".join(blocks).decode("ascii")
                return text, offset + BLOCK * len(blocks)
    raise _Damage(f"{where} header has no END card within {_MAX_HEADER_BLOCKS} blocks (damaged)")


def fits_structure(path):
    """Every HDU of a FITS file, found by walking its blocks; raises on damage.

    Only headers are read.  Each HDU's data must be present in full (the
    file may lack the padding of its last block).

    Returns
    -------
    list of HDUInfo

    Raises
    ------
    _Damage
        With a message saying what is wrong and where.
    """
    size = os.path.getsize(path)
    if size == 0:
        raise _Damage("the file is empty")
    hdus = []
    offset = 0
    with open(path, "rb") as fh:
        while offset < size:
            index = len(hdus)
            if index and size - offset < BLOCK:
                fh.seek(offset)
                tail = fh.read(size - offset)
                if tail.startswith(b"XTENSION"):
                    raise _Damage(f"HDU {index} header is cut short at byte {size} (the file is "
                                  f"truncated)")
                if tail.strip(b"\0 "):
                    raise _Damage(f"{size - offset} bytes after the last HDU are not FITS "
                                  f"(the file is damaged)")
                break
            text, data_offset = _read_header(fh, offset, size, index)
            if text is None:
                break
            where = "primary" if index == 0 else f"HDU {index}"
            with warnings.catch_warnings():
                warnings.simplefilter("ignore")
                try:
                    header = fits.Header.fromstring(text)
                except Exception as exc:   # astropy's parser on damaged text
                    raise _Damage(f"{where} header cannot be parsed ({_short(exc)})") from None
                bitpix = _card_int(header, "BITPIX", where)
                if bitpix not in _BITPIX:
                    raise _Damage(f"{where} header card BITPIX is {bitpix}; FITS allows 8, 16, "
                                  f"32, 64, -32, -64")
                naxis = _card_int(header, "NAXIS", where)
                if not 0 <= naxis <= 999:
                    raise _Damage(f"{where} header card NAXIS is {naxis}")
                axes = [_card_int(header, f"NAXIS{k}", where) for k in range(1, naxis + 1)]
                if any(a < 0 for a in axes):
                    raise _Damage(f"{where} header has a negative NAXISn")
                pcount = _card_int(header, "PCOUNT", where, default=0)
                gcount = _card_int(header, "GCOUNT", where, default=1)
                kind = "PRIMARY" if index == 0 else str(_card(header, "XTENSION", "")).strip().upper()
                name = "PRIMARY" if index == 0 else str(_card(header, "EXTNAME", "")).strip()
            count = math.prod(axes) if naxis else 0
            data_bytes = abs(bitpix) // 8 * gcount * (pcount + count) if naxis else 0
            if data_offset + data_bytes > size:
                missing = data_offset + data_bytes - size
                raise _Damage(f"{where} ({name or kind}) data are cut short: the file ends "
                              f"{missing} bytes before the end of the data (truncated)")
            hdus.append(HDUInfo(index=index, header_offset=offset, data_offset=data_offset,
                                data_bytes=data_bytes, header=header, kind=kind, name=name,
                                bitpix=bitpix, shape=tuple(reversed(axes))))
            offset = data_offset + -(-data_bytes // BLOCK) * BLOCK
    if not hdus:
        raise _Damage("not a FITS file")
    return hdus


def _short(exc):
    text = " ".join(str(exc).split())
    return text if len(text) <= 120 else text[:117] + "..."


def _read_array(path, hdu, dtype=np.float64):
    """Whole data array of an image HDU (small arrays: READTIME, STARTOFF), scaled."""
    raw = np.fromfile(path, dtype=_BITPIX[hdu.bitpix], count=math.prod(hdu.shape),
                      offset=hdu.data_offset).reshape(hdu.shape)
    return _scaled(raw, hdu.header.get("BSCALE", 1.0), hdu.header.get("BZERO", 0.0),
                   hdu.header.get("BLANK") if hdu.bitpix > 0 else None, dtype)


def _scale_into(out, raw, ref):
    """Write ``raw`` (the stored values of ``ref``'s data) scaled into ``out``, as :func:`_scaled`."""
    np.copyto(out, raw, casting="unsafe")
    if ref.bitpix > 0 and math.isfinite(ref.blank):
        out[raw == int(ref.blank)] = np.nan
    if ref.bscale != 1:
        out *= ref.bscale
    if ref.bzero != 0:
        out += ref.bzero


def _scaled(raw, bscale, bzero, blank, dtype=np.float64):
    out = raw.astype(dtype)
    if blank is not None:
        out[raw == blank] = np.nan
    if bscale != 1:
        out *= bscale
    if bzero != 0:
        out += bzero
    return out
