"""Malloc settings that keep freed memory for reuse (conduct.heap).

Each check runs in a fresh interpreter, since the settings are process-wide.
The observable effect is read back from glibc's own accounting
(``mallinfo2``, glibc >= 2.33): after the settings, a 20 MB block is served
from the heap arena, not from a separate ``mmap`` (``hblks`` counts mmapped
blocks in use; the probe reports its change across the allocation).
"""

from __future__ import annotations

import os
import subprocess
import sys

import pytest

_PROBE = r"""
import ctypes, sys
import numpy as np
from conduct import heap
libc = ctypes.CDLL("libc.so.6")
class Info(ctypes.Structure):
    _fields_ = [(n, ctypes.c_size_t) for n in ("arena ordblks smblks hblks hblkhd usmblks "
                                               "fsmblks uordblks fordblks keepcost").split()]
libc.mallinfo2.restype = Info
if sys.argv[1] == "on":
    print("applied", heap.keep_freed_memory())
before = libc.mallinfo2().hblks
a = np.ones(20 * 1024 * 1024 // 8)  # 20 MiB: above glibc's default mmap threshold
print("hblks", libc.mallinfo2().hblks - before)
"""


def _glibc_with_mallinfo2() -> bool:
    if not sys.platform.startswith("linux"):
        return False
    import ctypes
    try:
        return hasattr(ctypes.CDLL("libc.so.6"), "mallinfo2")
    except OSError:
        return False


def _probe(mode: str, **env: str) -> dict[str, str]:
    out = subprocess.run([sys.executable, "-c", _PROBE, mode], capture_output=True, text=True,
                         check=True, env={**os.environ, **env}).stdout
    return dict(line.split(" ", 1) for line in out.strip().splitlines())


@pytest.mark.skipif(not _glibc_with_mallinfo2(), reason="needs glibc >= 2.33 (mallinfo2)")
def test_large_blocks_come_from_the_heap_once_settings_are_on():
    # glibc's documented default: blocks of 128 KiB and more are mmapped (mallopt(3), from memory)
    assert _probe("off")["hblks"] == "1"
    on = _probe("on")
    assert on["applied"] == "True"
    assert on["hblks"] == "0"


@pytest.mark.skipif(not _glibc_with_mallinfo2(), reason="needs glibc >= 2.33 (mallinfo2)")
@pytest.mark.parametrize("value", ["0", "False", " no "])
def test_environment_variable_turns_it_off(value: str):
    off = _probe("on", CONDUCT_KEEP_FREED_MEMORY=value)
    assert off["applied"] == "False"
    assert off["hblks"] == "1"


def test_command_line_applies_it(tmp_path):
    code = ("from conduct import heap; from conduct.cli import main; "
            "import contextlib, io\n"
            "with contextlib.redirect_stdout(io.StringIO()): main(['history', '" + str(tmp_path)
            + "'])\nprint(heap._applied)")
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True,
                         check=True).stdout.strip().splitlines()
    expected = "True" if _glibc_with_mallinfo2() else None
    if expected is not None:
        assert out[-1] == expected
    else:
        assert out[-1] in ("True", "False")
