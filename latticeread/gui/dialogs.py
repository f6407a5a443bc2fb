"""Message boxes and small dialogs of the desktop program.

Message boxes are opened window-modal with ``open()`` (never ``exec()``), so the event loop
keeps running, background work goes on and tests can find and close them.
"""

from __future__ import annotations

from PySide6 import QtCore, QtWidgets

from latticeread import __version__

__all__ = ["show_error", "show_info", "ask_yes_no", "ask_choice", "PlotSizeDialog", "in_window_terms",
           "readme_text", "show_text", "shortcut_table", "show_about", "AnalysisSettingsDialog",
           "SAFETY_TEXT", "error_title"]

SAFETY_TEXT = (
    "latticeread only analyses image files. It does not control any hardware: no camera, "
    "laser, shutter, magnet or vacuum equipment is read or driven by it. Never rely on it "
    "for the safety of people or apparatus. Results are estimates: check the warnings shown "
    "next to each result before you publish them."
)


def error_title(exc: BaseException) -> str:
    """Short title for an error dialog, by error family."""
    from latticeread.errors import (CalibrationError, ExportError, FrameError, LatticeNotFound,
                                    ReconstructionError)

    for cls, title in ((ExportError, "Cannot write the file"), (FrameError, "Cannot use these frames"),
                       (LatticeNotFound, "No lattice found"), (CalibrationError, "Calibration problem"),
                       (ReconstructionError, "Cannot reconstruct")):
        if isinstance(exc, cls):
            return title
    return "Unexpected error"


#: Command-line options named in messages of the shared library, and where the same choice
#: is made in the window. Longest first, so a whole group is replaced before its parts.
WINDOW_TERMS = (
    ("--psf airy --wavelength-nm --na --pixel-size-nm",
     "Edit > Analysis settings: PSF when calibrating = ideal Airy pattern, with the wavelength, NA and "
     "pixel size"),
    ("--psf estimate", "Edit > Analysis settings: PSF when calibrating = estimate from isolated atoms"),
    ("--psf airy", "Edit > Analysis settings: PSF when calibrating = ideal Airy pattern"),
    ("--pixel-size-nm", "the pixel size (Edit > Analysis settings)"),
    ("--wavelength-nm", "the wavelength (Edit > Analysis settings)"),
    ("--na", "the NA (Edit > Analysis settings)"),
    ("--counts-per-electron", "Counts per electron (Edit > Analysis settings)"),
    ("--em-gain", "EM gain (Edit > Analysis settings)"),
    ("--lattice-spacing", "the spacing constraint (Lattice geometry panel)"),
    ("--lattice-angle", "the a1 direction constraint (Lattice geometry panel)"),
)


def in_window_terms(text: str) -> str:
    """``text`` with command-line options replaced by where the window sets the same thing.

    Options that have no place in the window are kept and marked as command-line options.
    """
    import re

    for flag, where in WINDOW_TERMS:
        text = re.sub(re.escape(flag) + r"(?![\w-])", where, text)
    return re.sub(r"(?<![\w-])(--[a-z][a-z0-9-]+)", r"the command-line option \1", text)


def _box(parent, icon, title: str, text: str, details: str | None = None) -> QtWidgets.QMessageBox:
    box = QtWidgets.QMessageBox(icon, title, text, QtWidgets.QMessageBox.Ok, parent)
    box.setObjectName("latticeread_message")
    box.setWindowModality(QtCore.Qt.WindowModal)
    box.setAttribute(QtCore.Qt.WA_DeleteOnClose, True)
    if details:
        box.setDetailedText(details)
    box.open()
    return box


def show_error(parent, title: str, text: str, *, details: str | None = None) -> QtWidgets.QMessageBox:
    """Non-blocking error box (the window stays usable behind it)."""
    return _box(parent, QtWidgets.QMessageBox.Critical, title, text, details)


def show_info(parent, title: str, text: str) -> QtWidgets.QMessageBox:
    return _box(parent, QtWidgets.QMessageBox.Information, title, text)


def ask_yes_no(parent, title: str, text: str, on_answer) -> QtWidgets.QMessageBox:
    """Non-blocking question; ``on_answer(bool)`` is called when the user answers."""
    box = QtWidgets.QMessageBox(QtWidgets.QMessageBox.Question, title, text,
                                QtWidgets.QMessageBox.Yes | QtWidgets.QMessageBox.No, parent)
    box.setObjectName("latticeread_question")
    box.setDefaultButton(QtWidgets.QMessageBox.Yes)
    box.setWindowModality(QtCore.Qt.WindowModal)
    box.setAttribute(QtCore.Qt.WA_DeleteOnClose, True)
    box.finished.connect(lambda code: on_answer(box.clickedButton() is box.button(QtWidgets.QMessageBox.Yes)))
    box.open()
    return box


def ask_choice(parent, title: str, text: str, choices, on_answer, *, default: str | None = None,
               object_name: str = "latticeread_choice") -> QtWidgets.QMessageBox:
    """Non-blocking question with one button per choice.

    Parameters
    ----------
    choices : sequence of (key, label, tooltip)
        One button each; the button carries its key as the ``choice`` property.
    on_answer : callable
        Called with the key of the button pressed, or None when the box is closed otherwise.
    default : str, optional
        Key of the default button (Enter).
    """
    box = QtWidgets.QMessageBox(QtWidgets.QMessageBox.Question, title, text, QtWidgets.QMessageBox.NoButton,
                                parent)
    box.setObjectName(object_name)
    buttons = {}
    for key, label, tip in choices:
        button = box.addButton(label, QtWidgets.QMessageBox.AcceptRole)
        button.setProperty("choice", key)
        button.setToolTip(tip)
        buttons[key] = button
    if default in buttons:
        box.setDefaultButton(buttons[default])
    box.setWindowModality(QtCore.Qt.WindowModal)
    box.setAttribute(QtCore.Qt.WA_DeleteOnClose, True)

    def finished(_code):
        clicked = box.clickedButton()
        on_answer(None if clicked is None else clicked.property("choice"))

    box.finished.connect(finished)
    box.open()
    return box


def show_about(parent) -> QtWidgets.QMessageBox:
    text = (f"<b>latticeread {__version__}</b><br>"
            "Occupation matrices from site-resolved fluorescence images of atoms in optical lattices: "
            "lattice geometry, point-spread function, site amplitudes, threshold, imaging fidelity "
            "and export to CSV/HDF5.<br><br>"
            f"<b>Safety.</b> {SAFETY_TEXT}")
    box = QtWidgets.QMessageBox(QtWidgets.QMessageBox.Information, "About latticeread", text,
                                QtWidgets.QMessageBox.Ok, parent)
    box.setObjectName("latticeread_about")
    box.setTextFormat(QtCore.Qt.RichText)
    box.setAttribute(QtCore.Qt.WA_DeleteOnClose, True)
    box.open()
    return box


class AnalysisSettingsDialog(QtWidgets.QDialog):
    """Edit the session's analysis settings (optics, images per shot, frames used)."""

    def __init__(self, settings: dict, parent=None):
        super().__init__(parent)
        self.setWindowTitle("Analysis settings")
        form = QtWidgets.QFormLayout(self)
        self.images_per_shot = QtWidgets.QSpinBox()
        self.images_per_shot.setRange(1, 100)
        self.images_per_shot.setValue(int(settings.get("images_per_shot", 1)))
        self.images_per_shot.setToolTip("Consecutive images taken of the same atoms in one shot; "
                                        "2 or more lets the program estimate loss and hopping")
        self.wavelength = QtWidgets.QDoubleSpinBox()
        self.wavelength.setRange(100.0, 3000.0)
        self.wavelength.setDecimals(1)
        self.wavelength.setSuffix(" nm")
        self.wavelength.setValue(float(settings.get("wavelength_nm", 767.0)))
        self.wavelength.setToolTip("Fluorescence wavelength, nanometres (for the ideal Airy PSF)")
        self.na = QtWidgets.QDoubleSpinBox()
        self.na.setRange(0.05, 1.6)
        self.na.setDecimals(3)
        self.na.setSingleStep(0.01)
        self.na.setValue(float(settings.get("numerical_aperture", 0.75)))
        self.na.setToolTip("Numerical aperture of the imaging objective")
        self.pixel = QtWidgets.QDoubleSpinBox()
        self.pixel.setRange(0.0, 100000.0)
        self.pixel.setDecimals(2)
        self.pixel.setSuffix(" nm")
        self.pixel.setSpecialValueText("unknown")
        self.pixel.setValue(float(settings.get("pixel_size_nm") or 0.0))
        self.pixel.setToolTip("Camera pixel projected into the atom plane, nanometres (0 = unknown)")
        self.geometry_frames = QtWidgets.QSpinBox()
        self.geometry_frames.setRange(1, 100000)
        self.geometry_frames.setValue(int(settings.get("geometry_frames", 50)))
        self.geometry_frames.setToolTip("How many frames (from the start of the stack) are summed to "
                                        "estimate the lattice and the PSF")
        self.psf_source = QtWidgets.QComboBox()
        self.psf_source.addItem("estimate from isolated atoms", "estimate")
        self.psf_source.addItem("ideal Airy pattern from the optics", "airy")
        self.psf_source.setCurrentIndex(0 if settings.get("psf_source", "estimate") == "estimate" else 1)
        self.psf_source.setToolTip("PSF used when calibrating: measured from the frames, or the ideal "
                                   "diffraction pattern (needs the pixel size)")
        cam = dict(settings.get("camera") or {})
        self.camera_kind = QtWidgets.QComboBox()
        self.camera_kind.addItem("EMCCD", "emccd")
        self.camera_kind.addItem("sCMOS", "scmos")
        self.camera_kind.setCurrentIndex(0 if cam.get("kind", "emccd") == "emccd" else 1)
        self.camera_kind.setToolTip("Camera type: sets the noise model (EMCCD doubles the shot-noise variance)")
        self.camera_boxes = {}
        for key, label, lo, hi, dec, default, suffix, tip in (
                ("em_gain", "EM gain", 1.0, 10000.0, 1, 1.0, " \u00d7", "Electron-multiplying gain (1 for sCMOS)"),
                ("counts_per_electron", "Counts per electron", 1e-4, 1000.0, 4, 1.0, " counts/e\u207b",
                 "Read-out conversion, counts (ADU) per electron after multiplication"),
                ("bias", "Bias", 0.0, 1e6, 1, 0.0, " counts", "Offset added to every pixel, counts"),
                ("read_noise", "Read noise", 0.0, 1e5, 2, 0.0, " counts rms", "RMS read noise, counts"),
                ("quantum_efficiency", "Quantum efficiency", 0.01, 1.0, 3, 1.0, " e\u207b/photon",
                 "Probability that a photon gives a photoelectron (0.01 to 1)"),
                ("clock_induced_charge", "Clock-induced charge", 0.0, 10.0, 4, 0.0, " e\u207b/pixel/frame",
                 "Spurious electrons per pixel per frame (EMCCD)")):
            box = QtWidgets.QDoubleSpinBox()
            box.setRange(lo, hi)
            box.setDecimals(dec)
            box.setSuffix(suffix)
            box.setValue(float(cam.get(key, default)))
            box.setToolTip(tip + "; changing the camera recomputes the amplitudes (photons)")
            self.camera_boxes[key] = (label, box)
        self._saturation = int(cam.get("saturation", 65535))
        form.addRow("Images per shot", self.images_per_shot)
        form.addRow("Wavelength", self.wavelength)
        form.addRow("Numerical aperture", self.na)
        form.addRow("Pixel size (atom plane)", self.pixel)
        form.addRow("Frames for calibration", self.geometry_frames)
        form.addRow("PSF when calibrating", self.psf_source)
        form.addRow("Camera", self.camera_kind)
        for label, box in self.camera_boxes.values():
            form.addRow(label, box)
        buttons = QtWidgets.QDialogButtonBox(QtWidgets.QDialogButtonBox.Ok | QtWidgets.QDialogButtonBox.Cancel)
        buttons.button(QtWidgets.QDialogButtonBox.Ok).setToolTip("Use these settings")
        buttons.button(QtWidgets.QDialogButtonBox.Cancel).setToolTip("Keep the previous settings")
        buttons.accepted.connect(self.accept)
        buttons.rejected.connect(self.reject)
        form.addRow(buttons)

    def values(self) -> dict:
        pixel = float(self.pixel.value())
        return {
            "images_per_shot": int(self.images_per_shot.value()),
            "wavelength_nm": float(self.wavelength.value()),
            "numerical_aperture": float(self.na.value()),
            "pixel_size_nm": pixel if pixel > 0 else None,
            "geometry_frames": int(self.geometry_frames.value()),
            "psf_source": self.psf_source.currentData(),
            "camera": self.camera(),
        }

    def camera(self) -> dict:
        """The camera entered, as CameraModel.to_dict() keys (counts, electrons)."""
        cam = {"kind": self.camera_kind.currentData(), "saturation": self._saturation}
        cam.update({k: float(box.value()) for k, (_label, box) in self.camera_boxes.items()})
        return cam


class PlotSizeDialog(QtWidgets.QDialog):
    """Ask the size of an exported plot in pixels (the plot is laid out at that size)."""

    #: common choices: on screen, a one-column and a two-column journal figure at 300 dpi
    PRESETS = (("as on screen", None), ("one column, 85 mm at 300 dpi", (1004, 753)),
               ("two columns, 175 mm at 300 dpi", (2067, 1240)))

    def __init__(self, width: int, height: int, title: str, parent=None):
        super().__init__(parent)
        self.setWindowTitle(f"Export {title.lower()}: size")
        form = QtWidgets.QFormLayout(self)
        self.preset = QtWidgets.QComboBox()
        self.preset.setToolTip("Start from a common size; the boxes below can still be changed")
        self.width_box = QtWidgets.QSpinBox()
        self.height_box = QtWidgets.QSpinBox()
        for box, value, what in ((self.width_box, width, "Width"), (self.height_box, height, "Height")):
            box.setRange(50, 20000)
            box.setSuffix(" px")
            box.setValue(int(value))
            box.setToolTip(f"{what} of the exported plot in pixels; text and lines keep their size, the "
                           "plot area grows")
        for text, size in self.PRESETS:
            self.preset.addItem(text, size or (int(width), int(height)))
        self.preset.currentIndexChanged.connect(self._preset_chosen)
        form.addRow("Size", self.preset)
        form.addRow("Width", self.width_box)
        form.addRow("Height", self.height_box)
        buttons = QtWidgets.QDialogButtonBox(QtWidgets.QDialogButtonBox.Ok | QtWidgets.QDialogButtonBox.Cancel)
        buttons.button(QtWidgets.QDialogButtonBox.Ok).setToolTip("Write the file")
        buttons.button(QtWidgets.QDialogButtonBox.Cancel).setToolTip("Do not export")
        buttons.accepted.connect(self.accept)
        buttons.rejected.connect(self.reject)
        form.addRow(buttons)

    def _preset_chosen(self, index: int) -> None:
        w, h = self.preset.itemData(index)
        self.width_box.setValue(int(w))
        self.height_box.setValue(int(h))

    def size_px(self) -> tuple[int, int]:
        return int(self.width_box.value()), int(self.height_box.value())


def readme_text() -> tuple[str, str | None]:
    """The user guide (README) shipped with the installed package, and the folder its pictures
    are relative to (None when only the text is available).

    The text comes from the package metadata (the README is the long description of every
    install, wheel or editable); a source checkout also has the file and its docs/ pictures.
    """
    from importlib import metadata
    from pathlib import Path

    checkout = Path(__file__).resolve().parents[2] / "README.md"
    if checkout.is_file():
        return checkout.read_text(encoding="utf-8"), str(checkout.parent)
    try:
        md = metadata.metadata("latticeread")
        text = md.get_payload() or md.get("Description") or ""
    except metadata.PackageNotFoundError:
        text = ""
    if not text.strip():
        text = ("The user guide was not installed with this copy of latticeread. It is the README.md file "
                "of the project's source.")
    return text, None


def show_text(parent, title: str, text: str, *, markdown: bool = False, search_path: str | None = None,
              object_name: str = "latticeread_text") -> QtWidgets.QDialog:
    """A non-modal window showing ``text`` (plain or Markdown) with a Close button."""
    dlg = QtWidgets.QDialog(parent)
    dlg.setObjectName(object_name)
    dlg.setWindowTitle(title)
    dlg.setAttribute(QtCore.Qt.WA_DeleteOnClose, True)
    layout = QtWidgets.QVBoxLayout(dlg)
    browser = QtWidgets.QTextBrowser()
    browser.setObjectName("text")
    browser.setOpenExternalLinks(True)
    if search_path:
        browser.setSearchPaths([search_path])
    if markdown:
        browser.setMarkdown(text)
    else:
        browser.setPlainText(text)
    layout.addWidget(browser)
    buttons = QtWidgets.QDialogButtonBox(QtWidgets.QDialogButtonBox.Close)
    buttons.rejected.connect(dlg.close)
    buttons.button(QtWidgets.QDialogButtonBox.Close).setToolTip("Close this window")
    layout.addWidget(buttons)
    screen = parent.screen().availableGeometry() if parent is not None and parent.screen() else None
    dlg.resize(min(900, screen.width() - 80) if screen else 900, min(700, screen.height() - 80) if screen else 700)
    dlg.show()
    return dlg


def shortcut_table(actions, extra=()) -> str:
    """Markdown table of the keyboard shortcuts of ``actions`` (QActions), plus ``extra``
    (key, what) rows for mouse and view gestures."""
    from PySide6 import QtGui

    rows = []
    for act in actions:
        keys = [k.toString(QtGui.QKeySequence.NativeText) for k in act.shortcuts()]
        if keys:
            rows.append((", ".join(keys), act.text().replace("&", "").rstrip(".")))
    rows.extend(extra)
    lines = ["| keys | what it does |", "|---|---|"]
    lines += [f"| {k} | {w} |" for k, w in rows]
    return "\n".join(lines)
