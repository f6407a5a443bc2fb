"""The per-frame image-model checks reach every output: the CSV sidecar and HDF5 file of
``reconstruct`` and the run file of ``batch`` hold the same three numbers the core computes
(:func:`latticeread.core.frame_check.check_frame`), frame by frame, and the check's warning
travels with them.
"""

from __future__ import annotations

import json

import numpy as np
import pytest
import tifffile

from latticeread.cli import main
from latticeread.core.geometry import LatticeGeometry
from latticeread.core.pipeline import Reconstructor
from latticeread.core.simulate import simulate_frames
from latticeread.io.calibration_file import load_calibration
from latticeread.io.run_file import read_run

# the scenario of the command-line reconstruct tests (Airy PSF, EMCCD), with its option spellings
from test_cli_reconstruct import AIRY_ARGS, CAMERA, CAMERA_ARGS, PSF


@pytest.fixture(scope="module")
def stack(tmp_path_factory):
    folder = tmp_path_factory.mktemp("checks")
    s = 1.1 * PSF.fwhm
    geo = LatticeGeometry(a1=(s * np.cos(0.2), s * np.sin(0.2)), a2=(-s * np.sin(0.2), s * np.cos(0.2)),
                          offset=(48.2, 47.7))
    frames, _ = simulate_frames(geometry=geo, frame_shape=(96, 96), psf=PSF, camera=CAMERA, region=("disk", 8),
                                filling=0.4, photons_per_atom=1200.0, background=1.5, n_shots=3, rng=31)
    frames = np.asarray(frames)
    # frame 2: a bright patch of light away from the atoms that does not look like an atom
    yy, xx = np.mgrid[0:96, 0:96]
    frames[2] = frames[2] + (3000.0 * np.exp(-((xx - 8) ** 2 + (yy - 8) ** 2) / 8.0)).astype(frames.dtype)
    data = folder / "data"
    data.mkdir()
    path = data / "run.tif"
    tifffile.imwrite(path, frames, photometric="minisblack")
    cal = folder / "cal.json"
    assert main(["calibrate", str(path), "--out", str(cal), *AIRY_ARGS, *CAMERA_ARGS]) == 0
    rec = Reconstructor(load_calibration(cal))
    expected = [rec(f, frame_index=i).check for i, f in enumerate(frames)]
    return folder, path, cal, expected


def _numbers(check):
    return [check.outside_fraction, check.residual_ratio, check.explained_fraction]


def test_the_checks_can_fail(stack):
    *_, expected = stack
    # the patch lies among the fitted sites: the residual check sees the light no site explains
    assert expected[0].residual_ratio < 1.5 and expected[2].residual_ratio > 2.0
    assert any(w.startswith("image model") for w in expected[2].warnings)


def test_reconstruct_writes_the_checks_to_the_csv_sidecar_and_the_hdf5_file(stack):
    folder, path, cal, expected = stack
    out = folder / "sites.csv"
    assert main(["reconstruct", str(path), "-c", str(cal), "-o", str(out), "--quiet"]) in (0, 1, 2)
    side = json.loads((folder / "sites.csv.json").read_text())
    for i, check in enumerate(expected):
        got = side["frame_checks"][str(i)]
        assert [got["light_outside"], got["model_residual"], got["light_explained"]] == \
            pytest.approx(_numbers(check), rel=1e-9)
    assert any("image model" in w for w in side["frame_warnings"]["2"])
    h5 = folder / "sites.h5"
    assert main(["reconstruct", str(path), "-c", str(cal), "-o", str(h5), "--quiet"]) in (0, 1, 2)
    run = read_run(h5)
    np.testing.assert_allclose(np.c_[run.light_outside, run.model_residual, run.light_explained],
                               [_numbers(c) for c in expected], rtol=1e-9)


def test_batch_writes_the_checks_to_the_run_file(stack):
    folder, path, cal, expected = stack
    out = folder / "batch.h5"
    main(["batch", str(path.parent), "-c", str(cal), "-o", str(out), "--no-progress", "--workers", "0"])
    run = read_run(out)
    order = np.argsort(run.frame_index)
    np.testing.assert_allclose(np.c_[run.light_outside, run.model_residual, run.light_explained][order],
                               [_numbers(c) for c in expected], rtol=1e-9)
    assert any(w.startswith("image model") for w in run.warnings[order[2]])
