"""Start the desktop program: display check, QApplication, main window, files from the command line."""

from __future__ import annotations

import os
import sys

__all__ = ["display_problem", "make_app", "run_gui"]


def display_problem(environ=None, platform: str | None = None) -> str | None:
    """Why no window can be shown, or None when a display is available.

    On Linux Qt needs an X11 or Wayland display unless a platform plugin is chosen with
    ``QT_QPA_PLATFORM`` (e.g. ``offscreen``); without one Qt aborts with a misleading message
    about xcb libraries, so we say what is really missing.
    """
    env = os.environ if environ is None else environ
    platform = sys.platform if platform is None else platform
    if not platform.startswith("linux"):
        return None
    if env.get("DISPLAY") or env.get("WAYLAND_DISPLAY") or env.get("QT_QPA_PLATFORM"):
        return None
    return ("latticeread: no display found (neither DISPLAY nor WAYLAND_DISPLAY is set), so the window "
            "cannot open.\n"
            "  - on a remote machine, connect with 'ssh -X' or run under a virtual display (xvfb-run);\n"
            "  - to run without any window, use the command line: 'latticeread reconstruct --help';\n"
            "  - to render offscreen (screenshots, tests), set QT_QPA_PLATFORM=offscreen.")


def make_app(argv=None):
    """The QApplication (created once), with pyqtgraph's row-major image convention."""
    from PySide6 import QtWidgets

    import pyqtgraph as pg

    pg.setConfigOptions(imageAxisOrder="row-major")
    app = QtWidgets.QApplication.instance()
    if app is None:
        app = QtWidgets.QApplication(list(argv) if argv is not None else [sys.argv[0]])
        app.setApplicationName("latticeread")
        app.setOrganizationName("latticeread")
    return app


def run_gui(files=(), *, settings_path=None, restore: bool = True) -> int:
    """Open the main window (optionally on ``files``) and run the event loop; returns the exit code."""
    problem = display_problem()
    if problem:
        print(problem, file=sys.stderr)
        return 1
    app = make_app()
    from latticeread.gui.main_window import MainWindow
    from latticeread.gui.settings import AppSettings

    window = MainWindow(settings=AppSettings(settings_path) if settings_path else None,
                        offer_restore=restore and not files, defer_panels=True)
    window.show()
    for f in list(files)[:1]:
        window.open_path(f)
    if len(files) > 1:
        window.show_status(f"opened {files[0]}; one frame file at a time, the others were not opened")
    return int(app.exec())
