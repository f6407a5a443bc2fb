"""Zone PSFs: a PSF measured in zones of the field from crowded frames, blended between zones."""

import json

import numpy as np
import pytest

from latticeread.core.calibration import Calibration
from latticeread.core.camera import CameraModel
from latticeread.core.geometry import LatticeGeometry, lattice_sites
from latticeread.core.pipeline import Reconstructor
from latticeread.core.psf import gaussian_psf, render_sites
from latticeread.core.psf_zones import ZonePSFs, estimate_zone_psfs
from latticeread.errors import CalibrationError, ReconstructionError
from latticeread.io.calibration_file import calibration_from_json, calibration_to_json

SHAPE = (64, 112)
GEO = LatticeGeometry((4.0, 0.2), (-0.2, 4.0), offset=(56.3, 31.8))
SHARP, WIDE = gaussian_psf(fwhm=2.4, radius=6), gaussian_psf(fwhm=3.4, radius=6)
AVERAGE = gaussian_psf(fwhm=2.9, radius=7)


def _frames(n=3, seed=0):
    """Atoms at filling 0.4: the PSF is sharp on the left, wide on the right (a step in the middle)."""
    rng = np.random.default_rng(seed)
    sites = lattice_sites(GEO, SHAPE)
    right = sites.x > SHAPE[1] / 2
    inner = (sites.x > 6) & (sites.x < SHAPE[1] - 6) & (sites.y > 6) & (sites.y < SHAPE[0] - 6)
    frames, occ = [], []
    for _ in range(n):
        o = (rng.random(len(sites)) < 0.4) & inner
        image = 2.0 + render_sites(SHAPE, sites.x[~right], sites.y[~right], 800.0 * o[~right], SHARP) \
            + render_sites(SHAPE, sites.x[right], sites.y[right], 800.0 * o[right], WIDE)
        frames.append(rng.poisson(image).astype(float))
        occ.append(o)
    return np.stack(frames), np.stack(occ), sites, inner


@pytest.fixture(scope="module")
def measured():
    frames, occ, sites, inner = _frames()
    zones = estimate_zone_psfs(frames, geometry=GEO, psf=AVERAGE, sites=sites, site_x=sites.x[inner],
                               site_y=sites.y[inner], grid=(1, 2), min_atoms=20)
    return frames, occ, sites, inner, zones


def test_zone_widths_follow_the_field(measured):
    *_, zones = measured
    assert zones.fitted == (True, True) and zones.applied
    left, right = zones.fwhm
    # the zones blend across the step, so each lies between the two true widths, near its own
    assert 2.3 < left < 2.75 and 3.0 < right < 3.5, zones.fwhm
    assert zones.warnings == ()


def test_zone_psfs_cut_the_amplitude_error(measured):
    frames, occ, sites, inner, zones = measured
    cal = Calibration(geometry=GEO, psf=AVERAGE, camera=CameraModel(), frame_shape=SHAPE)
    errors = {}
    for name, c in (("one PSF", cal), ("zones", cal.replace(psf_zones=zones))):
        rec = Reconstructor(c, refit_phase=False)
        assert (rec.basis._mix is not None) == (name == "zones")
        a, _ = rec.basis.solve(*rec.basis.project(frames[0]))
        errors[name] = np.sqrt(np.mean((a - 800.0 * occ[0])[inner] ** 2))
    assert errors["zones"] < 0.6 * errors["one PSF"], errors


def test_zone_with_too_few_atoms_is_named(measured):
    frames, _, sites, inner, _ = measured
    zones = estimate_zone_psfs(frames[:1], geometry=GEO, psf=AVERAGE, sites=sites, site_x=sites.x[inner],
                               site_y=sites.y[inner], grid=(1, 2), min_atoms=10_000, n_passes=1)
    assert zones.fitted == (False, False) and not zones.applied
    assert len(zones.warnings) == 2
    assert "zone (row 1, column 2): only" in zones.warnings[1] and "need 10000" in zones.warnings[1]


def test_blend_weights():
    z = ZonePSFs(grid=(2, 3), bounds=(0, 30, 0, 20), psfs=(SHARP,) * 6, n_atoms=(50,) * 6, fitted=(True,) * 6,
                 fwhm=(2.4,) * 6)
    w = z.weights([0, 5, 10, 15, 29, 100], [0, 5, 5, 10, 15, -4])
    assert np.allclose(w.sum(axis=1), 1.0)
    assert w[1, 0] == pytest.approx(1.0)  # at the first zone's centre
    assert w[2, 0] == pytest.approx(0.5) and w[2, 1] == pytest.approx(0.5)  # between two centres
    assert w[5, 2] == pytest.approx(1.0)  # outside: the nearest corner zone
    with pytest.raises(ValueError, match="same stamp radius"):
        ZonePSFs(grid=(1, 2), bounds=(0, 1, 0, 1), psfs=(SHARP, AVERAGE), n_atoms=(1, 1), fitted=(True, True),
                 fwhm=(1, 1))


def test_calibration_file_keeps_the_zones(measured):
    *_, zones = measured
    cal = Calibration(geometry=GEO, psf=AVERAGE, camera=CameraModel(), frame_shape=SHAPE, psf_zones=zones)
    back = calibration_from_json(calibration_to_json(cal))
    assert back.psf_zones.grid == (1, 2) and back.psf_zones.fwhm == pytest.approx(zones.fwhm)
    assert np.allclose(back.psf_zones.psfs[1].kernel, zones.psfs[1].kernel)
    assert back == cal
    # a file written before zone PSFs existed loads with one PSF everywhere
    data = json.loads(calibration_to_json(cal))
    del data["psf_zones"]
    assert calibration_from_json(json.dumps(data)).psf_zones is None
    data["psf_zones"] = {"grid": [1, 2], "bounds": [0, 1, 0, 1], "psfs": [], "n_atoms": [], "fitted": [], "fwhm": []}
    with pytest.raises(CalibrationError, match="zone PSFs"):
        calibration_from_json(json.dumps(data))


def test_bad_grid_and_no_sites():
    frames, _, sites, inner = _frames(1)
    with pytest.raises(ReconstructionError, match="zone grid must be two positive integers"):
        estimate_zone_psfs(frames, geometry=GEO, psf=AVERAGE, sites=sites, site_x=sites.x, site_y=sites.y,
                           grid=(0, 2))
    with pytest.raises(ReconstructionError, match="no analysed site"):
        estimate_zone_psfs(frames, geometry=GEO, psf=AVERAGE, sites=sites, site_x=[], site_y=[])
