"""Start-up on Linux: a missing X11 library or display is a one-line error, not a Qt abort."""

from __future__ import annotations

import os
import subprocess
import sys

import pytest

from viewer.errors import HeadlightError
from viewer.gui.app import XCB_LIBRARIES, check_display, missing_xcb_libraries, uses_xcb


def test_which_platforms_need_the_x11_libraries():
    assert uses_xcb({}, "linux")
    assert uses_xcb({"QT_QPA_PLATFORM": "xcb"}, "linux")
    assert not uses_xcb({"QT_QPA_PLATFORM": "offscreen"}, "linux")
    assert not uses_xcb({"QT_QPA_PLATFORM": "wayland;xcb"}, "linux")
    assert not uses_xcb({"WAYLAND_DISPLAY": "wayland-0", "XDG_SESSION_TYPE": "wayland"}, "linux")
    assert not uses_xcb({}, "darwin")


def test_missing_libraries_are_named_with_their_packages():
    absent = {"libxcb-cursor.so.0", "libxcb-keysyms.so.1"}
    with pytest.raises(HeadlightError) as err:
        check_display({"DISPLAY": ":0"}, loads=lambda name: name not in absent)
    message = str(err.value)
    assert "\n" not in message
    assert "libxcb-cursor.so.0" in message and "libxcb-keysyms.so.1" in message
    assert "sudo apt install libxcb-cursor0 libxcb-keysyms1" in message
    assert "libxcb-icccm4" not in message


def test_no_display_is_refused_and_offscreen_needs_nothing():
    with pytest.raises(HeadlightError, match="no X display"):
        check_display({}, loads=lambda name: True)
    check_display({"QT_QPA_PLATFORM": "offscreen"}, loads=lambda name: False)  # no error
    check_display({"DISPLAY": ":0"}, loads=lambda name: True)


def test_the_library_table_is_what_the_loader_can_check():
    # every entry is a versioned soname, so dlopen looks up exactly that library
    assert all(".so." in name for name in XCB_LIBRARIES)
    assert set(missing_xcb_libraries(lambda name: False)) == set(XCB_LIBRARIES)


@pytest.mark.skipif(not sys.platform.startswith("linux"), reason="X11 is a Linux matter here")
def test_headlight_without_a_display_exits_2_with_one_line(tmp_path):
    env = {k: v for k, v in os.environ.items() if k not in ("QT_QPA_PLATFORM", "DISPLAY", "WAYLAND_DISPLAY")}
    env["HOME"] = str(tmp_path)
    run = subprocess.run(
        [sys.executable, "-m", "viewer"], env=env, capture_output=True, text=True, timeout=120
    )
    assert run.returncode == 2, run.stderr[-2000:]
    lines = run.stderr.strip().splitlines()
    assert len(lines) == 1 and lines[0].startswith("headlight: error: the window cannot start")


def test_the_window_module_loads_no_numerical_library():
    """The window appears before numpy, SciPy, matplotlib or torch load (they come later, in the
    background): importing it must not pull them in."""
    code = (
        "import sys, viewer.gui.window; print(sorted(m for m in ('numpy', 'scipy', "
        "'matplotlib', 'torch', 'transformers') if m in sys.modules))"
    )
    env = {**os.environ, "QT_QPA_PLATFORM": "offscreen"}
    run = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, env=env, timeout=120)
    assert run.returncode == 0, run.stderr[-2000:]
    assert run.stdout.strip() == "[]"
