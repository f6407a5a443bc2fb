"""Drawing and editing the analysed region in the window, and excluding sites from the inspector.

The ROIs are driven programmatically (pyqtgraph's own setters, as a drag ends): each edit must
land in the calibration as one undo step, the shape's geometry must be the ROI's (its corners
mapped by pyqtgraph's own transform, ``ROI.mapToParent``), and the sites left out are the
ones :func:`latticeread.core.region.sites_in_region` names. Ground truth for the site set:
the square demo's calibration and a disk whose sites are counted by hand from their centres
(common practice, no source).
"""

from __future__ import annotations


import numpy as np
import pytest

pytest.importorskip("pytestqt")

from PySide6 import QtCore  # noqa: E402

from latticeread.core.region import RegionShape, SiteRegion  # noqa: E402
from latticeread.gui.app import make_app  # noqa: E402
from latticeread.gui.region_editor import roi_shape  # noqa: E402
from gui_windows import demo_window  # noqa: E402


@pytest.fixture
def window(qtbot, tmp_path):
    w = demo_window(qtbot, tmp_path)
    w.flush()
    return w


def test_roi_geometry_is_pyqtgraphs_own():
    import pyqtgraph as pg

    make_app()

    roi = pg.RectROI((10, 20), (30, 8), angle=25.0)
    shape = roi_shape(roi)
    # the box corner (u, v) = (30, 8) mapped by pyqtgraph must be inside, just beyond it outside
    from latticeread.core.region import shape_contains

    far = roi.mapToParent(QtCore.QPointF(29.5, 7.5))
    out = roi.mapToParent(QtCore.QPointF(30.5, 4.0))
    assert shape_contains(shape, np.array([far.x()]), np.array([far.y()]))[0]
    assert not shape_contains(shape, np.array([out.x()]), np.array([out.y()]))[0]
    poly = pg.PolyLineROI([[0, 0], [10, 0], [5, 8]], closed=True, pos=(3, 4))
    assert roi_shape(poly).points == ((3.0, 4.0), (13.0, 4.0), (8.0, 12.0))


def test_drawing_a_disk_edits_the_calibration_with_one_undo_step(window, monkeypatch):
    w = window
    monkeypatch.setattr(w, "_process_current_frame", lambda: None)  # no frame to reconstruct after each edit
    s = w.session
    editor = w.image_pane.region_editor
    assert w.image_pane.region_button.isEnabled()
    before = s.calibration
    editor.add_shape("disk", excluded=False, center=(128.0, 128.0), size=120.0)
    region = s.calibration.options.region
    assert len(region.include) == 1 and region.include[0].kind == "ellipse"
    assert region.include[0].width == pytest.approx(120.0)
    # the sites left out: centres farther than 60 px from (128, 128)
    ex = s.excluded_sites()
    from latticeread.core.geometry import lattice_sites

    all_sites = lattice_sites(before.geometry, tuple(before.frame_shape), index_bounds=before.options.index_bounds)
    far = np.hypot(all_sites.x - 128, all_sites.y - 128) > 60
    assert len(ex) == int(far.sum()) > 0
    # the crosses show every excluded site
    assert len(editor.cross_item.data) == len(ex)
    assert s.undo() and s.calibration.options.region.is_everything
    w.flush()
    assert editor.rois == [] and s.calibration == before  # the drawing follows the calibration back


def test_dragging_a_shape_and_adding_a_mask_are_one_undo_step_each(window, monkeypatch):
    w = window
    monkeypatch.setattr(w, "_process_current_frame", lambda: None)
    s = w.session
    editor = w.image_pane.region_editor
    s.set_region(SiteRegion(include=(RegionShape.rectangle((40, 40), 150, 150),)))
    w.flush()
    assert len(editor.rois) == 1  # a region set elsewhere (a file, undo) is drawn
    # drag the rectangle (as a drag ends): one edit
    roi = editor.rois[0]
    roi.setPos((roi.pos().x() + 10, roi.pos().y()), finish=True)
    assert s.calibration.options.region.include[0].origin == pytest.approx((50.0, 40.0))
    editor.add_shape("polygon", excluded=True, center=(128.0, 128.0), size=20.0)
    region = s.calibration.options.region
    assert len(region.exclude) == 1 and len(region.exclude[0].points) == 6
    assert len(editor.rois) == 2 and editor.rois[1].excluded
    assert s.undo() and s.calibration.options.region.exclude == ()
    w.flush()
    assert len(editor.rois) == 1
    assert s.undo() and s.calibration.options.region.include[0].origin == pytest.approx((40.0, 40.0))


def test_a_region_without_sites_is_refused_and_the_drawing_goes_back(window, monkeypatch):
    w = window
    reported = []
    monkeypatch.setattr(w, "_report", lambda exc, step=None: reported.append((step, str(exc))))
    w.image_pane.region_editor.add_shape("disk", center=(-500.0, -500.0), size=10.0)
    assert reported and reported[0][0] == "Change the analysed region"
    assert "holds no lattice site" in reported[0][1]
    assert w.session.calibration.options.region.is_everything
    assert w.image_pane.region_editor.rois == []


def test_inspector_excludes_the_site_and_lets_it_back_in(window, qtbot):
    w = window
    s = w.session
    s.reconstruct([0])
    s.finish_reconstruction()
    w.flush()
    res = s.result()
    k = int(np.argmin(np.hypot(res.sites.x - 128, res.sites.y - 128)))
    row, col = int(res.sites.rows[k]), int(res.sites.cols[k])
    assert w.inspect_site(row, col)
    insp = w.site_inspector
    assert insp.exclude_button.isEnabled() and insp.exclude_button.text() == "Exclude this site"
    insp.exclude_button.click()
    assert s.calibration.options.region.excluded_sites == ((row, col),)
    assert insp.exclude_button.text() == "Include this site again"
    # the shown frame is reconstructed again: the site has no result, neighbours do
    w.flush()
    res = s.result()
    assert res is not None and not np.any((res.sites.rows == row) & (res.sites.cols == col))
    assert res.occupation_matrix()[row - res.sites.row_min, col - res.sites.col_min] == 255
    # clicking it in the image says it is excluded
    info = w.image_pane.site_at(float(res.excluded.x[0]), float(res.excluded.y[0]))
    assert info.get("excluded") and (info["row"], info["col"]) == (row, col)
    insp.exclude_button.click()  # include it again
    assert s.calibration.options.region.is_everything
    assert s.undo() and s.calibration.options.region.excluded_sites == ((row, col),)
    insp.mask_button.setEnabled(True)
    w.inspect_site(row, col)
    insp.mask_button.click()
    masked = s.calibration.options.region.exclude
    assert len(masked) == 1 and masked[0].width == pytest.approx(3 * min(s.calibration.geometry.spacings))
