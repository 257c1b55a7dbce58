"""Keep freed memory in the process for reuse (glibc malloc settings).

A large panel's estimation allocates and frees many temporaries of tens of
megabytes.  By default glibc serves each of them with a fresh ``mmap`` and
returns it on ``free``, so the kernel maps and zeroes the same amount again
for the next one: at 10^6 rows about half a million page faults per estimate
and a large share of its time.  :func:`keep_freed_memory` raises malloc's
``mmap`` threshold to its ceiling (32 MiB on 64-bit systems) and its trim
threshold, so that freed blocks stay in the heap and are reused.  Peak memory
is unchanged in kind (the heap keeps at most what was in use at the peak);
memory is handed back to the system when the process ends.

The command line calls it at start-up.  It is a process-wide setting, so the
Python API leaves it to the caller.  On systems without glibc it does nothing.
Setting the environment variable ``CONDUCT_KEEP_FREED_MEMORY=0`` turns it off.
"""

from __future__ import annotations

import ctypes
import ctypes.util
import os
import sys

__all__ = ["MMAP_THRESHOLD", "TOP_PAD", "TRIM_THRESHOLD", "keep_freed_memory"]

# mallopt parameter numbers (glibc <malloc.h>)
_M_TRIM_THRESHOLD = -1
_M_TOP_PAD = -2
_M_MMAP_THRESHOLD = -3
MMAP_THRESHOLD = 32 * 1024 * 1024  # glibc's ceiling on 64-bit (DEFAULT_MMAP_THRESHOLD_MAX)
TRIM_THRESHOLD = 1024 * 1024 * 1024  # free heap kept before trimming back to the system
TOP_PAD = 64 * 1024 * 1024  # extra heap asked for on each extension

_applied: bool | None = None


def _glibc() -> ctypes.CDLL | None:
    if not sys.platform.startswith("linux"):
        return None
    try:
        libc = ctypes.CDLL(ctypes.util.find_library("c") or "libc.so.6")
        libc.gnu_get_libc_version.restype = ctypes.c_char_p
        libc.gnu_get_libc_version()
        libc.mallopt.argtypes = [ctypes.c_int, ctypes.c_int]
        libc.mallopt.restype = ctypes.c_int
    except (OSError, AttributeError):
        return None
    return libc


def keep_freed_memory() -> bool:
    """Ask glibc malloc to keep freed blocks for reuse instead of unmapping them.

    Returns
    -------
    bool
        True when the settings are in force (now or from an earlier call);
        False on systems without glibc, when glibc refused a setting, or when
        ``CONDUCT_KEEP_FREED_MEMORY=0``.

    Notes
    -----
    Sets ``M_MMAP_THRESHOLD`` (32 MiB), ``M_TRIM_THRESHOLD`` (1 GiB) and
    ``M_TOP_PAD`` (64 MiB) with ``mallopt``.  Setting any of them turns off
    glibc's dynamic threshold, so the three are set together.
    """
    global _applied
    if _applied is not None:
        return _applied
    if os.environ.get("CONDUCT_KEEP_FREED_MEMORY", "1").strip().lower() in ("0", "false", "no",
                                                                              "off"):
        _applied = False
        return False
    libc = _glibc()
    if libc is None:
        _applied = False
        return False
    ok = all(libc.mallopt(param, value) == 1 for param, value in (
        (_M_MMAP_THRESHOLD, MMAP_THRESHOLD),
        (_M_TRIM_THRESHOLD, TRIM_THRESHOLD),
        (_M_TOP_PAD, TOP_PAD),
    ))
    _applied = ok
    return ok
