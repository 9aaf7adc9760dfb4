"""Keep freed array memory in the process for the next capture (glibc malloc only).

Every capture allocates the same few dozen arrays of 0.5-4 MB (spectra,
envelope views, floors). glibc serves blocks above its mmap threshold with
fresh ``mmap`` pages and unmaps them on ``free``, and trims the heap top
beyond its trim threshold: each capture then page-faults its working set in
again (measured: about 2 800 faults, 5-10 ms of system CPU per 65 536-sample
capture on the 2-core reference box, ``docs/benchmarks.md``). Raising both
thresholds (``mallopt(M_MMAP_THRESHOLD)``/``mallopt(M_TRIM_THRESHOLD)``,
glibc manual §3.2.3.9 "Malloc Tunable Parameters") lets the heap keep those
pages; resident memory then stays at the per-capture peak, which the
process reaches anyway. A no-op elsewhere (musl, macOS) or when the
``MALLOC_MMAP_THRESHOLD_``/``MALLOC_TRIM_THRESHOLD_`` environment variables
already set them.
"""

from __future__ import annotations

import ctypes
import ctypes.util
import os

#: mallopt parameter numbers (glibc <malloc.h>)
_M_TRIM_THRESHOLD = -1
_M_MMAP_THRESHOLD = -3
#: blocks up to this size come from the heap: glibc's largest accepted value,
#: DEFAULT_MMAP_THRESHOLD_MAX in malloc/malloc.c — 4 MiB × sizeof(long) (32 MiB)
#: on 64-bit, 512 KiB on 32-bit (from memory of the glibc source; mallopt
#: refuses more and the call below then reports False)
MMAP_THRESHOLD_BYTES = 4 * 1024 * 1024 * 8 if ctypes.sizeof(ctypes.c_long) == 8 else 512 * 1024
#: free memory at the heap top kept up to this size
TRIM_THRESHOLD_BYTES = 128 * 1024 * 1024

_done = False


def keep_freed_memory() -> bool:
    """Raise glibc's mmap and trim thresholds once per process; True if applied."""
    global _done
    if _done:
        return True
    if "MALLOC_MMAP_THRESHOLD_" in os.environ or "MALLOC_TRIM_THRESHOLD_" in os.environ:
        return False  # the operator chose: leave it
    name = ctypes.util.find_library("c")
    try:
        libc = ctypes.CDLL(name or "libc.so.6")
        mallopt = libc.mallopt
    except (OSError, AttributeError):
        return False  # not glibc
    mallopt.argtypes = (ctypes.c_int, ctypes.c_int)
    mallopt.restype = ctypes.c_int
    ok = mallopt(_M_MMAP_THRESHOLD, MMAP_THRESHOLD_BYTES) == 1
    ok = ok and mallopt(_M_TRIM_THRESHOLD, TRIM_THRESHOLD_BYTES) == 1
    _done = ok
    return ok
