"""A calibration made for another camera (or other camera settings) is refused per frame.

Fact of the trade (common practice, no source): with the right camera description, the
darkest pixels of a frame sit at the camera bias within a few read-noise widths.
"""

import dataclasses

import numpy as np
import pytest

from latticeread.core.calibration import Calibration
from latticeread.core.camera import CameraModel
from latticeread.core.pipeline import Reconstructor
from latticeread.core.simulate import demo_scenario, simulate_frames
from latticeread.errors import CalibrationError


@pytest.fixture(scope="module")
def demo():
    kw = demo_scenario("square", frame_shape=(96, 96))
    kw.pop("pixel_size_nm")
    frames, truth = simulate_frames(**kw, n_shots=1, rng=5)
    cal = Calibration(geometry=truth.geometry, psf=truth.psf, camera=truth.camera, frame_shape=(96, 96),
                      threshold=300.0)
    return frames[0], truth, cal


def test_matching_camera_is_accepted(demo):
    frame, truth, cal = demo
    result = Reconstructor(cal)(frame)
    assert result.n_atoms == pytest.approx(int(truth.initial_occupation[0].sum()), abs=3)


def test_calibration_with_a_higher_bias_is_refused(demo):
    frame, truth, cal = demo
    other = cal.replace(camera=dataclasses.replace(truth.camera, bias=1000.0))
    with pytest.raises(CalibrationError, match="another camera or other camera settings"):
        Reconstructor(other)(frame)


def test_small_bias_differences_within_the_read_noise_pass(demo):
    frame, truth, cal = demo
    near = cal.replace(camera=dataclasses.replace(truth.camera, bias=truth.camera.bias + 2 * truth.camera.read_noise))
    Reconstructor(near)(frame)


def test_cli_reports_the_mismatch_with_exit_code_5(demo, tmp_path, capsys):
    import tifffile

    from latticeread.cli import main
    from latticeread.io import save_calibration

    frame, truth, cal = demo
    tifffile.imwrite(tmp_path / "f.tif", frame[None], photometric="minisblack")
    save_calibration(tmp_path / "cal.json", cal.replace(camera=CameraModel(kind="emccd", em_gain=150.0,
                                                                           counts_per_electron=0.05, bias=900.0)))
    code = main(["reconstruct", str(tmp_path / "f.tif"), "--calibration", str(tmp_path / "cal.json"),
                 "--out", str(tmp_path / "s.csv")])
    err = capsys.readouterr().err
    assert code == 5, err
    assert "another camera" in err
    assert not (tmp_path / "s.csv").exists()
