"""Guard against a reference-count bug of PySide6 6.12 on CPython 3.11.

Some PySide6 6.12 calls return ``None``/``True``/``False`` without taking a reference: each
``QApplication.processEvents()``, ``QTest.qWait()`` or argument-less ``signal.emit()`` lowers
the reference count of one of these singletons by one (CPython 3.12 made them immortal, so the
bug is harmless there). On 3.11, after a few thousand such calls the count reaches zero and the
interpreter aborts with "Fatal Python error: none_dealloc" or "bool_dealloc".

``protect_singletons`` gives those objects a very large reference count once, which is what
CPython 3.12 does for immortal objects, so the lost references can never bring them to zero. It
does nothing on other Pythons or implementations. ``pyproject.toml`` pins
PySide6 below 6.12 (6.11.3 was measured clean); this guard only acts when 6.12 is installed
anyway. Remove it once PySide6 is fixed or the project requires Python 3.12.
"""

from __future__ import annotations

import ctypes
import sys

_BOOST = 1 << 40  # far more references than a session could ever lose
_done = False


def protect_singletons() -> bool:
    """Make None, True, False, Ellipsis and NotImplemented effectively immortal (once).

    Returns True when the counts were raised (PySide6 6.12 on a CPython < 3.12 release build).
    """
    global _done
    if _done:
        return True
    import PySide6

    if (not PySide6.__version__.startswith("6.12.")
            or sys.implementation.name != "cpython" or sys.version_info >= (3, 12)
            or hasattr(sys, "getobjects")):  # debug builds put other fields first
        return False
    for obj in (None, True, False, Ellipsis, NotImplemented):
        # ob_refcnt is the first field of every object in a CPython release build
        ctypes.c_ssize_t.from_address(id(obj)).value += _BOOST
    _done = True
    return True
