"""The main window: wires the image pane, the occupation view and the analysis panels to a Session.

Views never compute: they show what the :class:`latticeread.session.Session` holds and send
user actions back to it. Long work (calibration, reconstruction of a stack, PSF estimate,
model image) runs in a :class:`latticeread.gui.workers.WorkerPool`; the session is changed
only on the GUI thread.

Redraws are coalesced: session signals mark parts of the window dirty and one timer tick
redraws them, at most every ``REFRESH_INTERVAL_MS`` while a stack is being processed, so a
fast stream of results cannot stall the GUI thread.
"""

from __future__ import annotations

import logging
import os
import time
import traceback
from collections import deque
from pathlib import Path

import numpy as np
from PySide6 import QtCore, QtGui, QtWidgets

from latticeread.errors import LatticeReadError
from latticeread.gui import dialogs
from latticeread.gui.image_pane import COLOR_MAP_NAMES, VIEW_MODES, ImagePane
from latticeread.gui.occupation_view import OccupationView
from latticeread.gui.settings import AppSettings
from latticeread.gui.workers import WorkerPool, import_core
from latticeread.session import Session

__all__ = ["MainWindow", "FRAME_FILTER"]

log = logging.getLogger(__name__)

FRAME_FILTER = "Frames (*.tif *.tiff *.h5 *.hdf5 *.npy *.npz);;All files (*)"
SESSION_FILTER = "latticeread session (*.json)"
CALIBRATION_FILTER = "latticeread calibration (*.json);;All files (*)"


def _is_calibration_file(path) -> bool:
    """True when ``path`` is a calibration JSON (not a saved session)."""
    import json

    try:
        with open(path, encoding="utf-8") as fh:
            head = json.load(fh)
    except (OSError, ValueError):
        return False
    return isinstance(head, dict) and head.get("format") == "latticeread-calibration"
REFRESH_INTERVAL_MS = 200     # redraw period while a stack is processed
HISTOGRAM_INTERVAL_S = 1.0    # re-histogram period while a stack is processed
#: worker processes for reconstructing a stack (keeps the interpreter lock free for the GUI)
RECONSTRUCT_PROCESSES = max(1, min(4, (os.cpu_count() or 2)))
AUTOSAVE_INTERVAL_S = 60
#: live shots kept in the window while a folder is watched (frame stepping goes through them)
LIVE_SHOTS_KEPT = 50
#: Dialog titles of background work: the step the user took, as named in the menus
STEP_TITLES = {"calibrate": "Calibrate from frames", "geometry": "Re-estimate geometry", "psf": "Estimate PSF",
               "reconstruct": "Reconstruct all frames", "fidelity": "Estimate fidelity",
               "threshold": "Fit the threshold", "watch": "Watch a folder"}
#: narrowest a panel's dock may get (pixels); narrower panels scroll. With the image pane's own
#: minimum this keeps the window's minimum width well under a 1366-pixel laptop screen.
DOCK_MIN_WIDTH = 240
#: toolbar and window icons: top-level icons/, linked here as package data (pyproject.toml), so
#: wheel installs have them too
ICON_DIR = Path(__file__).resolve().parent / "icons"

#: (attribute, class name in latticeread.gui.panels, dock title, dock area, tooltip)
PANELS = (
    ("geometry_panel", "GeometryPanel", "Lattice geometry", "left",
     "Fourier spectrum, lattice vectors, fit quality, constraints, manual nudges and phase drift"),
    ("psf_panel", "PSFPanel", "Point-spread function", "left",
     "Image of one atom and its radial profile against the ideal Airy pattern"),
    ("fidelity_panel", "FidelityPanel", "Imaging fidelity", "left",
     "Loss and hopping between consecutive images, with confidence intervals"),
    ("histogram_panel", "HistogramPanel", "Amplitude histogram", "right",
     "Site amplitudes (photons), fitted components and the draggable threshold"),
    ("observables_panel", "ObservablesPanel", "Observables", "right",
     "Density, profiles, correlations and staggered order of the reconstructed frames"),
)


class FitScrollArea(QtWidgets.QScrollArea):
    """A scroll area whose panel fills the visible area and scrolls only below its minimum size.

    QScrollArea's own resizing gives a panel with word-wrapped labels the height of its
    preferred size (plots prefer 480 pixels), so the panel scrolled even where it fitted.
    """

    def setWidget(self, widget) -> None:  # noqa: N802 - Qt's name
        super().setWidget(widget)
        widget.installEventFilter(self)
        self._fit()

    def takeWidget(self):  # noqa: N802 - Qt's name
        widget = super().takeWidget()
        if widget is not None:
            widget.removeEventFilter(self)
        return widget

    def eventFilter(self, obj, event) -> bool:  # noqa: N802 - Qt's name
        if obj is self.widget() and event.type() == QtCore.QEvent.Type.LayoutRequest:
            QtCore.QTimer.singleShot(0, self._fit)
        return super().eventFilter(obj, event)

    def resizeEvent(self, event) -> None:  # noqa: N802 - Qt's name
        super().resizeEvent(event)
        self._fit()

    def _fit(self) -> None:
        widget = self.widget()
        if widget is None:
            return
        least = widget.minimumSizeHint().expandedTo(widget.minimumSize())
        for _ in range(2):  # a scroll bar that appears takes room from the other direction
            room = self.viewport().size()
            width = max(room.width(), least.width())
            lowest = least.height()
            layout = widget.layout()
            if layout is not None and layout.hasHeightForWidth():
                # word-wrapped labels need more lines at this width than the minimum size hint assumes
                lowest = max(lowest, layout.totalMinimumHeightForWidth(width))
            height = max(room.height(), lowest)
            if lowest > room.height():
                # it scrolls anyway: give it its comfortable height, not its most squeezed one
                hint = widget.heightForWidth(width) if widget.hasHeightForWidth() else widget.sizeHint().height()
                height = max(height, min(hint, int(1.4 * room.height())))
            size = QtCore.QSize(width, height)
            if size != widget.size():
                widget.resize(size)


def _icon(name: str) -> QtGui.QIcon:
    path = ICON_DIR / f"{name}.svg"
    return QtGui.QIcon(str(path)) if path.exists() else QtGui.QIcon()


class MainWindow(QtWidgets.QMainWindow):
    """The desktop program's window.

    Parameters
    ----------
    session : Session, optional
        Model to show (a new empty one by default).
    settings : AppSettings, optional
        Remembered settings; tests pass ``AppSettings(tmp_path / "s.ini")``.
    synchronous : bool
        Run background work in the GUI thread (tests).
    autosave_interval_s : float
        Period of the crash-recovery autosave; 0 disables it.
    offer_restore : bool
        On start, offer to restore an autosaved session left by a crash.
    defer_panels : bool
        Build the analysis panels (and import what they need, e.g. scipy) right after the
        window is shown instead of before, so the window appears sooner.
    """

    sessionReplaced = QtCore.Signal(object)

    def __init__(self, *, session: Session | None = None, settings: AppSettings | None = None,
                 synchronous: bool = False, autosave_interval_s: float = AUTOSAVE_INTERVAL_S,
                 offer_restore: bool = True, defer_panels: bool = False, parent=None):
        super().__init__(parent)
        self.setObjectName("latticeread_main")
        self.app_settings = settings or AppSettings()
        self.workers = WorkerPool(synchronous=synchronous, parent=self, before_start=import_core)
        self.session: Session | None = None
        self._connections: list = []
        self._dirty: set[str] = set()
        self._last_error: str | None = None
        self._progress_total = 0
        self._progress_done = 0
        self._closing = False
        self._last_histogram = 0.0
        #: newest live shots of a watch (frame stepping moves through them), and the one shown
        self._live_shots: deque = deque(maxlen=LIVE_SHOTS_KEPT)
        self._live_position = 0
        self._live_shown = None
        self.setWindowTitle("latticeread")
        self.setWindowIcon(_icon("latticeread"))
        self.setAcceptDrops(True)
        self._fit_to_screen(1500, 940)

        self.image_pane = ImagePane()
        self.setCentralWidget(self.image_pane)
        self.occupation_view = OccupationView()
        self.docks: dict[str, QtWidgets.QDockWidget] = {}
        self.panels: dict[str, QtWidgets.QWidget] = {}
        self._build_docks(defer=defer_panels)
        self._build_status_bar()
        self._build_actions()
        self._build_menus()
        self._build_toolbar()

        self._refresh_timer = QtCore.QTimer(self)
        self._refresh_timer.setSingleShot(True)
        self._refresh_timer.timeout.connect(self._refresh)
        self._undo_group_timer = QtCore.QTimer(self)
        self._undo_group_timer.setSingleShot(True)
        self._undo_group_timer.setInterval(1000)
        self._undo_group_timer.timeout.connect(lambda: self.session and self.session.close_undo_group())
        self._autosave_timer = QtCore.QTimer(self)
        self._autosave_debounce = QtCore.QTimer(self)
        self._autosave_debounce.setSingleShot(True)
        self._autosave_debounce.setInterval(5000)
        self._autosave_debounce.timeout.connect(self.autosave)
        if autosave_interval_s and autosave_interval_s > 0:
            self._autosave_timer.setInterval(int(autosave_interval_s * 1000))
            self._autosave_timer.timeout.connect(self.autosave)
            self._autosave_timer.start()

        self._wire_views()
        self._cache_axes()
        self.set_session(session or Session())
        self._layout_restored = self.app_settings.restore_window(self)
        self._restore_view_options()
        if defer_panels:
            QtCore.QTimer.singleShot(0, self.load_panels)
        if offer_restore:
            QtCore.QTimer.singleShot(0, self._offer_restore)

    # ================================================================== construction
    def _fit_to_screen(self, width: int, height: int) -> None:
        """Start at ``width`` x ``height`` pixels, or the screen's free area when it is smaller."""
        screen = self.screen()
        if screen is not None:
            free = screen.availableGeometry()
            width, height = min(width, free.width()), min(height, free.height())
        self.resize(width, height)

    def _build_docks(self, *, defer: bool = False) -> None:
        self.setDockNestingEnabled(True)
        for attr, cls_name, title, area, tip in PANELS:
            if defer:
                widget = QtWidgets.QLabel(f"{title}: loading ...")
                widget.setProperty("placeholder", True)
                widget.setAlignment(QtCore.Qt.AlignCenter)
                widget.setToolTip("The panel is being loaded")
            else:
                widget = self._make_panel(cls_name, title)
            self.panels[attr] = widget
            setattr(self, attr, widget)
            self._add_dock(attr, title, widget, area, tip)
        self._add_dock("occupation", "Occupation", self.occupation_view, "right",
                       "Occupation matrix of this frame and the mean over the reconstructed frames", scroll=False)
        from latticeread.gui.site_inspector import SiteInspector

        self.site_inspector = SiteInspector()
        self._add_dock("inspector", "Site inspector", self.site_inspector, "right",
                       "Click a site in the image: its image, model and residual, and its amplitude and "
                       "P(atom) in every frame")
        self.tabifyDockWidget(self.docks["occupation"], self.docks["inspector"])
        self.docks["occupation"].raise_()
        self.tabifyDockWidget(self.docks["geometry_panel"], self.docks["psf_panel"])
        self.tabifyDockWidget(self.docks["psf_panel"], self.docks["fidelity_panel"])
        self.tabifyDockWidget(self.docks["occupation"], self.docks["observables_panel"])
        self.docks["geometry_panel"].raise_()
        self.docks["occupation"].raise_()
        self.resizeDocks([self.docks["geometry_panel"], self.docks["histogram_panel"]], [430, 430],
                         QtCore.Qt.Horizontal)

    @staticmethod
    def _make_panel(cls_name: str, title: str) -> QtWidgets.QWidget:
        from latticeread.gui import panels as panel_pkg

        try:
            return getattr(panel_pkg, cls_name)()
        except (ImportError, AttributeError) as exc:  # a panel missing from this build
            log.warning("panel %s unavailable: %s", cls_name, exc)
            widget = QtWidgets.QLabel(f"{title}: this panel is not available in this build")
            widget.setAlignment(QtCore.Qt.AlignCenter)
            widget.setToolTip("This panel could not be loaded")
            return widget

    def load_panels(self) -> None:
        """Build the analysis panels that were deferred (see ``defer_panels``) and show the session."""
        for attr, cls_name, title, _area, _tip in PANELS:
            if not self.panels[attr].property("placeholder"):
                continue  # already a real panel
            widget = self._make_panel(cls_name, title)
            old = self.panels[attr]
            self.panels[attr] = widget
            setattr(self, attr, widget)
            holder = self.docks[attr].widget()
            if isinstance(holder, QtWidgets.QScrollArea):
                holder.takeWidget()
                holder.setWidget(widget)
            else:
                self.docks[attr].setWidget(widget)
            old.deleteLater()
        self._wire_panels()
        self._cache_axes()
        self._mark("frames", "frame", "calibration", "amplitudes", "classification", "threshold", "fidelity",
                   "settings")
        self._restore_view_options()
        import_core()  # now, while the user looks at the window, not when the first analysis starts

    def _cache_axes(self) -> None:
        """Keep every plot axis as a pixmap that is redrawn only when the axis itself changes.

        Drawing the tick labels is the largest part of a repaint; while the threshold is
        dragged or a stack is processed most axes stay the same, so they are copied, not
        redrawn (same pixels: the cache is in device coordinates).
        """
        import pyqtgraph as pg

        for view in self.findChildren(pg.GraphicsView):
            for item in view.scene().items():
                if isinstance(item, pg.AxisItem):
                    item.setCacheMode(QtWidgets.QGraphicsItem.DeviceCoordinateCache)

    def dock_content(self, key: str) -> QtWidgets.QWidget:
        """The panel shown in dock ``key`` (inside its scroll area, if any)."""
        holder = self.docks[key].widget()
        return holder.widget() if isinstance(holder, QtWidgets.QScrollArea) else holder

    def _add_dock(self, key: str, title: str, widget, area: str, tip: str, *, scroll: bool = True) -> None:
        """A dock holding ``widget``; with ``scroll`` the dock may be smaller than the panel's
        minimum size (scroll bars appear), so the window fits small screens."""
        dock = QtWidgets.QDockWidget(title, self)
        dock.setObjectName(f"dock_{key}")
        if scroll:
            holder = FitScrollArea()
            holder.setMinimumWidth(DOCK_MIN_WIDTH)
            holder.setObjectName(f"scroll_{key}")
            holder.setFrameShape(QtWidgets.QFrame.NoFrame)
            holder.setWidget(widget)
            dock.setWidget(holder)
        else:
            dock.setWidget(widget)
        dock.setToolTip(tip)
        dock.toggleViewAction().setToolTip(f"Show or hide the {title.lower()} panel")
        dock.toggleViewAction().setStatusTip(tip)
        self.addDockWidget(QtCore.Qt.LeftDockWidgetArea if area == "left" else QtCore.Qt.RightDockWidgetArea, dock)
        self.docks[key] = dock

    def _build_status_bar(self) -> None:
        bar = self.statusBar()
        self.status_label = QtWidgets.QLabel("ready: open a frame file (File > Open frames, or drop it here)")
        self.status_label.setToolTip("What the program is doing")
        self.hover_label = QtWidgets.QLabel("")
        self.hover_label.setToolTip("Site under the cursor: indices (row along a1, col along a2), "
                                    "amplitude in photons, posterior probability of an atom")
        # labels may shrink (text cut) rather than push the window wider than the screen
        self.status_label.setSizePolicy(QtWidgets.QSizePolicy.Ignored, QtWidgets.QSizePolicy.Preferred)
        self.status_label.setMinimumWidth(120)
        self.hover_label.setMinimumWidth(200)
        self.progress = QtWidgets.QProgressBar()
        self.progress.setMaximumWidth(220)
        self.progress.setToolTip("Progress of the running analysis")
        self.progress.setVisible(False)
        self.cancel_button = QtWidgets.QPushButton("Cancel")
        self.cancel_button.setToolTip("Stop the running analysis (Esc); results so far are kept")
        self.cancel_button.setIcon(_icon("cancel"))
        self.cancel_button.setVisible(False)
        self.cancel_button.clicked.connect(self.cancel_work)
        self.calibration_label = QtWidgets.QLabel("")
        self.calibration_label.setObjectName("calibration_label")
        self.calibration_label.setTextInteractionFlags(QtCore.Qt.TextSelectableByMouse)
        self.calibration_label.setMaximumWidth(380)
        bar.addWidget(self.status_label, 1)
        bar.addPermanentWidget(self.calibration_label)
        bar.addPermanentWidget(self.hover_label)
        bar.addPermanentWidget(self.progress)
        bar.addPermanentWidget(self.cancel_button)
        self.workers.busy_changed.connect(self._busy_changed)

    def _action(self, text: str, slot, *, tip: str, shortcut=None, icon: str | None = None,
                checkable: bool = False) -> QtGui.QAction:
        act = QtGui.QAction(text, self)
        if shortcut is not None:
            shortcuts = shortcut if isinstance(shortcut, (list, tuple)) else [shortcut]
            act.setShortcuts([QtGui.QKeySequence(s) for s in shortcuts])
            keys = ", ".join(QtGui.QKeySequence(s).toString(QtGui.QKeySequence.NativeText) for s in shortcuts)
            tip = f"{tip} ({keys})"
        act.setToolTip(tip)
        act.setStatusTip(tip)
        if icon:
            act.setIcon(_icon(icon))
        act.setCheckable(checkable)
        if checkable:
            act.toggled.connect(slot)
        else:
            act.triggered.connect(lambda _checked=False: slot())
        self.addAction(act)
        return act

    def _build_actions(self) -> None:
        K = QtGui.QKeySequence
        a = self.actions_by_name = {}
        a["open"] = self._action("&Open frames...", self._open_dialog, tip="Open a TIFF, HDF5 or NumPy frame file",
                                 shortcut=K.Open, icon="open")
        a["open_session"] = self._action("Open &session...", self._open_session_dialog,
                                         tip="Reopen a saved session (frames, calibration, results)",
                                         shortcut="Ctrl+Shift+O")
        a["load_calibration"] = self._action("&Load calibration...", self._load_calibration_dialog,
                                             tip="Use a calibration JSON (from 'latticeread calibrate' or an "
                                             "export) for the open frames", shortcut="Ctrl+L")
        a["save_session"] = self._action("&Save session", self._save_session, tip="Save the session next to its "
                                         "results file", shortcut=K.Save, icon="save")
        a["save_session_as"] = self._action("Save session &as...", lambda: self._save_session(ask=True),
                                            tip="Save the session under a new name", shortcut="Ctrl+Shift+S")
        a["export_csv"] = self._action("Per-site table (CSV)...", lambda: self._export_dialog("csv"),
                                       tip="Write frame,row,col,x,y,amplitude,occupied,p_occupied,flags for "
                                       "every reconstructed frame", icon="export")
        a["export_h5"] = self._action("Occupation matrices (HDF5)...", lambda: self._export_dialog("h5"),
                                      tip="Write occupation matrices, amplitudes and settings to HDF5")
        a["export_cal"] = self._action("Calibration (JSON)...", lambda: self._export_dialog("cal"),
                                       tip="Write the lattice geometry, PSF, camera and threshold to JSON")
        a["quit"] = self._action("&Quit", self.close, tip="Close the program", shortcut=K.Quit)
        a["undo"] = self._action("&Undo", self._undo, tip="Undo the last calibration change", shortcut=K.Undo)
        a["redo"] = self._action("&Redo", self._redo, tip="Redo the calibration change", shortcut=K.Redo)
        a["settings"] = self._action("Analysis &settings...", self._settings_dialog,
                                     tip="Optics, pixel size, images per shot and frames used for calibration")
        a["calibrate"] = self._action("&Calibrate from frames", self.calibrate,
                                      tip="Estimate lattice geometry, PSF and threshold from the frames",
                                      shortcut="Ctrl+K", icon="estimate-geometry")
        a["estimate_geometry"] = self._action("Re-estimate &geometry", self.estimate_geometry,
                                              tip="Estimate the lattice vectors and phase again from the frames",
                                              shortcut="Ctrl+E", icon="estimate-geometry")
        a["estimate_psf"] = self._action("Estimate &PSF", self.estimate_psf,
                                         tip="Measure the PSF from isolated atoms", shortcut="Ctrl+P",
                                         icon="estimate-psf")
        a["reconstruct"] = self._action("&Reconstruct all frames", self.reconstruct_all,
                                        tip="Site amplitudes and occupations for every frame of the stack",
                                        shortcut="Ctrl+R", icon="reconstruct")
        a["fidelity"] = self._action("Estimate &fidelity", self.estimate_fidelity,
                                     tip="Loss and hopping from consecutive images of the same atoms",
                                     shortcut="Ctrl+Shift+F", icon="fidelity")
        a["cancel"] = self._action("&Cancel", self.cancel_work, tip="Stop the running analysis",
                                   shortcut="Esc", icon="cancel")
        a["watch"] = self._action("&Watch a folder...", self._watch_dialog,
                                  tip="Reconstruct every new frame file written into a folder with the current "
                                  "calibration and append it to a run file (HDF5)")
        a["next"] = self._action("&Next frame", lambda: self.step_frame(+1), tip="Show the next frame",
                                 shortcut=["Right", "PgDown"], icon="next-frame")
        a["prev"] = self._action("&Previous frame", lambda: self.step_frame(-1), tip="Show the previous frame",
                                 shortcut=["Left", "PgUp"], icon="previous-frame")
        a["grid"] = self._action("Lattice &grid", self.image_pane.set_grid_visible,
                                 tip="Show the lattice cell boundaries", shortcut="G", icon="toggle-grid",
                                 checkable=True)
        a["sites"] = self._action("Site &markers", self.image_pane.set_sites_visible,
                                  tip="Show site centres coloured occupied / empty / uncertain", shortcut="S",
                                  checkable=True)
        a["grid"].setChecked(True)
        a["sites"].setChecked(True)
        a["reset_layout"] = self._action("Reset &layout", self.reset_layout,
                                         tip="Put every panel back in its default place")
        a["shortcuts"] = self._action("&Keyboard shortcuts", self.show_shortcuts,
                                      tip="List every keyboard shortcut and mouse gesture", shortcut="F1")
        a["guide"] = self._action("&User guide", self.show_guide,
                                  tip="The bundled user guide (README): a tour of the window and the commands")
        a["about"] = self._action("&About latticeread", lambda: dialogs.show_about(self),
                                  tip="Version, purpose and the safety note")
        a["safety"] = self._action("&Safety note", lambda: dialogs.show_info(self, "Safety", dialogs.SAFETY_TEXT),
                                   tip="What this program does and does not do")
        self.colormap_actions = QtGui.QActionGroup(self)
        for key, text in COLOR_MAP_NAMES.items():
            act = QtGui.QAction(text, self, checkable=True)
            act.setData(key)
            act.setToolTip(f"Show the image in the {text.split(' (')[0].lower()} colour map; the site markers "
                           "take colours that stay visible on it")
            act.setStatusTip(act.toolTip())
            act.setChecked(key == "inferno")
            act.triggered.connect(lambda _c=False, k=key: self.image_pane.set_color_map(k))
            self.colormap_actions.addAction(act)
        self.mode_actions = QtGui.QActionGroup(self)
        for key, text in VIEW_MODES.items():
            act = QtGui.QAction(text, self, checkable=True)
            act.setData(key)
            act.setToolTip(f"Image pane: {text.lower()}")
            act.setStatusTip(f"Image pane: {text.lower()}")
            act.setChecked(key == "raw")
            act.triggered.connect(lambda _c=False, k=key: self.image_pane.set_view_mode(k))
            self.mode_actions.addAction(act)

    def _build_menus(self) -> None:
        a = self.actions_by_name
        menu = self.menuBar()
        menu.setToolTip("Menus: File, Edit, Analysis, View, Help")
        self.menuBar().setNativeMenuBar(False)
        m = menu.addMenu("&File")
        m.setToolTipsVisible(True)
        m.addAction(a["open"])
        self.recent_menu = m.addMenu("Open &recent")
        self.recent_menu.setToolTipsVisible(True)
        self._update_recent_menu()
        m.addSeparator()
        m.addAction(a["load_calibration"])
        for k in ("open_session", "save_session", "save_session_as"):
            m.addAction(a[k])
        m.addSeparator()
        exp = m.addMenu("&Export")
        exp.setToolTipsVisible(True)
        for k in ("export_csv", "export_h5", "export_cal"):
            exp.addAction(a[k])
        exp.addSeparator()
        self.plot_menu = exp.addMenu("&Plot (PNG or SVG)")
        self.plot_menu.setToolTipsVisible(True)
        for key, title in self._plot_targets().items():
            act = self.plot_menu.addAction(f"{title}...")
            act.setToolTip(f"Save the {title.lower()} alone (axes, colour bar, legend) as a PNG bitmap or an "
                           "SVG vector file, in a size you choose")
            act.triggered.connect(lambda _c=False, k=key: self._export_plot_dialog(k))
        m.addSeparator()
        m.addAction(a["quit"])
        m = menu.addMenu("&Edit")
        m.setToolTipsVisible(True)
        for k in ("undo", "redo"):
            m.addAction(a[k])
        m.addSeparator()
        m.addAction(a["settings"])
        m = menu.addMenu("&Analysis")
        m.setToolTipsVisible(True)
        for k in ("calibrate", "estimate_geometry", "estimate_psf", "reconstruct", "fidelity"):
            m.addAction(a[k])
        m.addAction(a["watch"])
        m.addSeparator()
        m.addAction(a["cancel"])
        m = menu.addMenu("&View")
        m.setToolTipsVisible(True)
        for k in ("prev", "next"):
            m.addAction(a[k])
        m.addSeparator()
        m.addAction(a["grid"])
        m.addAction(a["sites"])
        modes = m.addMenu("&Raw or model")
        modes.setToolTipsVisible(True)
        for act in self.mode_actions.actions():
            modes.addAction(act)
        cmaps = m.addMenu("&Colour map")
        cmaps.setToolTipsVisible(True)
        for act in self.colormap_actions.actions():
            cmaps.addAction(act)
        m.addSeparator()
        for dock in self.docks.values():
            m.addAction(dock.toggleViewAction())
        m.addAction(a["reset_layout"])
        m = menu.addMenu("&Help")
        m.setToolTipsVisible(True)
        m.addAction(a["shortcuts"])
        m.addAction(a["guide"])
        m.addSeparator()
        m.addAction(a["about"])
        m.addAction(a["safety"])

    def _build_toolbar(self) -> None:
        a = self.actions_by_name
        tb = self.addToolBar("Main")
        tb.setObjectName("toolbar_main")
        tb.setToolTip("Frequent actions")
        tb.setToolButtonStyle(QtCore.Qt.ToolButtonTextBesideIcon)
        for k in ("open", "save_session", "calibrate", "reconstruct", "fidelity"):
            tb.addAction(a[k])
        tb.addSeparator()
        for k in ("prev", "next", "grid"):
            tb.addAction(a[k])
        ext = tb.findChild(QtWidgets.QToolButton, "qt_toolbar_ext_button")
        if ext is not None:  # shown when the window is too narrow for every button
            ext.setToolTip("More toolbar actions")

    def _plot_targets(self) -> dict[str, str]:
        return {"image": "Image with colour bar", "occupation": "Occupation matrices",
                "histogram": "Amplitude histogram", "spectrum": "Fourier spectrum", "drift": "Lattice phase drift",
                "psf_image": "PSF image", "psf_profile": "PSF radial profile", "fidelity": "Loss and hopping per shot"}

    def _plot_widget(self, key: str):
        """The pyqtgraph view holding plot ``key`` (only the plot: no buttons or boxes around it)."""
        gp, pp = self.geometry_panel, self.psf_panel
        views = {"image": lambda: self.image_pane.graphics, "occupation": lambda: self.occupation_view.graphics,
                 "histogram": lambda: self.histogram_panel.plot_widget, "spectrum": lambda: gp.spectrum_plot,
                 "drift": lambda: gp.drift_plot, "psf_image": lambda: pp.image_plot,
                 "psf_profile": lambda: pp.profile_plot, "fidelity": lambda: self.fidelity_panel.trend_plot}
        try:
            return views[key]()
        except AttributeError:
            from latticeread.errors import ExportError

            raise ExportError(f"the {self._plot_targets()[key].lower()} is not available yet: its panel is "
                              "still loading") from None

    #: what the mouse does in the plots (not QActions, so listed here for the shortcut list)
    MOUSE_GESTURES = (
        ("mouse wheel", "zoom the image or a plot"),
        ("drag with the left button", "pan the image or a plot; on the red line: move the threshold"),
        ("right click", "view options of a plot (View All, ranges)"),
        ("hover over a site", "its indices, amplitude and P(atom) in the status bar"),
    )

    def show_shortcuts(self):
        """Open the list of shortcuts, made from the window's own actions."""
        table = dialogs.shortcut_table(self.actions_by_name.values(), self.MOUSE_GESTURES)
        return dialogs.show_text(self, "Keyboard shortcuts", "# Keyboard shortcuts\n\n" + table, markdown=True,
                                 object_name="shortcuts")

    def show_guide(self):
        """Open the bundled user guide."""
        text, folder = dialogs.readme_text()
        return dialogs.show_text(self, "User guide", text, markdown=True, search_path=folder, object_name="guide")

    # ================================================================== wiring
    def _wire_views(self) -> None:
        self.image_pane.frameRequested.connect(self.set_frame_index)
        self.image_pane.siteHovered.connect(self._show_hover)
        self.image_pane.siteClicked.connect(lambda info: self.inspect_site(info["row"], info["col"]))
        self.site_inspector.frameRequested.connect(self.set_frame_index)
        self.image_pane.regionEdited.connect(self.set_region)
        self.site_inspector.excludeRequested.connect(self.exclude_site)
        self.site_inspector.maskRequested.connect(
            lambda x, y, r: self.image_pane.region_editor.add_shape("disk", excluded=True, center=(x, y), size=2 * r))
        self.image_pane.modelWanted.connect(self._compute_model)
        self.image_pane.overlaysChanged.connect(self._overlays_changed)
        self.occupation_view.siteHovered.connect(self._show_matrix_hover)
        self._wire_panels()

    def _wire_panels(self) -> None:
        hp, gp, pp = self.histogram_panel, self.geometry_panel, self.psf_panel
        feed = getattr(self, "observables_feed", None)
        if (hasattr(self.observables_panel, "set_observables")
                and getattr(feed, "panel", None) is not self.observables_panel):
            from latticeread.gui.observables_feed import ObservablesFeed

            self.observables_feed = ObservablesFeed(self, self.observables_panel)
        if hasattr(hp, "thresholdDragged"):
            hp.thresholdDragged.connect(self._threshold_dragged)
            hp.thresholdCommitted.connect(self._threshold_committed)
            hp.thresholdRefused.connect(self._threshold_refused)
            hp.methodChanged.connect(self._method_changed)
            hp.logScaleToggled.connect(lambda on: self.app_settings.set_value("view/histogram_log", bool(on)))
        if hasattr(gp, "reestimateRequested"):
            gp.reestimateRequested.connect(self.estimate_geometry)
            gp.constraintsChanged.connect(self._constraints_changed)
            gp.geometryEdited.connect(self._geometry_nudged)
        if hasattr(pp, "estimateRequested"):
            pp.estimateRequested.connect(self.estimate_psf)
            pp.opticsChanged.connect(self._optics_changed)

    def set_session(self, session: Session) -> None:
        """Show ``session`` (disconnecting the previous one)."""
        if self.session is not None:
            for sig, slot in self._connections:
                sig.disconnect(slot)
            self.workers.cancel()
        self._connections = []
        self.session = session
        for sig, slot in ((session.frames_changed, self._on_frames),
                          (session.index_changed, lambda _i: self._mark("frame", "classification")),
                          (session.calibration_changed, self._on_calibration),
                          (session.calibration_origin_changed, lambda _o: self._update_calibration_label()),
                          (session.amplitudes_changed, self._on_amplitudes),
                          (session.classification_changed, lambda: self._mark("classification")),
                          (session.threshold_result_changed, lambda _r: self._mark("threshold")),
                          (session.fidelity_changed, lambda _r: self._mark("fidelity")),
                          (session.settings_changed, lambda _s: self._mark("settings")),
                          (session.undo_changed, self._on_undo_state),
                          (session.modified_changed, self._on_modified),
                          (session.message, self.show_status)):
            sig.connect(slot)
            self._connections.append((sig, slot))
        self._on_undo_state(session.can_undo, session.can_redo)
        self._on_modified(session.modified)
        self._update_calibration_label()
        self.image_pane.clear()
        self.occupation_view.clear()
        self.site_inspector.clear()
        self._inspected = None
        for p in self.panels.values():
            if hasattr(p, "clear") and not p.property("placeholder"):
                p.clear()
        self._mark("frames", "frame", "calibration", "amplitudes", "classification", "threshold", "fidelity",
                   "settings")
        self._refresh()
        self.sessionReplaced.emit(session)

    # ================================================================== session -> views
    def _mark(self, *parts: str) -> None:
        self._dirty.update(parts)
        if not self._refresh_timer.isActive():
            self._refresh_timer.start(REFRESH_INTERVAL_MS if self.workers.running("reconstruct") else 0)

    def flush(self) -> None:
        """Redraw now whatever is pending (tests and benchmarks)."""
        self._refresh_timer.stop()
        self._refresh()

    def _on_frames(self, _frames) -> None:
        self.workers.cancel()
        # another stack: its display levels, zoom and model come from its own frames
        self.image_pane.clear()
        self._mark("frames", "frame", "amplitudes", "classification")
        s = self.session
        if s.source:
            self.app_settings.add_recent(s.source)
            self._update_recent_menu()
        self._update_title()

    def _update_calibration_label(self) -> None:
        """The calibration in use and where it came from, always visible in the status bar."""
        s = self.session
        cal = None if s is None else s.calibration
        if cal is None:
            self.calibration_label.setText("Calibration: none")
            self.calibration_label.setToolTip("No calibration in use: open frames with a calibration file "
                                              "beside them, load one (File > Load calibration) or "
                                              "calibrate from the frames (Analysis > Calibrate from frames)")
            return
        origin = s.calibration_origin
        text = f"Calibration: {origin.describe()}"
        metrics = self.calibration_label.fontMetrics()
        self.calibration_label.setText(metrics.elidedText(text, QtCore.Qt.ElideMiddle,
                                                          self.calibration_label.maximumWidth() - 8))
        g = cal.geometry
        camera = cal.camera
        lines = [f"Calibration in use: {origin.describe()}"]
        if origin.path:
            lines.append(f"file: {origin.path}")
        lines.append(f"lattice spacings {g.spacings[0]:.3f}, {g.spacings[1]:.3f} px, "
                     f"angle between vectors {np.degrees(g.angle_between):.1f} deg")
        lines.append(f"camera: {camera.kind}, EM gain {camera.em_gain:g}, "
                     f"{camera.counts_per_electron:g} counts per electron, bias {camera.bias:g} counts")
        lines.append(f"PSF: {cal.psf.kind}, FWHM {cal.psf.fwhm:.2f} px")
        if cal.pixel_size_nm:
            lines.append(f"pixel size in the atom plane: {cal.pixel_size_nm:g} nm")
        if origin.kind == "kept":
            lines.append("Made for another stack: load the calibration of these frames or calibrate anew "
                         "if they were taken with another lattice or camera.")
        self.calibration_label.setToolTip("\n".join(lines))

    def _on_calibration(self, cal) -> None:
        self._update_calibration_label()
        old, self._shown_calibration = getattr(self, "_shown_calibration", None), cal
        fields = ("geometry", "psf", "camera", "frame_shape", "amplitude_method", "pixel_size_nm", "options")
        self._show_region(cal)
        if old is not None and cal is not None and all(getattr(old, f) is getattr(cal, f) for f in fields):
            # only the threshold or its method changed: re-classification, nothing else to redraw
            self._mark("threshold", "classification", "method")
            return
        self._mark("calibration", "frame", "classification")
        self._process_current_frame()

    def _on_amplitudes(self, indices) -> None:
        self._mark("amplitudes", "classification")
        if not indices and self.session.calibration is not None:
            self._process_current_frame()
        self._schedule_autosave()

    def _refresh(self) -> None:
        dirty, self._dirty = self._dirty, set()
        s = self.session
        if s is None:
            return
        try:
            if "frames" in dirty:
                self.image_pane.set_frame_count(s.n_frames)
                if s.frames is None:
                    self.image_pane.clear()
            if "calibration" in dirty or "settings" in dirty:
                self._refresh_calibration()
            elif "method" in dirty and s.calibration is not None and hasattr(self.histogram_panel, "set_method"):
                self.histogram_panel.set_method(s.calibration.threshold_method)
            if "frame" in dirty and s.frames is not None:
                self._refresh_frame()
            if "amplitudes" in dirty:
                self._refresh_amplitudes()
            if "threshold" in dirty and hasattr(self.histogram_panel, "set_threshold_result"):
                tr = s.threshold_result
                hp = self.histogram_panel
                if hasattr(hp, "set_threshold_label"):
                    hp.set_threshold_label(f"threshold {{value:.1f}}\nframe {s.index}'s own fit" if s.per_frame
                                          else None)
                if tr is not None:
                    hp.set_threshold_result(tr)
                elif s.threshold is not None or s.per_frame:
                    hp.set_threshold(s.threshold)
            if "classification" in dirty:
                self._refresh_classification()
                if getattr(self, "observables_feed", None) is not None:
                    self.observables_feed.request()
            if "fidelity" in dirty and hasattr(self.fidelity_panel, "set_report"):
                if s.fidelity is None:
                    self.fidelity_panel.clear()
                else:
                    self.fidelity_panel.set_report(s.fidelity)
        except Exception as exc:  # noqa: BLE001 - a drawing bug must not kill the window
            log.exception("redraw failed")
            self.show_status(f"display error: {type(exc).__name__}: {exc}")
        self._update_actions()
        if self._dirty and not self._refresh_timer.isActive():
            self._refresh_timer.start(REFRESH_INTERVAL_MS)

    def _refresh_calibration(self) -> None:
        s = self.session
        cal = s.calibration
        st = s.settings
        gp, pp, hp = self.geometry_panel, self.psf_panel, self.histogram_panel
        pixel_size_nm = st.get("pixel_size_nm") or (cal.pixel_size_nm if cal is not None else None)
        self.image_pane.set_pixel_size(pixel_size_nm)
        if hasattr(gp, "set_geometry"):
            gp.set_geometry(None if cal is None else cal.geometry, pixel_size_nm=pixel_size_nm)
        if hasattr(gp, "set_distortion"):
            gp.set_distortion(None if cal is None else cal.distortion)
            gp.set_brightness(None if cal is None else cal.brightness, None if cal is None else cal.frame_shape)
        if hasattr(pp, "set_psf"):
            pp.set_psf(None if cal is None else cal.psf)
            pp.set_zones(None if cal is None else cal.psf_zones)
            pp.set_optics(numerical_aperture=st["numerical_aperture"], wavelength_nm=st["wavelength_nm"],
                          pixel_size_nm=st.get("pixel_size_nm"))
        if hasattr(hp, "set_method") and cal is not None:
            hp.set_method(cal.threshold_method)
        self._update_spectrum()

    def _current_geometry(self):
        s = self.session
        res = s.result()
        if res is not None:
            return res.geometry, res.sites
        cal = s.calibration
        if cal is None or s.sites is None:
            return (None if cal is None else cal.geometry), None
        return cal.geometry, None

    def _refresh_frame(self) -> None:
        if self._live_shots:
            return  # the image pane shows the watch's shots until it stops
        s = self.session
        try:
            image = s.frame()
        except LatticeReadError as exc:
            self.show_status(str(exc))
            return
        cal = s.calibration
        photons = None if cal is None else cal.camera.counts_to_photons(image)
        self.image_pane.set_frame(image, index=s.index, n_frames=s.n_frames, photons=photons)
        self._process_current_frame()

    def _refresh_amplitudes(self) -> None:
        s = self.session
        hp = self.histogram_panel
        if hasattr(hp, "set_amplitudes"):
            busy = self.workers.running("reconstruct") is not None
            now = time.perf_counter()
            if busy and now - self._last_histogram < HISTOGRAM_INTERVAL_S:
                self._dirty.add("amplitudes")  # redraw later; the stack is still growing
                return
            self._last_histogram = now
            # while a stack is processed the histogram is drawn from fewer frames (display only)
            amps = s.histogram_amplitudes(200_000 if busy else 500_000)
            if amps.size:
                hp.set_amplitudes(amps)
            else:
                hp.clear()
                if s.calibration is not None:
                    hp.set_method(s.calibration.threshold_method)
        gp = self.geometry_panel
        if hasattr(gp, "set_drift"):
            idx, offsets, trend = s.phase_drift()
            if len(idx) >= 2:
                methods, sigma = s.offset_records(idx)
                gp.set_drift(idx, offsets, trend, units="px", sigma=sigma, methods=methods)

    def _refresh_classification(self) -> None:
        s = self.session
        res = s.result()
        if self._live_shots:
            pass  # the image pane shows a live shot with its own markers
        elif res is None:
            geometry, sites = self._current_geometry()
            self.image_pane.set_lattice(geometry, None)
            self.occupation_view.set_current(None)
        elif self.image_pane.shows_result(res.sites, res.occupied) and self.occupation_view.has_current:
            # the shown frame's cached result did not change (e.g. another frame of a running
            # stack was stored): markers and matrix are up to date, skip rebuilding them
            pass
        else:
            self.image_pane.set_lattice(res.geometry, res.sites)
            self.image_pane.set_site_states(res.occupied, res.p_occupied, res.amplitudes)
            sites = res.sites
            self.occupation_view.set_current(res.occupation_matrix(fill=255), frame_index=s.index,
                                             row_min=sites.row_min, col_min=sites.col_min, check=res.check)
        mean = s.mean_occupation()
        if mean is None:
            self.occupation_view.set_mean(None)
        else:
            sites = s.sites
            self.occupation_view.set_mean(mean, n_frames=int(s.done.sum()))
        hp = self.histogram_panel
        if hasattr(hp, "set_counts"):
            counts = s.pooled_counts()
            if counts is not None:
                hp.set_counts(counts["occupied"], counts["empty"], counts["uncertain"])
        if self.image_pane.view_mode != "raw" and not self._live_shots:
            self._compute_model()
        if self.docks["inspector"].isVisible():
            self._refresh_inspector()

    def _update_spectrum(self) -> None:
        gp = self.geometry_panel
        s = self.session
        if not hasattr(gp, "set_spectrum") or s.frames is None:
            return
        try:
            job = s.spectrum_job()
        except LatticeReadError:
            return
        self.workers.submit("spectrum", job, on_result=lambda r: gp.set_spectrum(r[0], r[1]),
                            on_error=lambda exc: log.info("no spectrum: %s", exc))

    # ================================================================== frames
    def set_frame_index(self, index: int) -> None:
        if self._live_shots:
            self._show_live(int(index))
            return
        if self.session.frames is not None:
            self.session.set_index(index)
            self.image_pane.set_frame_count(self.session.n_frames)

    def step_frame(self, step: int) -> None:
        if self._live_shots:
            self._show_live(self._live_position + step)
            return
        self.set_frame_index(self.session.index + step)

    def _process_current_frame(self) -> None:
        """Reconstruct the shown frame in the background when it has no amplitudes yet."""
        s = self.session
        if s.calibration is None or s.frames is None or s.done[s.index]:
            return
        if self.workers.running("reconstruct"):
            return
        try:
            job = s.reconstruct_job([s.index], batch_size=1)
        except LatticeReadError as exc:
            self.show_status(str(exc))
            return
        self.workers.submit("current", job, on_yield=s.store_batch, on_error=self._failed_step("Reconstruct this frame"))

    def inspect_site(self, row: int, col: int) -> bool:
        """Show site (row, col) of the shown frame in the site inspector; False when it has no
        evidence yet (frame not reconstructed, site outside the region, live view)."""
        if self._live_shots:
            self.show_status("the site inspector works on the frames of the session, not on live frames")
            return False
        evidence = self.session.site_evidence(row, col)
        ex = self.session.excluded_sites()
        k = np.flatnonzero((ex.rows == row) & (ex.cols == col)) if ex is not None else np.zeros(0)
        if evidence is None and k.size:
            self._inspected = None
            self.site_inspector.show_excluded(row, col, float(ex.x[k[0]]), float(ex.y[k[0]]))
            self.docks["inspector"].show()
            self.docks["inspector"].raise_()
            return True
        if evidence is None:
            self.show_status(f"site ({row}, {col}): nothing to inspect yet (reconstruct this frame first)")
            return False
        self._inspected = (int(row), int(col))
        self.site_inspector.set_evidence(evidence)
        self.docks["inspector"].show()
        self.docks["inspector"].raise_()
        return True

    def _show_region(self, cal) -> None:
        """Draw the calibration's analysed region and the sites it leaves out on the image."""
        if cal is None:
            self.image_pane.set_region(None, None)
            return
        self.image_pane.set_region(cal.options.region, self.session.excluded_sites())
        self.site_inspector.spacing = float(min(cal.geometry.spacings))

    def set_region(self, region) -> bool:
        """Use an edited analysed region (one undo step); the shown frame is reconstructed again."""
        ok = self._guard(lambda: self.session.set_region(region), step="Change the analysed region")
        if ok:
            self.show_status(f"analysed region: {region.describe()}; reconstruct all frames (Ctrl+R) to apply it "
                             "to the whole stack")
        else:  # show the region in force again
            self._show_region(self.session.calibration)
        return ok

    def exclude_site(self, row: int, col: int, exclude: bool = True) -> bool:
        """Leave site (row, col) out of the analysed region, or let it back in (one undo step)."""
        ok = self._guard(lambda: self.session.exclude_sites([(row, col)], excluded=exclude),
                         step="Exclude a site" if exclude else "Include a site again")
        if ok:
            self.show_status(f"site ({row}, {col}) {'excluded from' if exclude else 'back in'} the analysed region")
            if exclude:
                self._inspected = None  # no evidence any more: the inspector keeps showing the excluded site
                ex = self.session.excluded_sites()
                k = np.flatnonzero((ex.rows == row) & (ex.cols == col)) if ex is not None else np.zeros(0)
                if k.size:
                    self.site_inspector.show_excluded(row, col, float(ex.x[k[0]]), float(ex.y[k[0]]))
            else:
                self.site_inspector.clear()
                self._inspected = (int(row), int(col))
        return ok

    def _refresh_inspector(self) -> None:
        inspected = getattr(self, "_inspected", None)
        if inspected is None or self._live_shots:
            return
        evidence = self.session.site_evidence(*inspected)
        self.site_inspector.set_evidence(evidence)
        if evidence is None:
            self._inspected = None

    # ================================================================== user actions
    def _threshold_dragged(self, value: float) -> None:
        if self.session.calibration is None:
            return
        # one drag = one undo step, however long the mouse is held: the step is closed when the
        # button is released (_threshold_committed), not by a timer
        self._undo_group_timer.stop()
        self._guard(lambda: self.session.set_threshold(value, group="threshold"), step="Set the threshold")

    def _threshold_committed(self, value: float) -> None:
        if self.session.calibration is None:
            return
        ok = self._guard(lambda: self.session.set_threshold(value, group="threshold"), step="Set the threshold")
        self.session.close_undo_group()
        if not ok:
            return
        self.show_status(f"threshold set to {value:.1f} photons")

    def _threshold_refused(self, message: str) -> None:
        from latticeread.errors import CalibrationError

        self._report(CalibrationError(message), step="Set the threshold")

    def _method_changed(self, method: str) -> None:
        if self.session.calibration is None:
            return
        self._guard(lambda: self.session.set_threshold_method(method))

    def _geometry_nudged(self, geometry) -> None:
        if self.session.calibration is None:
            return
        self.image_pane.set_lattice(geometry, None)
        self._guard(lambda: self.session.set_geometry(geometry, group="nudge"))
        self._undo_group_timer.start()

    def _constraints_changed(self, constraints: dict) -> None:
        self._constraints = dict(constraints)
        self.estimate_geometry()

    def _optics_changed(self, optics: dict) -> None:
        changes = {k: v for k, v in optics.items() if k in ("numerical_aperture", "wavelength_nm", "pixel_size_nm")}
        if changes.get("pixel_size_nm") is not None and changes["pixel_size_nm"] <= 0:
            changes["pixel_size_nm"] = None
        self._guard(lambda: self.session.update_settings(**changes))

    def _overlays_changed(self, overlays: dict) -> None:
        a = self.actions_by_name
        for key in ("grid", "sites"):
            a[key].blockSignals(True)
            a[key].setChecked(overlays[key])
            a[key].blockSignals(False)
        for act in self.mode_actions.actions():
            act.setChecked(act.data() == overlays["mode"])
        for act in self.colormap_actions.actions():
            act.setChecked(act.data() == overlays.get("colormap"))
        for k, v in overlays.items():
            self.app_settings.set_value(f"view/{k}", v)

    def _restore_view_options(self) -> None:
        st = self.app_settings
        self.image_pane.set_grid_visible(st.value("view/grid", True, bool))
        self.image_pane.set_sites_visible(st.value("view/sites", True, bool))
        mode = st.value("view/mode", "raw", str)
        if mode in VIEW_MODES:
            self.image_pane.set_view_mode(mode)
        cmap = st.value("view/colormap", "inferno", str)
        if cmap in COLOR_MAP_NAMES:
            self.image_pane.set_color_map(cmap)
        if hasattr(self.histogram_panel, "set_log_scale"):
            self.histogram_panel.set_log_scale(st.value("view/histogram_log", False, bool))

    def _undo(self) -> None:
        self.session.undo()

    def _redo(self) -> None:
        self.session.redo()

    def _settings_dialog(self) -> None:
        dlg = dialogs.AnalysisSettingsDialog({**self.session.settings,
                                              "camera": self.session.camera_model().to_dict()}, self)
        dlg.setAttribute(QtCore.Qt.WA_DeleteOnClose, True)
        dlg.accepted.connect(lambda: self._guard(lambda: self.session.update_settings(**dlg.values())))
        dlg.open()

    def reset_layout(self) -> None:
        for key, dock in self.docks.items():
            dock.setFloating(False)
            dock.setVisible(True)
        for attr, _cls, _title, area, _tip in PANELS:
            self.addDockWidget(QtCore.Qt.LeftDockWidgetArea if area == "left" else QtCore.Qt.RightDockWidgetArea,
                               self.docks[attr])
        self.addDockWidget(QtCore.Qt.RightDockWidgetArea, self.docks["occupation"])
        self.addDockWidget(QtCore.Qt.RightDockWidgetArea, self.docks["inspector"])
        self.tabifyDockWidget(self.docks["occupation"], self.docks["inspector"])
        self.docks["occupation"].raise_()
        self.tabifyDockWidget(self.docks["geometry_panel"], self.docks["psf_panel"])
        self.tabifyDockWidget(self.docks["psf_panel"], self.docks["fidelity_panel"])
        self.tabifyDockWidget(self.docks["occupation"], self.docks["observables_panel"])
        self.docks["geometry_panel"].raise_()
        self.docks["occupation"].raise_()
        self.size_docks()

    # ================================================================== analysis
    def calibrate(self) -> None:
        """Estimate geometry, PSF and threshold from the frames (background)."""
        s = self.session
        if s.frames is None:
            self.show_status("open a frame file first")
            return
        job = s.calibrate_job(constraints=getattr(self, "_constraints", None) or None)
        self._start("calibrate", job, "calibrating: lattice, PSF and threshold",
                    on_result=lambda cal: self._apply(lambda: s.store_calibration_from_frames(cal),
                                                      "calibration done"))

    def estimate_geometry(self) -> None:
        s = self.session
        if s.frames is None:
            self.show_status("open a frame file first")
            return
        if s.calibration is None:
            self.calibrate()
            return
        job = s.estimate_geometry_job(constraints=getattr(self, "_constraints", None) or None)
        self._start("geometry", job, "estimating the lattice geometry",
                    on_result=lambda g: self._apply(lambda: s.set_geometry(g), "lattice geometry estimated"))

    def estimate_psf(self) -> None:
        s = self.session
        if s.calibration is None:
            self.show_status("calibrate first: the PSF is measured at the lattice sites")
            return
        self._start("psf", s.estimate_psf_job(), "estimating the PSF from isolated atoms",
                    on_result=lambda psf: self._apply(lambda: s.set_psf(psf), "PSF estimated"))

    def reconstruct_all(self) -> None:
        """Reconstruct every frame not done yet, in the background, with progress and cancel."""
        s = self.session
        if s.frames is None:
            self.show_status("open a frame file first")
            return
        if s.calibration is None:
            self.show_status("calibrate first (Analysis > Calibrate from frames)")
            return
        self.workers.cancel("current")
        job = s.reconstruct_job(processes=0 if self.workers.synchronous else RECONSTRUCT_PROCESSES)
        total = getattr(job, "n_frames", 0)
        if total == 0:
            self.show_status("every frame is already reconstructed")
            return
        self._progress_total, self._progress_done = total, 0

        def on_yield(batch):
            if s.store_batch(batch):
                self._progress_done += len(batch.indices)
                self.progress.setValue(self._progress_done)
                self.show_status(f"reconstructing: {self._progress_done} of {total} frames")

        def on_result(_value):
            n_done = int(s.done.sum())
            text = (f"all {s.n_frames} frames reconstructed" if n_done == s.n_frames
                    else f"{n_done} of {s.n_frames} frames reconstructed")
            self._fit_threshold_background(text)

        self._start("reconstruct", job, f"reconstructing {total} frames", on_yield=on_yield,
                    on_result=on_result, total=total)

    def _fit_threshold_background(self, done_message: str) -> None:
        s = self.session
        job = s.fit_threshold_job()
        self.workers.submit("threshold", job,
                            on_result=lambda r: self._apply(lambda: s.store_threshold_fit(r), done_message),
                            on_error=self._failed_step(STEP_TITLES["threshold"]))

    def estimate_fidelity(self) -> None:
        s = self.session
        step = STEP_TITLES["fidelity"]
        ips = int(s.settings["images_per_shot"])
        if ips < 2:
            dialogs.show_error(
                self, f"{step}: needs repeated images",
                "Fidelity compares consecutive images of the same atoms, but the analysis settings say each "
                f"shot has {ips} image.\n\nFix: Edit > Analysis settings > Images per shot: enter how many images "
                "were taken of the same atoms (2 or more), then choose Estimate fidelity again.")
            self._last_error = "fidelity needs 'Images per shot' of 2 or more"
            return
        if s.frames is not None and not s.done.all():
            dialogs.show_error(
                self, f"{step}: frames not reconstructed yet",
                f"Fidelity uses every frame; {int(s.done.sum())} of {s.n_frames} are reconstructed.\n\n"
                "Fix: Analysis > Reconstruct all frames (Ctrl+R), then choose Estimate fidelity again.")
            self._last_error = "fidelity needs every frame reconstructed"
            return
        try:
            job = s.fidelity_job()
        except Exception as exc:  # noqa: BLE001
            self._report(exc, step=step)
            return

        def done(output):
            if self._guard(lambda: s.store_fidelity(output), step=step) and s.fidelity is not None:
                self.docks["fidelity_panel"].raise_()

        self._start("fidelity", job, "estimating loss and hopping", on_result=done)

    def _compute_model(self) -> None:
        s = self.session
        res = s.result()
        if res is None or s.calibration is None or s.frames is None or self._live_shots:
            self.image_pane.set_model(None)
            return
        job = s.model_job()
        self.workers.submit("model", job, on_result=self.image_pane.set_model,
                            on_error=self._failed_step("Model image"))

    def _start(self, key: str, job, text: str, *, on_result, on_yield=None, total: int = 0) -> None:
        self.show_status(text + " ...")
        self.progress.setRange(0, total)  # 0, 0 = busy indicator
        self.progress.setValue(0)
        self.progress.setVisible(True)
        self.cancel_button.setVisible(True)
        self.workers.submit(key, job, on_yield=on_yield, on_result=on_result,
                            on_error=self._failed_step(STEP_TITLES.get(key, text.capitalize())))

    def _apply(self, fn, message: str) -> None:
        if self._guard(fn):
            self.show_status(message)

    def cancel_work(self) -> None:
        if self.workers.busy:
            self.workers.cancel()
            self.show_status("cancelled; results computed so far are kept")

    def _busy_changed(self, busy: bool) -> None:
        if not busy:
            self.progress.setVisible(False)
            self.cancel_button.setVisible(False)
            if self._dirty:
                self._mark()

    # ================================================================== errors / status
    def show_status(self, text: str) -> None:
        self.status_label.setText(text)

    def _guard(self, fn, *, step: str | None = None) -> bool:
        """Run ``fn``; show LatticeReadErrors (and bugs) in a dialog titled by ``step`` (what the
        user asked for). True on success."""
        try:
            fn()
            return True
        except Exception as exc:  # noqa: BLE001 - every failure is shown, the window stays usable
            self._report(exc, step=step)
            return False

    def _task_failed(self, exc: BaseException, step: str | None = None) -> None:
        self._report(exc, step=step)

    def _failed_step(self, step: str):
        """An ``on_error`` callback whose dialog is titled by ``step``."""
        return lambda exc: self._report(exc, step=step)

    def _report(self, exc: BaseException, *, step: str | None = None) -> None:
        if isinstance(exc, LatticeReadError):
            text, details = dialogs.in_window_terms(str(exc)), None
        else:
            log.error("unexpected error", exc_info=(type(exc), exc, exc.__traceback__))
            text = f"{type(exc).__name__}: {exc}\n\nThis is a bug; please report it with the details below."
            details = "".join(traceback.format_exception(type(exc), exc, exc.__traceback__))
        self._last_error = text
        self.show_status(f"error: {text.splitlines()[0]}")
        if not self._closing:
            title = f"{step}: {dialogs.error_title(exc).lower()}" if step else dialogs.error_title(exc)
            dialogs.show_error(self, title, text, details=details)

    @property
    def last_error(self) -> str | None:
        """Text of the last error shown to the user (tests)."""
        return self._last_error

    def _show_hover(self, info) -> None:
        if not info:
            self.hover_label.setText("")
            return
        parts = [f"x {info['x']:.1f}, y {info['y']:.1f} px"]
        if "value" in info:
            parts.append(f"{info['value']:.0f} counts")
        if "row" in info:
            parts.append(f"site ({info['row']}, {info['col']})")
            if info.get("excluded"):
                parts.append("excluded from the analysed region")
            if "amplitude" in info:
                parts.append(f"{info['amplitude']:.0f} photons")
            if "p_occupied" in info:
                parts.append(f"P(atom) {info['p_occupied']:.3f}")
            if "occupied" in info:
                parts.append("occupied" if info["occupied"] else "empty")
        self.hover_label.setText(" | ".join(parts))

    def _show_matrix_hover(self, info) -> None:
        if not info:
            self.hover_label.setText("")
            return
        if info["which"] == "current":
            value = {0: "empty", 1: "occupied"}.get(int(info["value"]), "outside the region")
        else:
            value = "outside the region" if not np.isfinite(info["value"]) else f"mean occupation {info['value']:.3f}"
        self.hover_label.setText(f"site ({info['row']}, {info['col']}): {value}")

    def _on_undo_state(self, can_undo: bool, can_redo: bool) -> None:
        self.actions_by_name["undo"].setEnabled(can_undo)
        self.actions_by_name["redo"].setEnabled(can_redo)

    def _on_modified(self, _modified: bool) -> None:
        self._update_title()
        self._schedule_autosave()

    def _update_title(self) -> None:
        s = self.session
        name = Path(s.source).name if s is not None and s.source else ("untitled" if s is None or s.frames is None
                                                                        else "frames in memory")
        star = "*" if s is not None and s.modified else ""
        self.setWindowTitle(f"{name}{star} - latticeread")

    def _update_actions(self) -> None:
        s = self.session
        a = self.actions_by_name
        has_frames = s.frames is not None
        has_cal = s.calibration is not None
        has_results = bool(s.done.any()) if has_frames else False
        for k in ("calibrate", "estimate_geometry", "save_session", "save_session_as"):
            a[k].setEnabled(has_frames)
        for k in ("estimate_psf", "reconstruct", "export_cal"):
            a[k].setEnabled(has_cal)
        for k in ("export_csv", "export_h5", "fidelity"):
            a[k].setEnabled(has_results)
        a["next"].setEnabled(has_frames)  # stepping past either end stays on the last/first frame
        a["prev"].setEnabled(has_frames)

    # ================================================================== files
    def open_path(self, path) -> bool:
        """Open frames (or a saved session, for .json) from ``path``; errors go to a dialog."""
        path = Path(path)
        if path.suffix.lower() == ".json":
            if _is_calibration_file(path):
                return self.load_calibration(path)
            return self.open_session(path)
        self.show_status(f"opening {path.name} ...")
        if not self._guard(lambda: self.session.open_frames(path)):
            return False
        sidecar = Session.sidecar_calibration(path)
        if sidecar is not None:
            opened = self.status_label.text()
            if self.load_calibration(sidecar, for_new_frames=True):
                self.show_status(f"{opened}; calibration loaded from {sidecar.name}")
                return True
        if self.session.calibration_from_other_stack:
            self._ask_calibration_for_new_frames()
        return True

    def _ask_calibration_for_new_frames(self) -> None:
        """New frames arrived without a calibration of their own: keep, load or calibrate anew."""
        s = self.session
        origin = s.calibration_origin
        name = Path(s.source).name if s.source else "these frames"
        made = f"made for {origin.stack}" if origin.kind == "kept" and origin.stack else origin.describe()
        text = (f"{name} has no calibration file beside it. The calibration in use was {made}.\n\n"
                "Keep it only if these frames were taken with the same lattice, camera and optics; "
                "otherwise load their calibration file or calibrate from these frames.")
        dialogs.ask_choice(
            self, "Calibration for the new frames", text,
            (("keep", "Keep the calibration in use", "Analyse the new frames with the calibration in use"),
             ("load", "Load a calibration file...", "Choose the calibration JSON of these frames"),
             ("calibrate", "Calibrate from these frames",
              "Estimate lattice, PSF and threshold from the new frames (the camera in Analysis settings "
              "is kept)")),
            self._calibration_choice, default="calibrate", object_name="calibration_choice")

    def _calibration_choice(self, choice) -> None:
        s = self.session
        if choice == "load":
            self._load_calibration_dialog(for_new_frames=True)
        elif choice == "calibrate":
            s.drop_calibration()
            self.calibrate()
        else:  # "keep", or the box was closed: the status bar keeps saying where it came from
            s.keep_calibration()

    def load_calibration(self, path, *, for_new_frames: bool = False) -> bool:
        """Use a calibration JSON for the open frames; errors (wrong frame size...) go to a dialog."""
        path = Path(path)
        if self.session.frames is None:
            self.show_status("open a frame file first, then load its calibration")
            return False
        ok = self._guard(lambda: self.session.load_calibration(path, for_new_frames=for_new_frames))
        if ok:
            self.show_status(f"calibration loaded from {path.name}")
        return ok

    def _load_calibration_dialog(self, *, for_new_frames: bool = False) -> None:
        name = self.ask_open_file("Load calibration", CALIBRATION_FILTER)
        if name:
            self.load_calibration(name, for_new_frames=for_new_frames)

    def open_session(self, path) -> bool:
        try:
            new = Session.open(path)
        except Exception as exc:  # noqa: BLE001
            self._report(exc)
            return False
        self.set_session(new)
        self.app_settings.add_recent(path)
        self._update_recent_menu()
        self._session_path = Path(path)
        return True

    def save_session(self, path) -> bool:
        ok = self._guard(lambda: self.session.save(path))
        if ok:
            self._session_path = Path(path).with_suffix(".json")
        return ok

    def _save_session(self, ask: bool = False) -> None:
        from latticeread.io.outputs import existing_kind
        from latticeread.io.session_file import session_paths

        path = getattr(self, "_session_path", None)
        agreed = []
        if ask or path is None:
            name = self.ask_save_file("Save session", "session.json", SESSION_FILTER)
            if not name:
                return
            path = Path(name)
        else:
            # a plain Save replaces this session's own files; a results file that is no
            # longer a session's (another program wrote there) is asked about
            json_path, h5_path = session_paths(path)
            agreed = [json_path] + ([h5_path] if existing_kind(h5_path) in ("session-results", "missing") else [])
        self.confirm_write(session_paths(path), agreed=agreed, title="Save session",
                           then=lambda: self.save_session(path))

    def window_inputs(self) -> dict:
        """The files this window reads, by description: no save of the window may replace them."""
        inputs = {}
        if self.session is not None and self.session.source:
            inputs["the frame stack open in this session"] = self.session.source
        origin = getattr(self.session, "calibration_origin", None) if self.session is not None else None
        if origin is not None and origin.kind == "file" and origin.path:
            inputs["the calibration file loaded in this session"] = origin.path
        controller = getattr(self, "watch_controller", None)
        if controller is not None and controller.is_running:
            inputs["the run file the live watch is writing"] = controller.out
        return inputs

    def confirm_write(self, outputs, *, then, agreed=(), title: str = "Save"):
        """Run ``then`` once ``outputs`` may be written: never over an input of this window,
        and only after a question when some of them exist (:mod:`latticeread.gui.replace_guard`)."""
        from latticeread.gui.replace_guard import confirm_write

        def refused(message: str) -> None:
            from latticeread.errors import OutputExistsError

            self._report(OutputExistsError(message), step=title)

        return confirm_write(self, outputs, inputs=self.window_inputs(), agreed=agreed, then=then, title=title,
                             on_refused=refused)

    def _open_dialog(self) -> None:
        name = self.ask_open_file("Open frames", FRAME_FILTER)
        if name:
            self.open_path(name)

    def _open_session_dialog(self) -> None:
        name = self.ask_open_file("Open session", SESSION_FILTER)
        if name:
            self.open_session(name)

    # file dialogs: each starts in the folder the user chose last (any dialog) and remembers it
    def ask_open_file(self, title: str, filters: str) -> str:
        """Ask for an existing file; '' when cancelled."""
        name, _ = QtWidgets.QFileDialog.getOpenFileName(self, title, str(self._default_dir()), filters)
        self._remember_dir(name)
        return name

    def ask_save_file(self, title: str, suggested: str, filters: str) -> str:
        """Ask for a file to write, suggesting ``suggested`` in the last folder; '' when cancelled.

        The dialog does not ask about replacing an existing file: the save asks, naming every
        file it writes and what each holds (:meth:`confirm_write`)."""
        from latticeread.gui.replace_guard import SAVE_DIALOG_OPTIONS

        name, _ = QtWidgets.QFileDialog.getSaveFileName(self, title, str(self._default_dir() / suggested), filters,
                                                        options=SAVE_DIALOG_OPTIONS)
        self._remember_dir(name)
        return name

    def ask_folder(self, title: str) -> str:
        folder = QtWidgets.QFileDialog.getExistingDirectory(self, title, str(self._default_dir()))
        if folder:
            self.app_settings.set_value("last_dir", str(Path(folder)))
        return folder

    def _remember_dir(self, name: str) -> None:
        if name:
            self.app_settings.set_value("last_dir", str(Path(name).parent))

    def _default_dir(self) -> Path:
        last = self.app_settings.value("last_dir", "", str)
        if last and Path(last).is_dir():
            return Path(last)
        if self.session is not None and self.session.source:
            return Path(self.session.source).parent
        return Path.cwd()

    def _update_recent_menu(self) -> None:
        self.recent_menu.clear()
        files = self.app_settings.recent_files()
        for f in files:
            act = self.recent_menu.addAction(Path(f).name)
            act.setToolTip(f)
            act.triggered.connect(lambda _c=False, p=f: self.open_path(p))
        if not files:
            act = self.recent_menu.addAction("(no recent files)")
            act.setEnabled(False)
        else:
            self.recent_menu.addSeparator()
            clear = self.recent_menu.addAction("Clear list")
            clear.setToolTip("Forget the recent files")
            clear.triggered.connect(lambda: (self.app_settings.clear_recent(), self._update_recent_menu()))

    # ---------------------------------------------------------------- export
    def export(self, kind: str, path) -> bool:
        """Write ``kind`` ("csv", "h5", "cal") to ``path``; errors (read-only folder...) go to a dialog."""
        fn = {"csv": self.session.export_sites_csv, "h5": self.session.export_occupation_hdf5,
              "cal": self.session.export_calibration}[kind]
        return self._guard(lambda: fn(path))

    def export_plot(self, key: str, path, *, size=None) -> bool:
        """Save one plot (axes, colour bar, legend; no controls) as PNG or SVG (by the file suffix),
        laid out at ``size`` = (width, height) pixels, or as on screen."""
        from latticeread.gui import plot_export

        path = Path(path)
        protect = [self.session.source] if self.session.source else []

        def write():
            if protect and path.resolve() == Path(protect[0]).resolve():
                from latticeread.errors import ExportError

                raise ExportError(f"refusing to overwrite the input frames {path}; choose another file name")
            plot_export.export_plot(self._plot_widget(key), path, size=size)
            self.show_status(f"{self._plot_targets()[key].lower()} saved to {path.name}")

        return self._guard(write, step=f"Export {self._plot_targets()[key].lower()}")

    def _export_dialog(self, kind: str) -> None:
        suffix, filt = {"csv": (".csv", "CSV table (*.csv)"), "h5": (".h5", "HDF5 (*.h5 *.hdf5)"),
                        "cal": (".json", "Calibration (*.json)")}[kind]
        stem = Path(self.session.source).stem if self.session.source else "latticeread"
        title = {"csv": "Export the per-site table (CSV)", "h5": "Export the occupation matrices (HDF5)",
                 "cal": "Export the calibration (JSON)"}[kind]
        part = {'csv': 'sites', 'h5': 'occupation', 'cal': 'calibration'}[kind]
        name = self.ask_save_file(title, f"{stem}_{part}{suffix}", filt)
        if name:
            from latticeread.io.export import sidecar_path

            outputs = [name, sidecar_path(name)] if kind == "csv" else [name]
            self.confirm_write(outputs, title=title, then=lambda: self.export(kind, name))

    def _export_plot_dialog(self, key: str) -> None:
        title = self._plot_targets()[key]
        name = self.ask_save_file(f"Export {title.lower()}", f"{key}.png", "PNG image (*.png);;SVG vector (*.svg)")
        if not name:
            return
        try:
            view = self._plot_widget(key)
        except LatticeReadError as exc:
            self._report(exc, step=f"Export {title.lower()}")
            return

        def choose_size():
            dlg = dialogs.PlotSizeDialog(view.width(), view.height(), title, self)
            dlg.setAttribute(QtCore.Qt.WA_DeleteOnClose, True)
            dlg.accepted.connect(lambda: self.export_plot(key, name, size=dlg.size_px()))
            dlg.open()

        self.confirm_write([name], title=f"Export {title.lower()}", then=choose_size)

    # ---------------------------------------------------------------- autosave
    def autosave(self) -> None:
        s = self.session
        if s is None or not s.modified or s.frames is None or self.workers.running("reconstruct"):
            return
        path = self.app_settings.autosave_path()

        def failed(exc):  # autosave must never interrupt the user with a dialog
            log.warning("autosave failed: %s", exc)
            self.show_status(f"autosave failed: {exc}")

        try:
            path.parent.mkdir(parents=True, exist_ok=True)
            job = s.autosave_job(path)
        except Exception as exc:  # noqa: BLE001
            failed(exc)
            return
        if job is None:
            return
        if self._closing:
            try:
                job()  # the window is going away: write it now
            except Exception as exc:  # noqa: BLE001
                failed(exc)
            return
        self.workers.submit("autosave", job, on_error=failed)

    def _schedule_autosave(self) -> None:
        if self._autosave_timer.isActive():
            self._autosave_debounce.start()

    def _offer_restore(self) -> None:
        path = self.app_settings.autosave_path()
        if not path.exists() or self.session.frames is not None:
            return
        dialogs.ask_yes_no(self, "Restore the last session?",
                           "An automatically saved session with unsaved work was found (the program was "
                           f"closed without saving, or stopped unexpectedly). Restore it?\n\n{path}",
                           lambda yes: self._restore_answer(yes, path))

    def _restore_answer(self, yes: bool, path: Path) -> None:
        if yes:
            if self.open_session(path):
                self._session_path = None
                self.show_status("restored the automatically saved session")
        else:
            self._remove_autosave()

    def _remove_autosave(self) -> None:
        path = self.app_settings.autosave_path()
        for p in (path, path.with_suffix(".h5")):
            try:
                p.unlink()
            except FileNotFoundError:
                pass
            except OSError as exc:
                log.warning("cannot remove %s: %s", p, exc)

    # ---------------------------------------------------------------- drag and drop
    def dragEnterEvent(self, event: QtGui.QDragEnterEvent) -> None:
        if event.mimeData().hasUrls() and any(u.isLocalFile() for u in event.mimeData().urls()):
            event.acceptProposedAction()
        else:
            event.ignore()

    def dropEvent(self, event: QtGui.QDropEvent) -> None:
        files = [u.toLocalFile() for u in event.mimeData().urls() if u.isLocalFile()]
        if files:
            event.acceptProposedAction()
            self.open_path(files[0])

    # ---------------------------------------------------------------- live watch
    def _watch_dialog(self) -> None:
        if self.session.calibration is None:
            self.show_status("calibrate first: the watch reconstructs new files with the current calibration")
            return
        folder = self.ask_folder("Watch a folder: folder the camera writes into")
        if not folder:
            return
        out = self.ask_save_file("Watch a folder: run file for the frames", "run.h5", "HDF5 run file (*.h5)")
        if out:
            self.start_watch(folder, out)

    def start_watch(self, folder, out) -> bool:
        """Watch ``folder`` with the session's calibration, appending shots to the run file ``out``."""
        from latticeread.gui.watch_mode import LiveWatchController, LiveWatchPanel

        cal = self.session.calibration
        if cal is None:
            self.show_status("calibrate first: the watch reconstructs new files with the current calibration")
            return False
        self.stop_watch()
        if "watch" not in self.docks:
            self.watch_panel = LiveWatchPanel()
            self._add_dock("watch", "Live watch", self.watch_panel, "right",
                           "Frame files reconstructed as they appear in a folder: counters and trends")
            if "occupation" in self.docks:  # share the occupation view's place instead of squeezing it
                self.tabifyDockWidget(self.docks["occupation"], self.docks["watch"])
        self.watch_controller = LiveWatchController(folder, calibration=cal, out=out, parent=self)
        self.watch_panel.attach(self.watch_controller)
        self.watch_controller.frameReady.connect(self._show_live_shot)
        self.watch_controller.errorOccurred.connect(lambda msg: self.show_status(f"watch stopped: {msg}"))
        self.docks["watch"].show()
        self.docks["watch"].raise_()
        self.watch_controller.start()
        self.show_status(f"watching {folder} (run file {Path(out).name})")
        return True

    def stop_watch(self) -> None:
        controller = getattr(self, "watch_controller", None)
        if controller is not None and controller.is_running:
            controller.stop()
            self.show_status("watch stopped; the run file is closed")
        if self._live_shots:
            # back to the frames of the session
            self._live_shots.clear()
            self.image_pane.clear()
            self._mark("frames", "frame", "classification")

    def _show_live_shot(self, shot) -> None:
        """A new shot from the watch: shown at once unless the user stepped back to an older one."""
        follow = not self._live_shots or self._live_position >= len(self._live_shots) - 1
        self._live_shots.append(shot)
        if follow:
            self._show_live(len(self._live_shots) - 1)
        else:
            # the shot shown keeps its place; the deque may have dropped the oldest one
            shown = self._live_shown
            numbers = [x.shot_number for x in self._live_shots]
            self._show_live(numbers.index(shown) if shown in numbers else 0)

    def _show_live(self, position: int) -> None:
        """Show kept live shot ``position`` (0 = oldest kept) with its lattice and site markers."""
        shots = self._live_shots
        position = int(np.clip(position, 0, len(shots) - 1))
        self._live_position = position
        shot = shots[position]
        self._live_shown = shot.shot_number
        cal = self.session.calibration
        photons = None if cal is None else cal.camera.counts_to_photons(shot.image)
        self.image_pane.set_frame_count(len(shots))
        self.image_pane.set_frame(shot.image, index=position, n_frames=len(shots), photons=photons)
        if cal is not None:
            geometry = cal.geometry.with_offset(shot.offset)
            sites, occupied = self._live_sites(geometry, shot.occupation)
            self.image_pane.set_lattice(geometry, sites)
            if sites is not None:
                self.image_pane.set_site_states(occupied, None, None)
        self.show_status(f"live frame {shot.shot_number} ({position} of the {len(shots)} kept): "
                         f"{Path(shot.source).name}[{shot.frame_index}], filling {shot.filling:.3f}")

    def _live_sites(self, geometry, occupation):
        """The calibration's site set placed at a live shot's lattice offset, and its occupations
        (from the shot's matrix); (None, None) when the matrix does not match the site set."""
        from latticeread.core.geometry import SiteGrid

        s = self.session
        try:
            base = s.sites if s.sites is not None else s.reconstructor().sites
        except LatticeReadError as exc:
            log.info("no site markers for the live shot: %s", exc)
            return None, None
        occupation = np.asarray(occupation)
        if occupation.shape != (base.n_rows, base.n_cols):
            log.info("live shot matrix %s does not match the site set %s", occupation.shape,
                     (base.n_rows, base.n_cols))
            return None, None
        x, y = geometry.site_positions(base.rows, base.cols)
        field = s.calibration.distortion if s.calibration is not None else None
        if field is not None:  # lens distortion: where the sites really are (unchanged when not applied)
            x, y = field.place(x, y)
        sites = SiteGrid(base.rows, base.cols, x, y, base.row_min, base.col_min, base.n_rows, base.n_cols)
        occupied = (occupation[base.rows - base.row_min, base.cols - base.col_min] == 1).astype(np.uint8)
        return sites, occupied

    # ---------------------------------------------------------------- layout
    def showEvent(self, event: QtGui.QShowEvent) -> None:
        super().showEvent(event)
        if not getattr(self, "_layout_restored", True) and not getattr(self, "_docks_sized", False):
            self._docks_sized = True
            QtCore.QTimer.singleShot(0, self.size_docks)

    def size_docks(self) -> None:
        """Share the window's width: about a quarter for the left panels, a third for the right."""
        width = max(self.width(), 800)
        left = int(np.clip(0.275 * width, DOCK_MIN_WIDTH, 520))
        right = int(np.clip(0.30 * width, DOCK_MIN_WIDTH, 600))
        self.resizeDocks([self.docks["geometry_panel"], self.docks["histogram_panel"]], [left, right],
                         QtCore.Qt.Horizontal)
        height = self.height()
        self.resizeDocks([self.docks["histogram_panel"], self.docks["occupation"]],
                         [int(0.6 * height), int(0.4 * height)], QtCore.Qt.Vertical)

    # ---------------------------------------------------------------- close
    def closeEvent(self, event: QtGui.QCloseEvent) -> None:
        self._closing = True
        self.stop_watch()
        self.workers.shutdown()
        self.app_settings.save_window(self)
        self.app_settings.sync()
        s = self.session
        if s is not None and s.modified and s.frames is not None:
            # unsaved work: keep it in the autosave file; the next start offers to restore it
            self.autosave()
        else:
            self._remove_autosave()
        super().closeEvent(event)
