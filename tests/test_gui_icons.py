"""Toolbar and window icons ship inside the package, so a wheel install shows them too.

The SVGs live in the top-level icons/ folder (the project's layout); latticeread/gui/icons is a
symbolic link to it, which setuptools follows when it builds a wheel. Every icon the window asks
for must be a file in latticeread/gui/icons/ (found through
importlib.resources, as an installed package would be), load as a non-null QIcon that draws
something, and be matched by the package-data patterns in pyproject.toml (what setuptools
copies into the wheel; checked by hand with ``pip wheel . --no-deps`` and ``unzip -l``).
"""

from __future__ import annotations

import fnmatch
import tomllib
from importlib import resources
from pathlib import Path

import pytest

pytest.importorskip("pytestqt")

from PySide6 import QtGui, QtWidgets  # noqa: E402

import latticeread  # noqa: E402
from latticeread.gui import main_window as mw  # noqa: E402
from latticeread.gui.app import make_app  # noqa: E402
from latticeread.gui.settings import AppSettings  # noqa: E402

ROOT = Path(__file__).resolve().parents[1]
PACKAGE = Path(latticeread.__file__).resolve().parent


@pytest.fixture(scope="module")
def requested(tmp_path_factory):
    """Names of every icon the main window asks for while it is built."""
    make_app()
    names = []
    original = mw._icon

    def recording(name):
        names.append(name)
        return original(name)

    mw._icon = recording
    try:
        w = mw.MainWindow(settings=AppSettings(tmp_path_factory.mktemp("ini") / "s.ini"), synchronous=True,
                          offer_restore=False, autosave_interval_s=0)
    finally:
        mw._icon = original
    yield names, w
    w.close()
    w.deleteLater()


def test_every_requested_icon_is_package_data_and_loads(requested):
    names, _w = requested
    assert {"latticeread", "open", "save", "reconstruct", "cancel"} <= set(names)
    icons = resources.files("latticeread.gui").joinpath("icons")
    assert Path(str(mw.ICON_DIR)).is_relative_to(PACKAGE.resolve())  # the package path, link not followed
    for name in sorted(set(names)):
        assert icons.joinpath(f"{name}.svg").is_file(), f"icon {name}.svg is not in latticeread/gui/icons"
        icon = mw._icon(name)
        assert not icon.isNull(), name
        image = icon.pixmap(32, 32).toImage()
        assert not image.isNull()
        drawn = sum(image.pixelColor(x, y).alpha() > 0 for x in range(32) for y in range(32))
        assert drawn > 0, f"icon {name} draws nothing"


def test_every_toolbar_action_has_an_icon(requested):
    _names, w = requested
    toolbars = w.findChildren(QtWidgets.QToolBar)
    actions = [a for tb in toolbars for a in tb.actions() if not a.isSeparator()]
    assert len(actions) >= 8
    for act in actions:
        assert not act.icon().isNull(), f"toolbar action {act.text()!r} has no icon"
    assert not w.windowIcon().isNull()


def test_icons_are_matched_by_the_package_data_patterns():
    config = tomllib.loads((ROOT / "pyproject.toml").read_text(encoding="utf-8"))
    patterns = config["tool"]["setuptools"]["package-data"]["latticeread"]
    svgs = sorted((PACKAGE / "gui" / "icons").glob("*.svg"))
    assert len(svgs) == 12
    for svg in svgs:
        rel = svg.relative_to(PACKAGE).as_posix()
        assert any(fnmatch.fnmatch(rel, p) for p in patterns), f"{rel} would be missing from the wheel"
    # one copy only: the package's folder is the top-level icons/ itself
    assert (PACKAGE / "gui" / "icons").resolve() == (ROOT / "icons").resolve()


def test_a_missing_icon_gives_a_null_icon_not_an_error():
    make_app()
    assert isinstance(mw._icon("no-such-icon"), QtGui.QIcon) and mw._icon("no-such-icon").isNull()
