"""The analysed region: shapes in pixels -> which lattice sites are analysed, and its storage.

Point-in-shape is checked against scikit-image's rasterisers (``skimage.draw.polygon``,
``skimage.draw.ellipse``: a pixel is drawn when its centre lies inside the shape) on a grid of
pixel centres, and against hand-worked points of a concave polygon (common practice, no source).
"""

from __future__ import annotations

import json

import numpy as np
import pytest
from skimage import draw

from latticeread.core.calibration import Calibration
from latticeread.core.camera import CameraModel
from latticeread.core.geometry import LatticeGeometry, lattice_sites
from latticeread.core.psf import gaussian_psf
from latticeread.core.region import RegionShape, SiteRegion, shape_contains, sites_in_region
from latticeread.errors import CalibrationError
from latticeread.io.calibration_file import calibration_from_json, calibration_to_json

GEOMETRY = LatticeGeometry(a1=(0.3, 4.0), a2=(4.0, -0.3), offset=(48.2, 47.7))
CAL = Calibration(geometry=GEOMETRY, psf=gaussian_psf(fwhm=3.0), frame_shape=(96, 96),
                  camera=CameraModel(kind="scmos", counts_per_electron=0.5, bias=100.0, read_noise=1.0))
# pixel-centre grid, shifted by a quarter pixel so no centre lies exactly on a shape's edge
YY, XX = np.mgrid[0:60, 0:70].astype(float)


def test_polygon_matches_skimage_draw_polygon():
    verts = np.array([[5.25, 3.25], [60.25, 8.25], [40.25, 30.25], [55.25, 52.25], [10.25, 45.25], [20.25, 25.25]])
    rr, cc = draw.polygon(verts[:, 1], verts[:, 0], shape=XX.shape)
    expected = np.zeros(XX.shape, bool)
    expected[rr, cc] = True
    got = shape_contains(RegionShape.polygon(verts), XX, YY)
    assert got.sum() > 500
    assert np.array_equal(got, expected)


def test_concave_polygon_hand_worked_points():
    ell = RegionShape.polygon([(0, 0), (10, 0), (10, 4), (4, 4), (4, 10), (0, 10)])  # an L
    inside = shape_contains(ell, np.array([1, 8, 2, 3.9]), np.array([1, 2, 8, 3.9]))
    outside = shape_contains(ell, np.array([6, 9, -1, 11]), np.array([6, 9, 5, 1]))
    assert inside.all() and not outside.any()


@pytest.mark.parametrize("angle", [0.0, 30.0])
def test_ellipse_matches_skimage_draw_ellipse(angle):
    # skimage.draw.ellipse(r, c, r_radius, c_radius, rotation): rotation in radians, measured
    # from the row axis towards the column axis with rows as the first axis; a box turned by
    # ``angle`` from +x towards +y with y = row down is rotation = -angle there.
    cx, cy, rx, ry = 33.25, 29.25, 20.0, 11.0
    a = np.radians(angle)
    # corner of the box whose centre is (cx, cy): centre - R(angle) @ (rx, ry)
    ox = cx - (rx * np.cos(a) - ry * np.sin(a))
    oy = cy - (rx * np.sin(a) + ry * np.cos(a))
    shape = RegionShape.ellipse((ox, oy), 2 * rx, 2 * ry, angle)
    rr, cc = draw.ellipse(cy, cx, ry, rx, shape=XX.shape, rotation=-a)
    expected = np.zeros(XX.shape, bool)
    expected[rr, cc] = True
    got = shape_contains(shape, XX, YY)
    assert got.sum() > 400
    # the rasteriser and the analytic test may differ on the odd pixel centre within 1e-9 of the rim
    assert np.count_nonzero(got != expected) <= 2


def test_rectangle_turned_about_its_corner():
    rect = RegionShape.rectangle((10, 10), 20, 5, angle=90)  # turned onto the +y axis: x in [5, 10], y in [10, 30]
    assert shape_contains(rect, np.array([7.5, 7.5]), np.array([12, 28])).all()
    assert not shape_contains(rect, np.array([12, 20, 7.5]), np.array([12, 12, 31])).any()


def test_sites_in_region_include_exclude_and_single_sites():
    sites = lattice_sites(GEOMETRY, (96, 96))
    region = SiteRegion(include=(RegionShape.disk((48, 48), 30),), exclude=(RegionShape.rectangle((40, 40), 16, 16),),
                        excluded_sites=((0, 3), (-2, -2)))
    keep = sites_in_region(region, x=sites.x, y=sites.y, rows=sites.rows, cols=sites.cols)
    disk = (sites.x - 48) ** 2 + (sites.y - 48) ** 2 <= 30 ** 2
    box = (sites.x >= 40) & (sites.x <= 56) & (sites.y >= 40) & (sites.y <= 56)
    single = ((sites.rows == 0) & (sites.cols == 3)) | ((sites.rows == -2) & (sites.cols == -2))
    assert single.sum() == 2 and box.sum() > 5
    assert np.array_equal(keep, disk & ~box & ~single)
    assert sites_in_region(None, x=sites.x, y=sites.y, rows=sites.rows, cols=sites.cols).all()


def test_region_round_trips_through_the_calibration_file():
    region = SiteRegion(include=(RegionShape.polygon([(1, 1), (90, 2), (50, 80)]),),
                        exclude=(RegionShape.ellipse((30, 30), 10, 6, 15.0),), excluded_sites=((2, -1), (0, 0)))
    cal = CAL.with_options(region=region)
    assert cal != CAL
    back = calibration_from_json(calibration_to_json(cal))
    assert back == cal and back.options.region == region
    assert back.options.region.excluded_sites == ((0, 0), (2, -1))


def test_file_without_region_loads_and_analyses_every_site():
    data = json.loads(calibration_to_json(CAL))
    assert "region" not in data["reconstruction"]  # nothing written when every site is analysed
    assert calibration_from_json(json.dumps(data)).options.region.is_everything


@pytest.mark.parametrize("region, match", [
    ({"include": [{"kind": "star"}]}, "unknown region shape 'star'"),
    ({"include": [{"kind": "polygon", "points": [[0, 0], [1, 1]]}]}, "at least 3 vertices"),
    ({"exclude": [{"kind": "rectangle", "origin": [0, 0], "width": -2, "height": 3}]}, "positive width and height"),
    ({"excluded_sites": [[1, 2.5]]}, "excluded_sites' must be a list of \\[row, col\\] pairs"),
    ({"include": "all"}, "region.include' must be a list of shapes"),
    ({"outside": []}, "unknown analysed-region key"),
    ({"include": [{"kind": "ellipse", "origin": [0, "a"], "width": 2, "height": 2}]}, "corner must be two numbers"),
])
def test_bad_region_in_a_file_is_refused_with_a_message(region, match):
    data = json.loads(calibration_to_json(CAL))
    data["reconstruction"]["region"] = region
    with pytest.raises(CalibrationError, match=match):
        calibration_from_json(json.dumps(data))
