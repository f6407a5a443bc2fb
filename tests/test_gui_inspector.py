"""Clicking a site shows its evidence: image, model and residual patches, and its amplitude and
posterior in every reconstructed frame.

Ground truth: the bundled square demo (sample_data/, made by latticeread.core.simulate) with its
calibration; the patches must agree with the session's full model image
(latticeread.core.psf.render_sites over every site) and the series with the stored amplitudes.
"""

from __future__ import annotations


import numpy as np
import pytest

pytest.importorskip("pytestqt")

from PySide6 import QtCore  # noqa: E402
from PySide6.QtTest import QTest  # noqa: E402

from gui_windows import demo_window  # noqa: E402


def test_click_on_a_site_shows_its_evidence(qtbot, tmp_path):
    w = demo_window(qtbot, tmp_path)
    s = w.session
    s.reconstruct([0, 1, 2, 3])  # a few frames keep the test short; the rest stay not done
    s.finish_reconstruction()
    w.flush()
    res = s.result()
    # an occupied site near the middle of the frame
    centre = np.hypot(res.sites.x - 128, res.sites.y - 128)
    k = int(np.argmin(np.where(res.occupied == 1, centre, np.inf)))
    row, col = int(res.sites.rows[k]), int(res.sites.cols[k])
    pane = w.image_pane
    qtbot.wait(50)
    scene_pos = pane.view.mapViewToScene(QtCore.QPointF(res.sites.x[k], res.sites.y[k]))
    view_pos = pane.graphics.mapFromScene(scene_pos)
    QTest.mouseClick(pane.graphics.viewport(), QtCore.Qt.LeftButton, QtCore.Qt.NoModifier, view_pos)
    qtbot.waitUntil(lambda: w.site_inspector.evidence is not None, timeout=5000)
    e = w.site_inspector.evidence
    assert (e["row"], e["col"]) == (row, col)
    assert w.docks["inspector"].isVisible()
    # amplitude of this site in every frame = what the session stored
    np.testing.assert_array_equal(e["frames"], [0, 1, 2, 3])
    np.testing.assert_array_equal(e["amplitude"], [s.amplitudes(i)[k] for i in range(4)])
    assert e["p_occupied"][0] > 0.9  # occupied in the frame clicked
    # the model patch is the full model image (all sites) cut at the same pixels
    full = s.model_job(0)()
    x0, y0 = e["origin"]
    size = e["model"].shape[0]
    np.testing.assert_allclose(e["model"] - res.background, full[y0:y0 + size, x0:x0 + size], rtol=1e-9,
                               atol=1e-9)
    np.testing.assert_allclose(e["residual"], e["image"] - e["model"])
    assert "read as occupied in" in w.site_inspector.details.text()
    # a click on a frame in the series shows that frame
    w.site_inspector.frameRequested.emit(3)
    assert s.index == 3
    w.flush()
    assert w.site_inspector.evidence["index"] == 3
