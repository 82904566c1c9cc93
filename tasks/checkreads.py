"""The validation pass's look at every raw exposure's pixels.

Exposures whose pixels are all non-finite, or all saturated or clipped, are
set aside with their reason; integer storage that wrapped around is warned
about.  The exposures of one file are read together (one memory map) and
summarised a block at a time.
"""

import numpy as np

from lightledger.pipeline.errors import InputFileError
from lightledger.pipeline.rawreads import summarize_exposures

from .rawio import read_exposure, read_exposures, set_aside

__all__ = ["clip_level"]


def clip_level(ref, bias, saturation):
    """ADU above which a repeated top value counts as clipped (None: any value).

    Floating-point storage: any exact repeat of a pixel's top is a clip.
    Integer storage, where small values repeat by chance: only tops above
    half the saturation level (ADU above bias).
    """
    return None if ref.bitpix < 0 else np.asarray(bias, float) + 0.5 * float(saturation)


#: Bytes of float64 reads the validation pass summarises at once (a block of one file's exposures).
_SCAN_BLOCK_BYTES = 4 << 20


def _scan_blocks(refs, todo):
    """Indices of ``todo`` in blocks of one file, one frame shape and one storage, in order."""
    block, key = [], None
    for i in todo:
        r = refs[i]
        k = (r.file, tuple(r.shape), r.bitpix, r.bscale)
        size = 8 * int(np.prod(r.shape))
        if block and (k != key or (len(block) + 1) * size > _SCAN_BLOCK_BYTES):
            yield block
            block = []
        block.append(i)
        key = k
    if block:
        yield block


def _read_block(refs):
    """The reads of a block of exposures (float64), or None when one of them cannot be read."""
    try:
        return read_exposures(refs, dtype=np.float64)
    except InputFileError:
        return None


def _scan_reads(refs, references, profile, problems, progress):
    """Set aside exposures with no usable pixel; warn about wrapped integer storage.

    The exposures of one file are read together (one memory map) and summarised a block at a
    time; an exposure of a block that cannot be read is read again alone, for its own reason.
    """
    out = list(refs)
    todo = [i for i, r in enumerate(out) if not r.excluded]
    wrapped = []
    done = 0
    for block in _scan_blocks(out, todo):
        if progress is not None:
            progress(done, len(todo))
        done += len(block)
        chosen = [out[i] for i in block]
        reads = _read_block(chosen)
        if reads is None:
            good = []
            for i in block:
                try:
                    good.append((i, read_exposure(out[i])[None]))
                except InputFileError as exc:
                    out[i] = set_aside(out[i], f"cannot read the reads ({str(exc).split(': ', 1)[-1]})")
            block = [i for i, _ in good]
            reads = np.concatenate([a for _, a in good]) if good else None
        if reads is None:
            continue
        r0 = out[block[0]]
        summaries = summarize_exposures(reads, bias=references.bias, saturation=profile.saturation,
                                        span=r0.wrap,
                                        clip_level=clip_level(r0, references.bias, profile.saturation))
        del reads
        for i, summary in zip(block, summaries):
            r = out[i]
            if summary.n_not_finite == summary.n_pixels:
                out[i] = set_aside(r, "every pixel is NaN or infinite in every read")
            elif summary.n_usable == 0:
                kind = "saturated or clipped" if summary.n_clipped else "saturated"
                out[i] = set_aside(r, f"every pixel is {kind} from read {summary.first_untrusted} on "
                                      f"(fewer than 2 usable reads; detector.saturation "
                                      f"{profile.saturation:g} ADU above bias)")
            if summary.n_wrapped:
                wrapped.append((r, summary.n_wrapped))
    if progress is not None and todo:
        progress(len(todo), len(todo))
    if wrapped:
        r, n = wrapped[0]
        bits = abs(r.bitpix)
        more = f"; likewise {len(wrapped) - 1} more exposures" if len(wrapped) > 1 else ""
        problems.warning(r.label, f"{n} pixels wrapped around the {bits}-bit integer storage of "
                                  f"READS (a read drops by more than half of 2**{bits} ADU); their "
                                  f"reads from the wrap on are treated as saturated{more}")
    return out
