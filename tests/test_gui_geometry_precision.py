"""The geometry panel shows the spacing's statistical uncertainty when the fit provides one."""

from __future__ import annotations

from latticeread.core.geometry import LatticeGeometry, LatticeQuality
from latticeread.gui.panels.geometry_panel import GeometryPanel


def _panel(qtbot, quality):
    panel = GeometryPanel()
    qtbot.addWidget(panel)
    panel.resize(640, 820)
    panel.show()
    qtbot.waitExposed(panel)
    panel.set_geometry(LatticeGeometry(a1=(5.2, 0.6), a2=(-0.6, 5.2), offset=(30.3, 20.7), quality=quality))
    return panel


def test_model_fit_uncertainty_is_shown(qtbot, tmp_path):
    warning = "the lattice spacing from this fit is uncertain to 2.3e-04 (relative, 1 sigma) from 1 frame"
    panel = _panel(qtbot, LatticeQuality(12.5, 0.05, 480, (warning,), spacing_sigma=2.3e-4))
    assert "spacing ±2.3e-04 (1σ, relative)" in panel.quality_label.text()
    assert "uncertain to 2.3e-04" in panel.warnings_label.text()
    panel.grab().save(str(tmp_path / "geometry_precision.png"))


def test_no_uncertainty_no_text(qtbot):
    panel = _panel(qtbot, LatticeQuality(12.5, 0.05, 480, ()))
    assert "±" not in panel.quality_label.text()
