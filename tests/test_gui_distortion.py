"""The geometry panel's lens-distortion view: block shifts and residuals drawn as arrows."""

from __future__ import annotations

import numpy as np
import pytest
import pytest

from latticeread.core.distortion import DistortionField
from latticeread.gui.panels import GeometryPanel


def _field():
    # blocks on a 5 x 5 grid, barrel-like shifts towards the centre, small residuals
    g = np.linspace(60.0, 452.0, 5)
    x, y = (v.ravel() for v in np.meshgrid(g, g))
    u, v = (x - 255.5) / 362.0, (y - 255.5) / 362.0
    r2 = u ** 2 + v ** 2
    dx, dy = -0.8 * u * r2, -0.8 * v * r2
    binned = np.column_stack([x, y, dx, dy, 0.05 * np.sign(u), -0.02 * np.ones_like(v)])
    return DistortionField(centre=(255.5, 255.5), scale=362.0, order=3, coef_x=[0, 0, 0, -0.8, 0, -0.8, 0],
                           coef_y=[0, 0, 0, 0, -0.8, 0, -0.8], applied=True, n_atoms=900, rms_lattice=0.2,
                           rms_residual=0.04, p_value=1e-30, max_shift=0.35, spacing=5.8, binned=binned)


def test_distortion_view_draws_one_arrow_per_block_and_hides_without_a_field(qtbot, tmp_path):
    panel = GeometryPanel()
    qtbot.addWidget(panel)
    panel.resize(640, 1000)
    panel.show()
    qtbot.waitExposed(panel)
    assert not panel.distortion_box.isVisibleTo(panel)
    field = _field()
    panel.set_distortion(field)
    assert panel.distortion_box.isVisibleTo(panel)
    xs, ys = panel._shift_arrows.getData()
    assert len(xs) == 2 * 25  # a start and an end per block
    gain = float(panel.distortion_label.text().split("magnified ")[1].split("x")[0])
    b = field.binned
    np.testing.assert_allclose(xs[1::2] - xs[0::2], b[:, 2] * gain, rtol=0.05)
    np.testing.assert_allclose(ys[1::2] - ys[0::2], b[:, 3] * gain, rtol=0.05)
    assert "applied" in panel.distortion_label.text() and "up to 0.35 px" in panel.distortion_label.text()
    path = tmp_path / "distortion.png"
    assert panel.grab().save(str(path))
    panel.set_distortion(None)
    assert not panel.distortion_box.isVisibleTo(panel)
    assert panel._shift_arrows.getData()[0] is None or len(panel._shift_arrows.getData()[0]) == 0




def test_brightness_map_is_drawn_behind_the_arrows(qtbot, tmp_path):
    from latticeread.core.brightness import BrightnessMap

    panel = GeometryPanel()
    qtbot.addWidget(panel)
    panel.resize(640, 1000)
    panel.show()
    qtbot.waitExposed(panel)
    beam = BrightnessMap(centre=(255.5, 255.5), scale=362.0, order=2, coef=[0.0, 0.0, -1.0, 0.0, -1.0],
                         applied=True, n_sites=2000, low=0.55, high=1.0, scatter=0.1, p_value=1e-40)
    panel.set_brightness(beam, (512, 512))
    assert panel.distortion_box.isVisibleTo(panel)
    image = panel._brightness_image.image
    assert image.max() == pytest.approx(1.0, abs=0.01)  # 1 at the centre
    assert image[0, 0] == pytest.approx(float(beam.relative(0.0, 0.0)), rel=1e-6)  # a corner
    assert "0.55-1.00" in panel.brightness_label.text() and "applied" in panel.brightness_label.text()
    panel.set_distortion(_field())
    assert panel.grab().save(str(tmp_path / "field.png"))
    panel.set_brightness(None)
    panel.set_distortion(None)
    assert not panel.distortion_box.isVisibleTo(panel)
