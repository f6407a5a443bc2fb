"""PSF width fitted on dense frames (:mod:`latticeread.core.psf_width`) and the calibrate fallback.

Ground truth: the project's forward model (:mod:`latticeread.core.simulate`), filling 0.45, where
no isolated atoms exist. Outside check: the Airy FWHM 0.514 lambda/NA (Born & Wolf, *Principles
of Optics*, section 8.5.2; the factor 0.514 quoted from memory), computed here from the demo's
wavelength, NA and pixel size rather than taken from the project's PSF model; the Gaussian case
checks against the FWHM given to the simulation.
"""

from __future__ import annotations

import json
from pathlib import Path

import numpy as np
import pytest

from latticeread.cli import main
from latticeread.core.pipeline import calibrate
from latticeread.core.psf import gaussian_psf
from latticeread.core.psf_width import WIDTH_FIT_SOURCE, fit_psf_width
from latticeread.core.simulate import demo_scenario, simulate_frames
from latticeread.errors import FrameError, ReconstructionError

# the invented demo optics of demo_scenario(): 589 nm fluorescence, NA 0.70, 160 nm pixels
WAVELENGTH_NM, NA, PIXEL_NM = 589.0, 0.70, 160.0
BORN_WOLF_FWHM = 0.514 * WAVELENGTH_NM / NA / PIXEL_NM  # pixels
DEMO_SQUARE = Path(__file__).resolve().parent.parent / "sample_data" / "demo_square.tif"


def _dense_frames(psf=None, *, shots=3, seed=0):
    kw = demo_scenario("square")
    kw.pop("pixel_size_nm")
    if psf is not None:
        kw["psf"] = psf
    frames, _ = simulate_frames(**kw, n_shots=shots, rng=seed)
    return kw["camera"].counts_to_photons(frames), kw


@pytest.fixture(scope="module")
def airy_frames():
    return _dense_frames(shots=1, seed=11)


def test_demo_optics_are_the_ones_this_test_assumes():
    psf = demo_scenario("square")["psf"]
    assert psf.params["wavelength_nm"] == WAVELENGTH_NM
    assert psf.params["numerical_aperture"] == NA
    assert psf.params["pixel_size_nm"] == PIXEL_NM


def test_cli_calibrate_on_the_dense_demo_fits_the_born_wolf_airy_width(tmp_path):
    """The bundled demo: forward model of demo_scenario("square"), filling 0.45, no isolated atoms."""
    out = tmp_path / "cal.json"
    assert main(["calibrate", str(DEMO_SQUARE), "--out", str(out)]) == 0
    data = json.loads(out.read_text())
    psf = data["psf"]
    assert psf["params"]["source"] == WIDTH_FIT_SOURCE
    assert psf["params"]["n_frames"] == 2
    assert psf["kind"] == "airy"  # the right shape wins over the Gaussian
    assert psf["params"]["residual_airy"] < psf["params"]["residual_gaussian"]
    assert abs(psf["fwhm"] / BORN_WOLF_FWHM - 1) < 0.03
    assert abs(psf["params"]["lambda_over_na"] / (WAVELENGTH_NM / NA / PIXEL_NM) - 1) < 0.03
    assert "not measured from isolated atoms" in psf["params"]["warnings"][0]
    notes = data["notes"]
    assert "isolated atoms" in notes["psf_width_fit"]["why"]
    assert any("width fit on dense frames" in w for w in notes["warnings"])


def test_gaussian_width_on_dense_frames_is_recovered():
    photons, kw = _dense_frames(gaussian_psf(fwhm=2.4), shots=1, seed=12)
    fit = fit_psf_width(photons, geometry=kw["geometry"])
    assert fit.kind == "gaussian"
    assert fit.residual_by_kind["gaussian"] < fit.residual_by_kind["airy"]
    assert abs(fit.fwhm / 2.4 - 1) < 0.03
    assert fit.psf.params["sigma"] == pytest.approx(fit.fwhm / (2 * np.sqrt(2 * np.log(2))))
    assert fit.psf.params["source"] == WIDTH_FIT_SOURCE
    assert fit.signal_ratio > 10


def test_frames_without_atoms_keep_the_error_and_suggest_the_optics():
    kw = demo_scenario("square")
    rng = np.random.default_rng(3)
    noise = rng.poisson(5.0, size=(2, 128, 128)).astype(float)
    with pytest.raises(ReconstructionError, match=r"--psf airy --wavelength-nm --na --pixel-size-nm"):
        calibrate(noise, geometry=kw["geometry"].with_offset((63.2, 64.1)))


def test_no_atoms_message():
    kw = demo_scenario("square")
    noise = np.random.default_rng(4).poisson(5.0, size=(1, 96, 96)).astype(float)
    with pytest.raises(ReconstructionError, match="no atoms to fit the PSF width on"):
        fit_psf_width(noise, geometry=kw["geometry"].with_offset((47.0, 48.0)), kinds=("gaussian",))


def test_edge_of_range_message(airy_frames):
    photons, kw = airy_frames
    with pytest.raises(ReconstructionError, match="ran to the edge of its range"):
        fit_psf_width(photons[:1, :96, :96], geometry=kw["geometry"].with_offset(
            (kw["geometry"].offset[0] - 80, kw["geometry"].offset[1] - 80)), kinds=("gaussian",),
            fwhm_bounds=(1.0, 1.6))


def test_bad_range_message(airy_frames):
    photons, kw = airy_frames
    with pytest.raises(ReconstructionError, match="two increasing positive numbers"):
        fit_psf_width(photons, geometry=kw["geometry"], fwhm_bounds=(3.0, 2.0))


def test_unknown_shape_message(airy_frames):
    photons, kw = airy_frames
    with pytest.raises(ReconstructionError, match="unknown PSF shape"):
        fit_psf_width(photons, geometry=kw["geometry"], kinds=("lorentzian",))


def test_nonfinite_message(airy_frames):
    photons, kw = airy_frames
    bad = photons[:1].copy()
    bad[0, 5, 5] = np.nan
    with pytest.raises(FrameError, match="NaN or infinite"):
        fit_psf_width(bad, geometry=kw["geometry"])


def test_shape_message(airy_frames):
    _, kw = airy_frames
    with pytest.raises(FrameError, match="expected a frame"):
        fit_psf_width(np.zeros((2, 2, 8, 8)), geometry=kw["geometry"])


def test_too_few_sites_message(airy_frames):
    _, kw = airy_frames
    with pytest.raises(ReconstructionError, match="too few to fit the PSF width"):
        fit_psf_width(np.ones((4, 4)), geometry=kw["geometry"].with_offset((1.0, 1.0)))
