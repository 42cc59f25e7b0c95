"""Process-wide allocator tuning for streaming work.

Each chunk allocates output arrays of up to a few MiB. With glibc's default
settings such blocks are mapped fresh from the kernel and page-faulted on
first touch at every call, which costs as much as the FFT itself. Raising the
mmap and trim thresholds makes glibc reuse freed heap blocks instead. Both the
benchmark (for bank and baseline alike) and every block process call this.
Elsewhere than glibc it does nothing.
"""

from __future__ import annotations

import ctypes
import ctypes.util

_M_TRIM_THRESHOLD = -1
_M_MMAP_THRESHOLD = -3
_THRESHOLD = 32 * 1024 * 1024      # glibc's maximum for the mmap threshold on 64-bit


def reuse_chunk_buffers() -> bool:
    """Ask glibc to keep blocks up to 32 MiB on the heap; return True if it took effect."""
    name = ctypes.util.find_library("c")
    if not name:
        return False
    try:
        libc = ctypes.CDLL(name)
        mallopt = libc.mallopt
    except (OSError, AttributeError):
        return False
    mallopt.argtypes = [ctypes.c_int, ctypes.c_int]
    ok = mallopt(_M_MMAP_THRESHOLD, _THRESHOLD) == 1
    ok = mallopt(_M_TRIM_THRESHOLD, 2 * _THRESHOLD) == 1 and ok
    return ok
