"""The check of the system libraries Qt needs, made before Qt starts (issue 11, item 10): a
fake loader stands for the machine. The library lists come from `readelf -d` on PySide6's
xcb and offscreen plugins; the package names are Debian 12's (checked with apt-cache)."""

import subprocess
import sys

import pytest

from app.system_libraries import GUI_LIBRARIES, XCB_LIBRARIES, missing_libraries_message, qt_platform


def loader(missing=()):
    return lambda soname: soname not in missing


def test_the_platform_qt_tries_first():
    assert qt_platform({}, "linux") == "xcb"
    assert qt_platform({"DISPLAY": ":0"}, "linux") == "xcb"
    assert qt_platform({"QT_QPA_PLATFORM": "offscreen"}, "linux") == "offscreen"
    assert qt_platform({"QT_QPA_PLATFORM": "xcb:dpi=96"}, "linux") == "xcb"
    assert qt_platform({"QT_QPA_PLATFORM": "wayland;xcb"}, "linux") == "wayland"
    assert qt_platform({"XDG_SESSION_TYPE": "wayland", "WAYLAND_DISPLAY": "wayland-0"}, "linux") == "wayland"
    assert qt_platform({}, "darwin") == "native"


def test_a_missing_xcb_library_names_the_package_to_install():
    message = missing_libraries_message({"DISPLAY": ":0"}, "linux", loader({"libxcb-cursor.so.0"}))
    assert message.startswith("chunkscope: the window cannot open because Qt's xcb platform needs")
    assert "libxcb-cursor.so.0" in message and message.endswith("sudo apt-get install libxcb-cursor0")
    assert "\n" not in message
    several = missing_libraries_message({}, "linux", loader({"libxcb-icccm.so.4", "libxcb-keysyms.so.1"}))
    assert several.endswith("sudo apt-get install libxcb-icccm4 libxcb-keysyms1")


def test_nothing_missing_or_not_xcb_means_no_message():
    everything = set(XCB_LIBRARIES) | set(GUI_LIBRARIES)
    assert missing_libraries_message({"DISPLAY": ":0"}, "linux", loader()) is None
    # offscreen (the screenshot mode, CI) does not use the xcb plugin's libraries
    assert missing_libraries_message({"QT_QPA_PLATFORM": "offscreen"}, "linux", loader(set(XCB_LIBRARIES))) is None
    assert missing_libraries_message({}, "darwin", loader(everything)) is None
    # but QtGui's own are needed by every platform
    offscreen = missing_libraries_message({"QT_QPA_PLATFORM": "offscreen"}, "linux", loader({"libEGL.so.1"}))
    assert offscreen.endswith("sudo apt-get install libegl1") and "because Qt needs" in offscreen


@pytest.mark.skipif(not sys.platform.startswith("linux"), reason="the xcb platform is Linux's")
def test_the_workbench_exits_with_one_sentence_instead_of_a_core_dump(monkeypatch, capsys):
    import app.main
    import app.system_libraries as libs

    monkeypatch.setattr(libs, "_loads", lambda soname: soname != "libxcb-cursor.so.0")
    monkeypatch.setenv("DISPLAY", ":0")
    monkeypatch.delenv("QT_QPA_PLATFORM", raising=False)
    monkeypatch.delenv("WAYLAND_DISPLAY", raising=False)
    monkeypatch.delenv("XDG_SESSION_TYPE", raising=False)
    assert app.main.run_workbench() == 1
    err = capsys.readouterr().err
    assert err.count("\n") == 1 and "apt-get install libxcb-cursor0" in err


def test_the_check_runs_before_qt_is_imported():
    code = ("import os, sys; os.environ['QT_QPA_PLATFORM'] = 'offscreen'; "
            "from app.system_libraries import missing_libraries_message as m; m(os.environ); "
            "print('PySide6' in sys.modules)")
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, check=True)
    assert out.stdout.strip() == "False"
