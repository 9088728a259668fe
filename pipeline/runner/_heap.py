"""A worker gives its free heap memory back to the system between units.

A unit's large arrays are memory-mapped and go back to the system when
freed, but glibc's allocator keeps freed smaller blocks (and, once it has
raised its mapping threshold after freeing a large block, arrays of up to
32 MB) in its heap for reuse: after a detect unit of the 4096-column night a
process held ~90 MB more than it used.  That costs nothing while the worker
runs units like it, which reuse the heap, but a worker left idle while the
other runs a night-wide stage (astrometry, the zero point) holds it all
along, and the process tree's peak memory is then reached there.
:func:`release_free_memory` asks glibc to return the heap's free pages
(``malloc_trim(0)``, a few ms); elsewhere (another C library) it does
nothing.
"""

from __future__ import annotations

import ctypes
import functools

__all__ = ["release_free_memory"]


@functools.cache
def _malloc_trim():
    """glibc's ``malloc_trim``, or None where the C library has none."""
    try:  # the process's own symbols, the C library's among them
        trim = ctypes.CDLL(None).malloc_trim
    except (OSError, AttributeError):
        return None
    trim.argtypes = [ctypes.c_size_t]
    trim.restype = ctypes.c_int
    return trim


def release_free_memory() -> bool:
    """Return the C heap's free pages to the system; whether the C library could."""
    trim = _malloc_trim()
    if trim is None:
        return False
    trim(0)
    return True
