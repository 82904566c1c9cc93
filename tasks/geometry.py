"""Where the spectrum should fall on the subarray, from the profile and the visit.

These are a priori guesses for masks and apertures; the extract stage measures
the trace from the data.
"""

import numpy as np

__all__ = ["expected_trace_rows", "expected_source_rows"]


def expected_trace_rows(visit, nx, origin):
    """Expected trace row (subarray rows) at each subarray column, at the start of a scan."""
    prof, tgt = visit.profile, visit.target
    x = np.arange(nx) + origin[0]
    x_ref = tgt["source_x"] + prof.column_offset
    return tgt["source_y"] + prof.row_offset + prof.tilt * (x - x_ref) - origin[1]


def expected_source_rows(visit, nx, ny, origin, scan_velocity, exposure_time):
    """(row_lo, row_hi) that the source is expected to cover in an exposure.

    The trace (padded by four profile widths) swept by ``scan_velocity`` rows/s
    over ``exposure_time`` s, clipped to the subarray.
    """
    rows = expected_trace_rows(visit, nx, origin)
    sweep = scan_velocity * exposure_time
    lo = min(rows.min(), rows.min() + sweep) - 4 * visit.profile.width
    hi = max(rows.max(), rows.max() + sweep) + 4 * visit.profile.width
    return int(max(0, np.floor(lo))), int(min(ny, np.ceil(hi) + 1))
