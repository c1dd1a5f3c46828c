"""How the C library's allocator keeps the memory a process frees (glibc on Linux).

A decode allocates and frees arrays of a few hundred kilobytes by the thousand: the scope CSV's
vectorised readers make a dozen for every 512 kB chunk of text. By default glibc's ``malloc``
serves a block of 128 kB or more with a fresh ``mmap`` until it has seen one that size freed,
and gives the top of its heap back to the system whenever more than twice that is free there
(``M_MMAP_THRESHOLD``, ``M_TRIM_THRESHOLD``, both adjusted as blocks are freed); every page of
memory given back and taken again is faulted in, and zeroed, by the kernel once more. With the
arrays of a CSV chunk that took longer than parsing it: a 996 MB scope CSV was parsed in 5.9-8.1
s as it is and in 3.5-5.3 s with the thresholds below (three pairs of runs, alternating, two
parses each); a decode of a WAV changed by less than its runs differ.

:func:`keep_freed_memory` sets the thresholds once for the process: blocks up to
:data:`MMAP_THRESHOLD` come from the heap, and up to :data:`TRIM_THRESHOLD` of free memory at the
heap's top stays mapped for the next blocks. The freed memory is reused, not added to: in the
benchmark (``benchmarks/scale.py``) the decode process's peak moved by less than 10 MiB for WAV,
CSV and HDF5 alike; what a process holds between its peaks stays higher, most in the worker
process of an hour of WAV (158-160 MiB against 134-152). The command line calls it when it
starts, as do the worker processes of a local batch; a program that uses the library may call
it itself. (source: the Linux man-pages project, mallopt(3),
from memory: the mmap threshold starts at 128 kB and rises to the size of a larger block freed,
up to 32 MB on 64-bit systems, the trim threshold follows at twice it, and setting either one
ends that adjustment; ``mallopt`` returns 1 on success, 0 on error.)
"""

from __future__ import annotations

import ctypes
import sys

#: mallopt(3) parameter numbers (glibc's malloc.h)
M_TRIM_THRESHOLD = -1
M_MMAP_THRESHOLD = -3
#: blocks up to this size come from the heap (above the 4 MB pieces the CSV spool is read in)
MMAP_THRESHOLD = 8 * 1024 * 1024
#: free memory at the top of the heap kept mapped, up to this much
TRIM_THRESHOLD = 32 * 1024 * 1024

_done: bool | None = None


def keep_freed_memory() -> bool:
    """Set the allocator's thresholds (see the module's text) once; whether they are set
    (False where the C library is not glibc, or refuses them). Calling it again does nothing
    (``tests/test_heap.py`` measures what it does)."""
    global _done
    if _done is None:
        _done = _set_thresholds()
    return _done


def _set_thresholds() -> bool:
    if not sys.platform.startswith("linux"):
        return False
    try:
        libc = ctypes.CDLL(None)
    except OSError:
        return False
    if not hasattr(libc, "gnu_get_libc_version") or not hasattr(libc, "mallopt"):
        return False  # another C library: its allocator has thresholds of its own, or none
    mallopt = libc.mallopt
    mallopt.argtypes = [ctypes.c_int, ctypes.c_int]
    mallopt.restype = ctypes.c_int
    return mallopt(M_MMAP_THRESHOLD, MMAP_THRESHOLD) == 1 and (
        mallopt(M_TRIM_THRESHOLD, TRIM_THRESHOLD) == 1
    )
