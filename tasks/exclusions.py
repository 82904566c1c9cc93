"""Exposures the observer sets aside by hand: the visit's ``[exclude]`` lists.

:func:`apply_exclusions` sets aside the exposures named by file, by number or
by a time range, with the reason given, and reports names that match
nothing.
"""

import math
from pathlib import Path

from .rawio import set_aside

__all__ = ["apply_exclusions"]


def apply_exclusions(refs, exclude, raw_dir, visit_path, problems):
    """Set aside the exposures the observer excludes by hand; errors for names that match nothing."""
    out = list(refs)
    names = {Path(r.file).name for r in refs}
    for k, (name, reason) in enumerate(exclude.get("files", ())):
        if name not in names:
            problems.error(visit_path, f"exclude.files[{k}] names {name!r}, which is not a "
                                       f"*.fits file of {raw_dir}")
            continue
        why = f"excluded by the visit description (exclude.files){': ' + reason if reason else ''}"
        out = [set_aside(r, why) if Path(r.file).name == name else r for r in out]
    n_numbered = sum(1 for r in refs if math.isfinite(r.start_mjd))
    for k, (first, last, reason) in enumerate(exclude.get("exposures", ())):
        if last >= n_numbered:
            problems.error(visit_path, f"exclude.exposures[{k}] names exposure {last}; the visit's "
                                       f"exposures are numbered 0 to {n_numbered - 1}")
            continue
        why = f"excluded by the visit description (exclude.exposures){': ' + reason if reason else ''}"
        out = [set_aside(r, why) if first <= r.exposure <= last and math.isfinite(r.start_mjd)
               else r for r in out]
    for k, (lo, hi, reason) in enumerate(exclude.get("times", ())):
        why = f"excluded by the visit description (exclude.times){': ' + reason if reason else ''}"
        hit = 0
        for i, r in enumerate(out):
            if not math.isfinite(r.start_mjd):
                continue
            end = r.start_mjd + (r.read_times[-1] if r.read_times else 0.0) / 86400.0
            if r.start_mjd <= hi and end >= lo:
                hit += 1
                out[i] = set_aside(r, why)
        if not hit:
            problems.warning(visit_path, f"exclude.times[{k}] covers no exposure of the visit")
    return out
