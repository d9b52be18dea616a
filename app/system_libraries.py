"""The system libraries Qt needs before it can open a window, checked before Qt starts.

With PySide6 from pip, a missing library of the xcb platform plugin makes Qt abort the
process (a core dump, exit 134) with a message that names the plugin, not the library. So
the workbench loads each library first, by its soname, and when one is missing says in one
sentence which Debian/Ubuntu package to install. The lists are the plugin's and QtGui's
direct dependencies (`readelf -d` on PySide6 6.x's libqxcb.so, libQt6XcbQpa.so.6,
libqoffscreen.so and libQt6Gui.so.6), beyond the C and C++ runtimes every system has."""

from __future__ import annotations

import ctypes
import sys
from pathlib import Path
from typing import Callable, Mapping

# soname -> the Debian/Ubuntu package that ships it
GUI_LIBRARIES = {  # QtGui itself and the offscreen plugin (what .ci/run installs)
    "libEGL.so.1": "libegl1",
    "libGL.so.1": "libgl1",
    "libfontconfig.so.1": "libfontconfig1",
    "libfreetype.so.6": "libfreetype6",
    "libxkbcommon.so.0": "libxkbcommon0",
    "libX11.so.6": "libx11-6",
    "libdbus-1.so.3": "libdbus-1-3",
    "libglib-2.0.so.0": "libglib2.0-0",
}
XCB_LIBRARIES = {  # the xcb platform plugin, on an X11 desktop
    "libxcb.so.1": "libxcb1",
    "libX11-xcb.so.1": "libx11-xcb1",
    "libxkbcommon-x11.so.0": "libxkbcommon-x11-0",
    "libxcb-cursor.so.0": "libxcb-cursor0",
    "libxcb-icccm.so.4": "libxcb-icccm4",
    "libxcb-image.so.0": "libxcb-image0",
    "libxcb-keysyms.so.1": "libxcb-keysyms1",
    "libxcb-randr.so.0": "libxcb-randr0",
    "libxcb-render.so.0": "libxcb-render0",
    "libxcb-render-util.so.0": "libxcb-render-util0",
    "libxcb-shape.so.0": "libxcb-shape0",
    "libxcb-shm.so.0": "libxcb-shm0",
    "libxcb-sync.so.1": "libxcb-sync1",
    "libxcb-util.so.1": "libxcb-util1",
    "libxcb-xfixes.so.0": "libxcb-xfixes0",
    "libxcb-xkb.so.1": "libxcb-xkb1",
}


def qt_platform(env: Mapping[str, str], platform: str = sys.platform) -> str:
    """The platform plugin Qt will try first: QT_QPA_PLATFORM's first entry, else on Linux
    xcb (Qt tries wayland first in a Wayland session, so that is named instead)."""
    requested = env.get("QT_QPA_PLATFORM", "").split(";")[0].split(":")[0].strip()
    if requested:
        return requested
    if not platform.startswith("linux"):
        return "native"
    if env.get("XDG_SESSION_TYPE") == "wayland" and env.get("WAYLAND_DISPLAY"):
        return "wayland"
    return "xcb"


def _bundled(soname: str) -> bool:
    """A library the PySide6 wheel ships itself (found through the plugin's rpath, not by name)."""
    try:
        import importlib.util

        spec = importlib.util.find_spec("PySide6")
    except (ImportError, ValueError):
        return False
    if spec is None or not spec.submodule_search_locations:
        return False
    return any((Path(p) / "Qt" / "lib" / soname).exists() for p in spec.submodule_search_locations)


def _loads(soname: str) -> bool:
    try:
        ctypes.CDLL(soname)
        return True
    except OSError:
        return _bundled(soname)


def missing_libraries(env: Mapping[str, str], platform: str = sys.platform,
                      loads: Callable[[str], bool] | None = None) -> dict[str, str]:
    """The libraries (soname -> package) Qt will need on this platform that cannot be loaded."""
    loads = loads or _loads
    if not platform.startswith("linux"):
        return {}
    wanted = dict(GUI_LIBRARIES)
    if qt_platform(env, platform) == "xcb":
        wanted.update(XCB_LIBRARIES)
    return {soname: package for soname, package in wanted.items() if not loads(soname)}


def missing_libraries_message(env: Mapping[str, str], platform: str = sys.platform,
                              loads: Callable[[str], bool] | None = None) -> str | None:
    """One sentence naming the packages to install, or None when nothing is missing."""
    missing = missing_libraries(env, platform, loads)
    if not missing:
        return None
    packages = " ".join(sorted(set(missing.values())))
    names = ", ".join(missing)
    where = f"Qt's {qt_platform(env, platform)} platform" if set(missing) - set(GUI_LIBRARIES) else "Qt"
    return (f"chunkscope: the window cannot open because {where} needs system libraries that are missing ({names}); "
            f"on Debian or Ubuntu install them with: sudo apt-get install {packages}")
