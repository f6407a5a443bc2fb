"""Units, scale and readable numbers in the window.

Ground truth: the bundled square demo (sample_data/, made by latticeread.core.simulate) with
its calibration (160 nm pixels in the atom plane). Colour differences are CIE76 Delta E in CIELAB
computed with scikit-image (skimage.color.rgb2lab, deltaE_cie76); a difference of about 2.3 is
just noticeable (Sharma, Digital Color Imaging Handbook, from memory), 40 is the margin chosen
here for a thin marker line on any colour of the map (common practice, no source).
"""

from __future__ import annotations


import numpy as np
import pytest

pytest.importorskip("pytestqt")

from latticeread.gui.app import make_app  # noqa: E402
from latticeread.gui.axes import IntegerAxis  # noqa: E402
from latticeread.gui.image_pane import COLOR_MAPS, color_map, nice_scale_length_um  # noqa: E402
from latticeread.gui.panels import rate_pct  # noqa: E402
from gui_windows import demo_window  # noqa: E402


@pytest.fixture()
def demo(qtbot, tmp_path):
    w = demo_window(qtbot, tmp_path)
    qtbot.waitUntil(lambda: w.session.result(0) is not None, timeout=20000)
    w.flush()
    return w


def _lab(rgb):
    from skimage.color import rgb2lab

    return rgb2lab(np.asarray(rgb, dtype=float).reshape(1, -1, 3) / 255.0)[0]


@pytest.mark.parametrize("name", sorted(COLOR_MAPS))
def test_marker_colours_stand_out_on_every_colour_of_their_map(name):
    from skimage.color import deltaE_cie76

    lut = color_map(name).getLookupTable(nPts=256)[:, :3]
    map_lab = _lab(lut)
    markers = COLOR_MAPS[name]
    for state, rgb in markers.items():
        closest = float(deltaE_cie76(map_lab, _lab([rgb])[0][None]).min())
        assert closest >= 40, f"{state} markers ({rgb}) nearly vanish on the {name} map (Delta E {closest:.1f})"
    states = sorted(markers)
    for i, a in enumerate(states):
        for b in states[i + 1:]:
            diff = float(deltaE_cie76(_lab([markers[a]])[0], _lab([markers[b]])[0]))
            assert diff >= 30, f"{a} and {b} markers look alike on {name} (Delta E {diff:.1f})"


def test_colour_map_choice_recolours_image_markers_and_legend(demo):
    pane = demo.image_pane
    assert pane.legend.isVisible()
    labels = [label.text for _sample, label in pane.legend.items]
    assert any(text.startswith("occupied") for text in labels) and any("uncertain" in t for t in labels)
    for name in COLOR_MAPS:
        act = next(a for a in demo.colormap_actions.actions() if a.data() == name)
        act.trigger()
        assert pane.color_map_name == name
        pen = pane.site_items["occupied"].opts["pen"].color()
        assert (pen.red(), pen.green(), pen.blue()) == COLOR_MAPS[name]["occupied"]
        assert demo.app_settings.value("view/colormap") == name


def test_colour_bar_unit_model_levels_and_side_by_side_after_zoom(demo, qtbot):
    pane = demo.image_pane
    assert pane.lut.axis.label.toPlainText().strip() == "counts"
    raw_high = pane.lut.getLevels()[1]
    pane.set_view_mode("model")
    qtbot.waitUntil(lambda: pane.has_model, timeout=10000)
    assert pane.lut.axis.label.toPlainText().strip() == "photons"
    model = pane._model
    low, high = pane.lut.getLevels()
    # the model's own scale (photons per pixel), not the raw frame's counts
    assert high <= float(np.nanmax(model)) + 1e-9 and high < raw_high
    # side by side, zoomed in: the model next to the frame is drawn, not black
    pane = demo.image_pane
    pane.set_view_mode("side")
    qtbot.waitUntil(lambda: pane.has_model, timeout=10000)
    res = demo.session.result()
    cx, cy = float(np.median(res.sites.x)), float(np.median(res.sites.y))
    pane.view.setRange(xRange=(cx - 15, cx + 15), yRange=(cy - 15, cy + 15), padding=0)
    qtbot.wait(100)
    assert pane.model_view.viewRange()[0] == pytest.approx(pane.view.viewRange()[0], abs=1e-6)
    shot = pane.graphics.grab()
    rect = pane.model_view.sceneBoundingRect().toRect()
    crop = shot.toImage().copy(rect)
    grey = np.array([QColorValue(crop, x, y) for x in range(5, crop.width() - 5, 7)
                     for y in range(5, crop.height() - 5, 7)])
    assert grey.std() > 10, "the model view is blank after zooming"


def QColorValue(image, x, y) -> float:  # noqa: N802 - helper mirrors Qt naming
    c = image.pixelColor(x, y)
    return 0.299 * c.red() + 0.587 * c.green() + 0.114 * c.blue()


def test_scale_bar_frame_count_and_threshold_precision(demo):
    pane = demo.image_pane
    assert demo.session.calibration.pixel_size_nm == 160.0
    assert pane.scale_bar is not None and pane.scale_bar.isVisible()
    length = pane.scale_bar_length_um
    assert pane.scale_bar.text.textItem.toPlainText() == f"{length:g} \u00b5m"
    assert pane.scale_bar.size == pytest.approx(length / 0.160)  # pixels of 160 nm
    pane.set_pixel_size(None)
    assert not pane.scale_bar.isVisible()
    pane = demo.image_pane
    assert pane.count_label.text() == "of 12"  # 12 frames, numbered 0 to 11
    hp = demo.histogram_panel
    demo.session.set_threshold(123.456)
    demo.flush()
    box_text = hp.threshold_box.text()
    line_text = hp.threshold_line.label.textItem.toPlainText()
    assert box_text == "123.5 photons"
    assert line_text == "threshold 123.5"


def test_round_scale_bar_lengths():
    assert nice_scale_length_um(41.0) == 5.0
    assert nice_scale_length_um(100.0) == 20.0
    assert nice_scale_length_um(3.0) == 0.5


def test_rates_far_below_what_can_be_checked_read_as_a_bound():
    assert rate_pct(1.3e-227) == "< 1e-6 %"
    assert rate_pct(0.0123) == "1.23 %"
    assert rate_pct(float("nan")) == "-"


def test_frame_axis_ticks_are_whole_frames(qtbot):
    make_app()
    axis = IntegerAxis("bottom")
    for lo, hi in ((0.0, 1.0), (0.0, 3.0), (0.0, 11.0), (0.0, 500.0)):
        levels = axis.tickValues(lo, hi, 400)
        values = [v for _spacing, vs in levels for v in vs]
        assert values, (lo, hi)
        assert all(float(v).is_integer() for v in values), (lo, hi, values)


def test_camera_fields_carry_units(qtbot):
    from latticeread.gui.dialogs import AnalysisSettingsDialog

    make_app()
    dlg = AnalysisSettingsDialog({"camera": {"kind": "emccd"}})
    qtbot.addWidget(dlg)
    suffixes = {key: box.suffix() for key, (_label, box) in dlg.camera_boxes.items()}
    assert suffixes["bias"] == " counts" and suffixes["read_noise"] == " counts rms"
    assert all(s.strip() for s in suffixes.values()), suffixes
