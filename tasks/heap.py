"""Hand the memory a stage has let go back to the operating system.

A reduction alternates large temporary arrays (a chunk's reads, a grid's
per-model curves) with many small objects (tables, records).  The C
allocator keeps freed memory of its heap for later use, and small objects
left between freed blocks keep it from shrinking, so the resident memory of
a long run stays at the high-water mark of every earlier step and grows with
the visit.  :func:`give_back` asks the allocator to release what is free
(``malloc_trim`` of the GNU C library; nothing elsewhere); the stages call
it where they have just let go of visit-sized data, before they allocate
again (a figure's canvas, the next stage's arrays).
"""

import ctypes

__all__ = ["give_back"]

_TRIM = {"function": None, "looked": False}


def _trim_function():
    if not _TRIM["looked"]:
        _TRIM["looked"] = True
        try:
            libc = ctypes.CDLL("libc.so.6")     # (find_library would start a process)
            function = libc.malloc_trim
            function.argtypes = [ctypes.c_size_t]
            function.restype = ctypes.c_int
            _TRIM["function"] = function
        except (OSError, AttributeError):      # not the GNU C library: nothing to do
            _TRIM["function"] = None
    return _TRIM["function"]


def give_back():
    """Return the C heap's free memory to the operating system; True if any was returned.

    Costs a few milliseconds (a walk over the heap); the numbers of a
    reduction do not depend on it.
    """
    function = _trim_function()
    if function is None:
        return False
    return bool(function(0))
