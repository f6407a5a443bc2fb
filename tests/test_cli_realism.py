"""`latticeread calibrate --psf-zones N --background MODEL` reach the calibration and its printout."""

from pathlib import Path

import pytest

import latticeread.core.pipeline as pipeline
from latticeread.cli import main
from latticeread.core.calibration import Calibration
from latticeread.core.geometry import LatticeGeometry
from latticeread.core.psf import gaussian_psf

SAMPLE = Path(__file__).resolve().parents[1] / "sample_data" / "demo_realistic.tif"


def test_options_reach_calibrate_and_are_reported(tmp_path, monkeypatch, capsys):
    seen = {}

    def fake_calibrate(stack, **kwargs):
        seen.update(kwargs)
        return Calibration(geometry=LatticeGeometry((3.3, 0.0), (0.0, 3.3), offset=(128.0, 128.0)),
                           psf=gaussian_psf(fwhm=2.7), frame_shape=(256, 256), threshold=400.0,
                           notes={"psf_zones": "zone PSFs 3x3: FWHM 2.70-3.10 pixels, applied",
                                  "warnings": ["PSF zone (row 1, column 1): only 3 atoms in 3 frame(s) (need 40); it "
                                               "uses the PSF of the whole region"]})

    monkeypatch.setattr(pipeline, "calibrate", fake_calibrate)
    code = main(["calibrate", str(SAMPLE), "-o", str(tmp_path / "c.json"), "--psf-zones", "3",
                 "--background", "auto"])
    assert code == 0
    assert seen["psf_zones"] == 3 and seen["background"] == "auto"
    out = capsys.readouterr().out
    assert "psf zones: zone PSFs 3x3" in out and "warning: PSF zone (row 1, column 1): only 3 atoms" in out
    with pytest.raises(SystemExit):
        main(["calibrate", str(SAMPLE), "-o", str(tmp_path / "d.json"), "--background", "wavy"])


def test_realistic_demo_has_its_truth():
    import tifffile

    frames = tifffile.imread(SAMPLE)
    assert frames.shape == (4, 256, 256)
    assert SAMPLE.with_suffix(".truth.h5").stat().st_size < 1_000_000
