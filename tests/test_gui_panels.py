"""GUI tests of the analysis panels (pure views), plot export and icons; offscreen Qt.

Each panel is checked for: the data it shows (against numbers computed independently here),
the signals it emits for user actions (and does not emit for programmatic updates), a
tooltip on every control, and a rendered PNG.
"""

import os

os.environ.setdefault("QT_QPA_PLATFORM", "offscreen")

import math
import xml.etree.ElementTree as ET
from pathlib import Path

import numpy as np
import pyqtgraph as pg
import pytest
from PySide6 import QtCore, QtGui, QtSvg, QtWidgets
from scipy import stats

from latticeread.core.geometry import LatticeGeometry, LatticeQuality, lattice_sites
from latticeread.core.psf import empirical_psf, gaussian_psf, render_sites
from latticeread.errors import ExportError
from latticeread.gui.panels import FidelityPanel, GeometryPanel, HistogramPanel, PSFPanel
from latticeread.gui.panels.fidelity_panel import loss_note
from latticeread.gui.plot_export import export_svg, export_widget_png

ICON_DIR = Path(__file__).resolve().parents[1] / "latticeread" / "gui" / "icons"
ICON_NAMES = ("latticeread", "open", "save", "export", "estimate-geometry", "estimate-psf", "reconstruct",
              "fidelity", "previous-frame", "next-frame", "toggle-grid", "cancel")
CONTROL_TYPES = (QtWidgets.QAbstractButton, QtWidgets.QAbstractSpinBox, QtWidgets.QComboBox,
                 QtWidgets.QLineEdit, QtWidgets.QSlider, QtWidgets.QAbstractItemView, pg.GraphicsView)


@pytest.fixture
def no_rate_limit():
    """pyqtgraph drops mouse moves closer than 10 ms; tests send them faster."""
    old = pg.getConfigOption("mouseRateLimit")
    pg.setConfigOption("mouseRateLimit", 0)
    yield
    pg.setConfigOption("mouseRateLimit", old)


def _show(qtbot, widget, size=(640, 480)):
    qtbot.addWidget(widget)
    widget.resize(*size)
    widget.show()
    qtbot.waitExposed(widget)
    qtbot.wait(50)
    return widget


def _assert_render(widget, tmp_path, name):
    QtWidgets.QApplication.processEvents()  # let the layouts follow the new label texts
    path = tmp_path / f"{name}.png"
    assert widget.grab().save(str(path))
    image = QtGui.QImage(str(path))
    assert not image.isNull() and image.width() > 100
    # not a blank image: many distinct colours
    colours = {image.pixel(x, y) for x in range(0, image.width(), 7) for y in range(0, image.height(), 7)}
    assert len(colours) > 20


def _missing_tooltips(widget):
    return [f"{type(w).__name__} {getattr(w, 'text', lambda: '')()!r}"
            for w in widget.findChildren(QtWidgets.QWidget)
            if isinstance(w, CONTROL_TYPES) and not w.toolTip().strip()
            and w.window() is widget  # not the popup list of a combo box
            and not isinstance(w.parent(), (QtWidgets.QAbstractSpinBox, QtWidgets.QAbstractScrollArea))]


def _bimodal(rng, n=10_000, fraction=0.3, empty=(0.0, 60.0), occupied=(1000.0, 150.0)):
    n_occ = int(n * fraction)
    return np.concatenate([rng.normal(*empty, n - n_occ), rng.normal(*occupied, n_occ)])


# ----------------------------------------------------------------------------- histogram
def test_histogram_counts_every_finite_site_and_scales_components(qtbot, tmp_path):
    panel = _show(qtbot, HistogramPanel())
    rng = np.random.default_rng(7)
    amps = _bimodal(rng)
    amps[:25] = np.nan
    amps[25:28] = [-5000.0, 9000.0, 12000.0]  # wild outliers must not squeeze the peaks
    panel.set_amplitudes(amps)
    edges, counts = panel._hist_curve.getData()
    assert edges[0] > -1000 and edges[-1] < 3000
    n_outside = int(np.count_nonzero((amps < edges[0]) | (amps > edges[-1])))
    assert n_outside >= 3
    assert counts.sum() == pytest.approx(amps.size - 25 - n_outside)
    assert "25 non-finite ignored" in panel.summary_label.text()
    assert f"{n_outside} outside the plotted range" in panel.summary_label.text()
    result = {"threshold": 480.0, "method": "mixture", "empty_mean": 0.0, "empty_std": 60.0,
              "occupied_mean": 1000.0, "occupied_std": 150.0, "occupied_fraction": 0.3,
              "false_positive_rate": 1e-4, "false_negative_rate": 0.0012, "warnings": ("few frames",)}
    panel.set_threshold_result(result)
    # the occupied component's peak in sites per bin: N * w * binwidth * pdf(mean)
    # (normal density from scipy.stats, an outside reference)
    width = edges[1] - edges[0]
    expected_peak = (amps.size - 25) * 0.3 * width * stats.norm.pdf(0, scale=150.0)
    x, y = panel._occ_curve.getData()
    assert np.nanmax(y) == pytest.approx(expected_peak, rel=1e-3)
    assert panel.threshold_line.value() == pytest.approx(480.0)
    assert "0.12 %" in panel.rates_label.text()
    assert panel.warnings_label.isVisibleTo(panel) and "few frames" in panel.warnings_label.text()
    panel.set_counts(2999, 7000, 12)
    assert "occupied 2999" in panel.counts_label.text() and "uncertain 12" in panel.counts_label.text()
    assert not _missing_tooltips(panel), _missing_tooltips(panel)
    _assert_render(panel, tmp_path, "histogram")


def test_histogram_shows_a_real_threshold_result(qtbot):
    """The panel reads the fields of classify.ThresholdResult."""
    from latticeread.core.classify import select_threshold

    panel = _show(qtbot, HistogramPanel())
    amps = _bimodal(np.random.default_rng(3))
    result = select_threshold(amps, method="mixture")
    panel.set_amplitudes(amps)
    with qtbot.assertNotEmitted(panel.thresholdDragged), qtbot.assertNotEmitted(panel.thresholdCommitted):
        panel.set_threshold_result(result)
        panel.set_threshold_result(result.with_threshold(600.0))
    assert panel.threshold_line.value() == pytest.approx(600.0)
    assert panel.threshold_box.value() == pytest.approx(600.0, abs=0.05)
    x, y = panel._empty_curve.getData()
    assert np.isfinite(y).any()


def test_dragging_the_threshold_line_emits_live_and_on_release(qtbot, no_rate_limit):
    panel = _show(qtbot, HistogramPanel(), (700, 420))
    amps = _bimodal(np.random.default_rng(11))
    panel.set_amplitudes(amps)
    panel.set_threshold(400.0)
    qtbot.wait(50)
    view = panel.plot_widget
    vb = panel.plot_widget.getPlotItem().getViewBox()
    y_mid = float(np.mean(vb.viewRange()[1]))

    def to_viewport(x):
        return QtCore.QPointF(view.mapFromScene(vb.mapViewToScene(QtCore.QPointF(x, y_mid))))

    def send(kind, pos, button, buttons):
        event = QtGui.QMouseEvent(kind, pos, view.viewport().mapToGlobal(pos), button, buttons,
                                  QtCore.Qt.KeyboardModifier.NoModifier)
        QtWidgets.QApplication.sendEvent(view.viewport(), event)

    left, none = QtCore.Qt.MouseButton.LeftButton, QtCore.Qt.MouseButton.NoButton
    dragged, committed = [], []
    panel.thresholdDragged.connect(dragged.append)
    panel.thresholdCommitted.connect(committed.append)
    start = to_viewport(400.0)
    send(QtCore.QEvent.Type.MouseMove, start, none, none)
    send(QtCore.QEvent.Type.MouseButtonPress, start, left, left)
    targets = np.linspace(400.0, 700.0, 11)[1:]
    for x in targets:
        send(QtCore.QEvent.Type.MouseMove, to_viewport(x), none, left)
    send(QtCore.QEvent.Type.MouseButtonRelease, to_viewport(700.0), left, none)
    assert len(dragged) >= 5
    assert np.all(np.diff(dragged) > 0)  # follows the mouse to the right
    pixel = (vb.viewRange()[0][1] - vb.viewRange()[0][0]) / vb.width()
    assert dragged[-1] == pytest.approx(700.0, abs=3 * pixel)
    assert len(committed) == 1 and committed[0] == pytest.approx(dragged[-1])
    assert panel.threshold_box.value() == pytest.approx(dragged[-1], abs=0.05)


def test_histogram_controls_emit_for_the_user_only(qtbot):
    panel = _show(qtbot, HistogramPanel())
    panel.set_amplitudes(_bimodal(np.random.default_rng(5)))
    with qtbot.assertNotEmitted(panel.methodChanged), qtbot.assertNotEmitted(panel.logScaleToggled):
        panel.set_method("otsu")
        panel.set_log_scale(True)
    assert panel.method_combo.currentData() == "otsu"
    assert panel.plot_widget.getPlotItem().ctrl.logYCheck.isChecked()
    panel.method_combo.setFocus()
    with qtbot.waitSignal(panel.methodChanged) as blocker:
        qtbot.keyClick(panel.method_combo, QtCore.Qt.Key.Key_Down)
    assert blocker.args == ["minimum"]
    with qtbot.waitSignal(panel.logScaleToggled) as blocker:
        panel.log_check.click()
    assert blocker.args == [False]
    with qtbot.waitSignal(panel.thresholdCommitted) as blocker:
        panel.threshold_box.setValue(512.5)
    assert blocker.args == [pytest.approx(512.5)]
    assert panel.threshold_line.value() == pytest.approx(512.5)


def test_histogram_draws_the_empty_component_alone_when_there_are_no_atoms(qtbot):
    from latticeread.core.classify import select_threshold

    panel = _show(qtbot, HistogramPanel())
    amps = np.random.default_rng(9).normal(0.0, 50.0, 2000)
    result = select_threshold(amps, method="mixture")
    panel.set_amplitudes(amps)
    panel.set_threshold_result(result)
    x, y = panel._empty_curve.getData()
    assert np.nanmax(y) > 10
    x, y = panel._occ_curve.getData()
    assert not np.isfinite(y).any()
    assert "no occupied component" in panel.summary_label.text()
    assert panel.warnings_label.isVisibleTo(panel)  # the fit says why it may mislead


def test_histogram_handles_no_finite_amplitudes(qtbot):
    panel = _show(qtbot, HistogramPanel())
    panel.set_amplitudes([np.nan, np.inf])
    assert "no finite amplitudes" in panel.summary_label.text()
    panel.set_threshold_result({"threshold": 10.0})  # no components: nothing drawn, no crash
    x, y = panel._occ_curve.getData()
    assert x is None or len(x) == 0


# ------------------------------------------------------------------------------ geometry
def _square_geometry(warnings=()):
    return LatticeGeometry(a1=(5.2, 0.6), a2=(-0.6, 5.2), offset=(30.3, 20.7),
                           quality=LatticeQuality(12.5, 0.02, 480, tuple(warnings)))


def test_geometry_panel_shows_vectors_in_pixels_and_nm(qtbot, tmp_path):
    panel = _show(qtbot, GeometryPanel(), (640, 820))
    geometry = _square_geometry(["only 480 sites used"])
    panel.set_geometry(geometry, pixel_size_nm=102.0)
    text = panel.vectors_label.text()
    length = math.hypot(5.2, 0.6)
    assert f"{length:.4f} px" in text and f"{length * 102.0:.1f} nm" in text
    assert f"{math.degrees(math.atan2(0.6, 5.2)):.3f}°" in text
    assert "90.000°" in text  # a1 is perpendicular to a2
    assert "12.5" in panel.quality_label.text() and "480" in panel.quality_label.text()
    assert panel.warnings_label.isVisibleTo(panel) and "480 sites" in panel.warnings_label.text()
    frames = np.arange(30)
    offsets = np.stack([30 + 0.01 * frames, 20.7 - 0.005 * frames], axis=1)
    panel.set_drift(frames, offsets, trend=offsets)
    x, y = panel._drift_curves[0].getData()
    assert y[0] == 0 and y[-1] == pytest.approx(0.29)  # relative to the first frame
    assert "0.01, y -0.005 px/frame" in panel.drift_label.text()
    gappy = offsets.copy()
    gappy[0] = np.nan  # lattice not seen in frame 0
    panel.set_drift(frames, gappy)
    x, y = panel._drift_curves[0].getData()
    assert np.isnan(y[0]) and y[1] == 0 and y[-1] == pytest.approx(0.28)
    with pytest.raises(ValueError, match="30 frame indices but 29 offsets"):
        panel.set_drift(frames, offsets[:-1])
    assert not _missing_tooltips(panel), _missing_tooltips(panel)
    _assert_render(panel, tmp_path, "geometry")


def test_expected_peaks_fall_on_the_fft_peaks_of_a_synthetic_lattice(qtbot):
    """Reciprocal lattice b_i . a_j = delta_ij (Ashcroft & Mermin, ch. 5): the panel's markers
    must sit on the strongest peaks of numpy.fft.fft2 of an image of that lattice."""
    geometry = LatticeGeometry(a1=(8.0, 0.0), a2=(4.0, 8.0), offset=(1.0, 2.0))  # periodic on 128 px
    sites = lattice_sites(geometry, (128, 128))
    image = render_sites((128, 128), sites.x, sites.y, np.ones(len(sites)), gaussian_psf(fwhm=2.0))
    spectrum = np.fft.fftshift(np.abs(np.fft.fft2(image)))
    panel = _show(qtbot, GeometryPanel())
    panel.set_geometry(geometry)
    panel.set_spectrum(spectrum)
    markers = np.stack(panel._expected.getData(), axis=1)
    masked = spectrum.copy()
    masked[64, 64] = 0  # drop the zero-frequency term
    strongest = np.argsort(masked.ravel())[::-1][:8]
    peaks = {(int(i % 128), int(i // 128)) for i in strongest}  # (x, y)
    for mx, my in markers:
        assert (int(round(mx)), int(round(my))) in peaks
    assert np.allclose(markers, np.rint(markers), atol=1e-9)


def test_geometry_nudges_emit_a_new_geometry_on_every_step(qtbot):
    panel = _show(qtbot, GeometryPanel(), (640, 820))
    geometry = _square_geometry()
    panel.set_geometry(geometry)
    with qtbot.waitSignal(panel.geometryEdited) as blocker:
        panel._boxes["a1_x"].stepUp()
    g = blocker.args[0]
    assert g.a1 == pytest.approx((5.21, 0.6), abs=1e-12)
    assert g.a2 == geometry.a2 and g.offset == geometry.offset  # untouched components stay exact
    panel.step_combo.setCurrentIndex(2)  # 0.1 px
    with qtbot.waitSignal(panel.geometryEdited) as blocker:
        panel._boxes["offset_y"].stepDown()
    assert blocker.args[0].offset == pytest.approx((30.3, 20.6), abs=1e-12)
    with qtbot.waitSignal(panel.geometryEdited) as blocker:
        panel.rotate_plus.click()
    rotated = blocker.args[0]
    assert rotated.spacings == pytest.approx(g.spacings, rel=1e-12)
    assert math.degrees(rotated.angles[0] - g.angles[0]) == pytest.approx(0.05, abs=1e-9)
    with qtbot.waitSignal(panel.geometryEdited) as blocker:
        panel.scale_plus.click()
    assert blocker.args[0].spacings[0] == pytest.approx(rotated.spacings[0] * 1.0005, rel=1e-12)
    assert "adjusted by hand" in panel.edited_label.text()
    panel.set_geometry(blocker.args[0])  # the owner echoes the edit back: revert point kept
    assert "adjusted by hand" in panel.edited_label.text()
    with qtbot.waitSignal(panel.geometryEdited) as blocker:
        panel.revert_button.click()
    assert blocker.args[0] == geometry
    with qtbot.assertNotEmitted(panel.geometryEdited):
        panel.set_geometry(_square_geometry())


def test_geometry_constraints_and_reestimate(qtbot):
    panel = _show(qtbot, GeometryPanel(), (640, 820))
    panel.set_geometry(_square_geometry(), pixel_size_nm=100.0)
    with qtbot.waitSignal(panel.constraintsChanged) as blocker:
        panel.apply_constraints_button.click()
    assert blocker.args == [{}]
    panel.fix_spacing.setChecked(True)
    panel.spacing_unit.setCurrentIndex(1)  # nm
    panel.spacing_box.setValue(532.0)
    panel.fix_between.setChecked(True)
    with qtbot.waitSignal(panel.constraintsChanged) as blocker:
        panel.apply_constraints_button.click()
    assert blocker.args[0] == {"spacing_nm": 532.0, "spacing_px": pytest.approx(5.32), "angle_between_deg": 90.0}
    with qtbot.waitSignal(panel.reestimateRequested):
        panel.reestimate_button.click()
    panel.set_geometry(_square_geometry())  # pixel size unknown: nm no longer offered
    assert panel.spacing_unit.currentText() == "px"


# ------------------------------------------------------------------------------------ PSF
def _half_max_radius(r, y):
    """Radius where a profile normalised to 1 at r = 0 falls to 0.5 (inside the first zero)."""
    inner = np.argmax(np.diff(y) > 0) if np.any(np.diff(y) > 0) else len(y) - 1  # first minimum
    return float(np.interp(0.5, y[:inner][::-1], r[:inner][::-1]))


def test_ideal_airy_curve_has_the_textbook_fwhm(qtbot, tmp_path):
    """Airy FWHM = 0.514 lambda/NA (Born & Wolf, Principles of Optics, 8.5.2): the half-maximum
    crossing of the drawn ideal curve must sit at half that width."""
    panel = _show(qtbot, PSFPanel())
    with qtbot.assertNotEmitted(panel.opticsChanged):
        panel.set_optics(numerical_aperture=0.75, wavelength_nm=767.0, pixel_size_nm=120.0)
    r, y = panel._ideal_curve.getData()
    half = _half_max_radius(r, y)
    expected_fwhm = 0.514 * 767.0 / 0.75 / 120.0
    assert 2 * half == pytest.approx(expected_fwhm, rel=2e-3)
    assert f"{expected_fwhm:.2f}" in panel.numbers_label.text()
    with qtbot.waitSignal(panel.opticsChanged) as blocker:
        panel.na_box.setValue(0.6)
    assert blocker.args[0] == {"numerical_aperture": 0.6, "wavelength_nm": 767.0, "pixel_size_nm": 120.0}
    r, y = panel._ideal_curve.getData()
    assert 2 * _half_max_radius(r, y) == pytest.approx(0.514 * 767 / 0.6 / 120, rel=2e-3)
    with qtbot.waitSignal(panel.estimateRequested):
        panel.estimate_button.click()
    assert not _missing_tooltips(panel), _missing_tooltips(panel)


def test_psf_panel_shows_an_empirical_psf(qtbot, tmp_path):
    panel = _show(qtbot, PSFPanel())
    panel.set_optics(numerical_aperture=0.75, wavelength_nm=767.0, pixel_size_nm=120.0)
    kernel = gaussian_psf(fwhm=4.5).image(supersample=4, radius=8)
    psf = empirical_psf(kernel, supersample=4, fwhm=4.5, n_atoms=312, ellipticity=0.04,
                        warnings=("only 312 atoms",))
    panel.set_psf(psf)
    image = panel._image.image
    assert image.ndim == 2 and image.shape[0] == image.shape[1] > 1
    assert np.unravel_index(np.argmax(image), image.shape) == (image.shape[0] // 2, image.shape[1] // 2)
    text = panel.numbers_label.text()
    assert "312" in text and "0.04" in text and "4.500 px = 540 nm" in text
    assert "only 312 atoms" in panel.warnings_label.text()
    r, y = panel._measured_curve.getData()
    # a Gaussian of FWHM 4.5 px drops to half its peak at 2.25 px
    assert float(np.interp(2.25, r, y)) / y[0] == pytest.approx(0.5, abs=0.01)
    _assert_render(panel, tmp_path, "psf")
    panel.log_check.click()  # display only: log10 of the image relative to its peak, clipped at 1e-3
    shown = panel._image.image
    assert shown.max() == pytest.approx(0.0) and shown.min() >= -3.0
    assert np.allclose(10 ** shown[shown > -3], (image / image.max())[shown > -3])
    _assert_render(panel, tmp_path, "psf_log")


# ------------------------------------------------------------------------------ fidelity
def test_loss_note_marks_one_to_two_percent_as_typical():
    """Typical loss 1-2 % per image: common practice, no source."""
    assert loss_note(0.005).startswith("below")
    assert loss_note(0.01).startswith("typical") and loss_note(0.02).startswith("typical")
    assert loss_note(0.0201).startswith("above")
    assert loss_note(0.025, typical=True).startswith("typical")
    assert loss_note(float("nan")) == ""


def test_fidelity_panel_shows_a_dict_report(qtbot, tmp_path):
    panel = _show(qtbot, FidelityPanel(), (560, 520))
    rng = np.random.default_rng(2)
    loss = rng.normal(0.014, 0.004, 50)
    panel.set_report({"loss": 0.0142, "loss_ci": (0.011, 0.018), "hop": 0.0031, "hop_ci": (0.0015, 0.0055),
                      "n_atoms": 4210, "n_shots": 50, "per_shot": {"loss": loss},
                      "warnings": ("filling 0.62: too dense",)})
    assert panel.table.item(0, 0).text() == "1.42 %"
    assert panel.table.item(0, 1).text() == "1.10 – 1.80 %"
    assert panel.table.columnCount() == 2  # the note is a line under the table (fits 1366 px)
    assert panel.loss_note_label.text().endswith("loss per image: typical (1–2 %)</span>")
    assert panel.table.item(1, 0).text() == "0.31 %"
    assert panel.table.item(2, 0).text() == "-"
    assert "4210" in panel.summary_label.text()
    assert panel.warnings_label.isVisibleTo(panel) and "too dense" in panel.warnings_label.text()
    x, y = panel._loss_curve.getData()
    assert np.allclose(y, 100 * loss) and len(x) == 50
    assert [label.text for _item, label in panel._legend.items] == ["loss"]  # only curves with data
    assert not _missing_tooltips(panel), _missing_tooltips(panel)
    _assert_render(panel, tmp_path, "fidelity")
    panel.set_report(None)
    assert panel.table.item(0, 0).text() == "-" and not panel.warnings_label.isVisibleTo(panel)


def test_fidelity_panel_shows_a_real_report(qtbot):
    from latticeread.core.fidelity import estimate_fidelity, simulate_occupations

    occ, _ = simulate_occupations(n_shots=12, n_images=2, shape=(20, 20), filling=0.3, loss=0.03, hop=0.0,
                                  rng=4)
    report = estimate_fidelity(occ, false_positive_rate=0.0, false_negative_rate=0.0, n_bootstrap=0,
                               n_blocks=3, rng=1)
    panel = _show(qtbot, FidelityPanel(), (560, 520))
    panel.set_report(report)
    assert panel.table.item(0, 0).text() == f"{100 * report.loss.value:.2f} %"
    assert panel.table.item(2, 0).text() == f"{100 * report.read_correctly.value:.2f} %"
    lo, hi = report.loss_counted.low, report.loss_counted.high
    assert panel.table.item(5, 1).text() == f"{100 * lo:.2f} – {100 * hi:.2f} %"
    for w in report.warnings:
        assert w in panel.warnings_label.text()
    x, y = panel._vanished_curve.getData()
    assert len(x) == 12
    assert np.allclose(y, [100 * s.vanished.value for s in report.per_shot])
    x, y = panel._loss_curve.getData()
    assert len(x) == len(report.blocks)
    with qtbot.waitSignal(panel.estimateRequested):
        panel.estimate_button.click()


# --------------------------------------------------------------------------- plot export
def test_export_png_and_svg_of_a_panel_and_a_plot(qtbot, tmp_path):
    panel = _show(qtbot, HistogramPanel(), (600, 400))
    panel.set_amplitudes(_bimodal(np.random.default_rng(1)))
    panel.set_threshold(480.0)
    png = export_widget_png(panel, tmp_path / "panel.png")
    image = QtGui.QImage(str(png))
    assert (image.width(), image.height()) == (panel.width(), panel.height())
    item = panel.plot_widget.getPlotItem()
    png2 = export_widget_png(item, tmp_path / "plot.png", scale=2)
    image2 = QtGui.QImage(str(png2))
    assert image2.width() == pytest.approx(2 * item.sceneBoundingRect().width(), abs=1)
    for target, name in ((panel.plot_widget, "widget.svg"), (item, "item.svg")):
        svg = export_svg(target, tmp_path / name, title="site amplitudes")
        root = ET.parse(svg).getroot()  # parses as XML
        assert root.tag.endswith("svg")
        assert len([e for e in root.iter() if e.tag.endswith(("path", "polyline"))]) > 10  # vector curves
        assert QtSvg.QSvgRenderer(str(svg)).isValid()
    assert sorted(p.name for p in tmp_path.iterdir()) == ["item.svg", "panel.png", "plot.png", "widget.svg"]


def test_export_to_a_missing_folder_fails_cleanly(qtbot, tmp_path):
    panel = _show(qtbot, HistogramPanel(), (300, 200))
    with pytest.raises(ExportError, match="does not exist"):
        export_svg(panel, tmp_path / "no_such_folder" / "plot.svg")
    (tmp_path / "taken.png").mkdir()
    with pytest.raises(ExportError, match="a folder of that name already exists"):
        export_widget_png(panel, tmp_path / "taken.png")
    with pytest.raises(TypeError, match="give a QWidget or a plot item"):
        export_widget_png("not a widget", tmp_path / "x.png")
    with pytest.raises(ExportError, match="not shown in any window"):
        export_svg(pg.PlotItem(), tmp_path / "x.svg")
    assert [p.name for p in tmp_path.iterdir()] == ["taken.png"]  # no temporary file left


# ---------------------------------------------------------------------------------- icons
@pytest.mark.parametrize("name", ICON_NAMES)
def test_icons_are_valid_svg_and_draw_something(qtbot, name):
    path = ICON_DIR / f"{name}.svg"
    root = ET.parse(path).getroot()
    assert root.tag.endswith("svg") and root.get("viewBox")
    renderer = QtSvg.QSvgRenderer(str(path))
    assert renderer.isValid()
    image = QtGui.QImage(48, 48, QtGui.QImage.Format.Format_ARGB32)
    image.fill(QtCore.Qt.GlobalColor.transparent)
    painter = QtGui.QPainter(image)
    renderer.render(painter)
    painter.end()
    drawn = sum(image.pixelColor(x, y).alpha() > 0 for x in range(48) for y in range(48))
    assert 48 < drawn < 48 * 48 or name == "latticeread"
