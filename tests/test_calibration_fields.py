"""The optional lens-distortion and brightness-map fields of a calibration and its file."""

from __future__ import annotations

import json

import numpy as np
import pytest

from latticeread.core.brightness import BrightnessMap
from latticeread.core.calibration import Calibration
from latticeread.core.distortion import DistortionField
from latticeread.core.geometry import LatticeGeometry
from latticeread.core.psf import gaussian_psf
from latticeread.errors import CalibrationError
from latticeread.io.calibration_file import calibration_from_json, calibration_to_json

GEOMETRY = LatticeGeometry(a1=(0.3, 4.0), a2=(4.0, -0.3), offset=(48.2, 47.7))


def _field(applied=True, k=0.5):
    n = 7  # degree-2 and degree-3 monomials
    return DistortionField(centre=(47.5, 47.5), scale=67.0, order=3, coef_x=[0, 0, 0, k, 0, k, 0],
                           coef_y=[0, 0, 0, 0, k, 0, k][:n], applied=applied, n_atoms=120, rms_lattice=0.2,
                           rms_residual=0.05, p_value=1e-12, max_shift=0.7, spacing=4.0,
                           binned=np.array([[10.0, 10.0, -0.3, -0.3, 0.01, 0.0], [80.0, 80.0, 0.3, 0.3, 0.0, -0.02]]))


def _map(applied=True):
    return BrightnessMap(centre=(47.5, 47.5), scale=67.0, order=2, coef=[0.0, 0.0, -0.3, 0.0, -0.3],
                         applied=applied, n_sites=300, low=0.6, high=1.0, scatter=0.08, p_value=1e-9)


def _cal(**changes):
    return Calibration(geometry=GEOMETRY, psf=gaussian_psf(fwhm=3.0), frame_shape=(96, 96), **changes)


def test_fields_round_trip_through_the_file_and_take_part_in_equality():
    cal = _cal(distortion=_field(), brightness=_map())
    back = calibration_from_json(calibration_to_json(cal))
    assert back == cal
    assert back.distortion.binned.shape == (2, 6)
    assert back != _cal(distortion=_field(k=0.4), brightness=_map())
    assert back != _cal(distortion=_field(applied=False), brightness=_map())
    assert back != _cal(distortion=_field(), brightness=_map(applied=False))
    assert _cal() != cal


def test_a_file_without_the_fields_still_loads_with_none():
    data = json.loads(calibration_to_json(_cal()))
    del data["distortion"], data["brightness"]
    cal = calibration_from_json(json.dumps(data))
    assert cal.distortion is None and cal.brightness is None


def test_a_malformed_field_in_the_file_names_its_key():
    data = json.loads(calibration_to_json(_cal(distortion=_field())))
    data["distortion"]["coef_x"] = "barrel"
    with pytest.raises(CalibrationError, match="distortion.coef_x"):
        calibration_from_json(json.dumps(data))
    data = json.loads(calibration_to_json(_cal(distortion=_field())))
    data["distortion"]["coef_x"] = [0.1]
    with pytest.raises(CalibrationError, match="needs 7 coefficients per axis"):
        calibration_from_json(json.dumps(data))
    data = json.loads(calibration_to_json(_cal(brightness=_map())))
    data["brightness"]["order"] = 9
    with pytest.raises(CalibrationError, match="brightness map's order"):
        calibration_from_json(json.dumps(data))
    data = json.loads(calibration_to_json(_cal(brightness=_map())))
    data["brightness"]["beam"] = 1
    with pytest.raises(CalibrationError, match="unknown brightness map entr"):
        calibration_from_json(json.dumps(data))


def test_field_places_and_unplaces_points_and_only_when_applied():
    field = _field(k=0.5)
    x, y = np.array([0.0, 47.5, 95.0]), np.array([0.0, 47.5, 95.0])
    px, py = field.place(x, y)
    # u = v = -47.5/67 at the first corner: dx = k (u^3 + u v^2) = 2 k u^3 (by hand)
    u = -47.5 / 67.0
    assert px[0] - x[0] == pytest.approx(2 * 0.5 * u ** 3)
    assert px[1] == 47.5 and py[1] == 47.5
    bx, by = field.unplace(px, py, n_iter=8)
    np.testing.assert_allclose(bx, x, atol=1e-6)
    np.testing.assert_allclose(by, y, atol=1e-6)
    np.testing.assert_array_equal(_field(applied=False).place(x, y)[0], x)


def test_brightness_map_is_one_at_its_centre_and_gaussian_of_degree_two():
    m = _map()
    assert m.relative(47.5, 47.5) == pytest.approx(1.0)
    # log b = -0.3 (u^2 + v^2): a Gaussian (by hand)
    assert m.relative(47.5 + 67.0, 47.5) == pytest.approx(np.exp(-0.3))
    np.testing.assert_array_equal(_map(applied=False).factor([0.0, 90.0], [0.0, 90.0]), [1.0, 1.0])
    assert m.image((96, 96)).shape == (96, 96)
