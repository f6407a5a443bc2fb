"""The analysis service: pooled classification of run records, the calibration merge, the layers.

Checks against common practice, no source: a threshold pooled over a stack does not depend
on the order of its frames; calibrating from frames keeps what frames cannot measure.
"""

from __future__ import annotations

import numpy as np
import pytest

from latticeread.analysis.service import ShotFailure, classify_records, merge_calibration, shot_record
from latticeread.core.calibration import Calibration, ThresholdPolicy
from latticeread.core.camera import CameraModel
from latticeread.core.geometry import LatticeGeometry
from latticeread.core.pipeline import Reconstructor, pooled_threshold, reconstruct_stack
from latticeread.core.psf import airy_psf, gaussian_psf
from latticeread.io.run_file import ShotKey

GEOMETRY = LatticeGeometry(a1=(0.3, 4.0), a2=(4.0, -0.3), offset=(48.2, 47.7))
PSF = gaussian_psf(fwhm=3.0)
CAMERA = CameraModel(kind="scmos", counts_per_electron=0.5, bias=100.0, read_noise=1.0, quantum_efficiency=0.8)
SHAPE = (96, 96)


@pytest.fixture(scope="module")
def frames():
    from latticeread.core.simulate import simulate_frames

    stack, _ = simulate_frames(geometry=GEOMETRY, frame_shape=SHAPE, psf=PSF, camera=CAMERA, region=("disk", 9),
                               filling=0.4, photons_per_atom=800.0, n_shots=3, rng=2)
    return stack


def _cal(**changes):
    return Calibration(geometry=GEOMETRY, psf=PSF, camera=CAMERA, frame_shape=SHAPE, **changes)


def test_pooled_threshold_does_not_depend_on_the_order_of_the_frames():
    rng = np.random.default_rng(1)
    amps = np.concatenate([rng.normal(0, 40, 3000), rng.normal(700, 80, 2000), [np.nan]])
    a = pooled_threshold(amps, calibration=_cal())
    b = pooled_threshold(amps[::-1].copy(), calibration=_cal())
    assert a.threshold == b.threshold and a.false_negative_rate == b.false_negative_rate
    assert 200 < a.threshold < 500


def test_run_records_of_a_file_are_classified_with_the_threshold_of_the_stack(frames):
    cal = _cal()
    stack_results = list(reconstruct_stack(frames, cal))
    assert len({r.threshold for r in stack_results}) == 1  # pooled over the stack
    rec = Reconstructor(cal)
    # what a batch worker sends back: each shot classified on its own histogram
    records = [shot_record(ShotKey("/data/a.tif", "h", i), rec(frame, frame_index=i))
               for i, frame in enumerate(frames)]
    assert len({r.threshold for r in records}) > 1
    failure = ShotFailure(ShotKey("/data/b.tif", "h", 0), "FrameError", "broken")
    pooled = classify_records(records + [failure], cal)
    assert pooled[-1] is failure
    for result, record in zip(stack_results, pooled[:-1]):
        np.testing.assert_array_equal(record.occupation, result.occupation_matrix(fill=255))
        assert record.threshold == result.threshold
    # a fixed threshold leaves the records as they were
    fixed = _cal().with_threshold_policy(ThresholdPolicy("fixed", "mixture", 400.0))
    assert classify_records(records, fixed) == records


def test_calibrating_from_frames_keeps_the_pixel_size_and_optics():
    base = _cal(pixel_size_nm=160.0).replace(psf=airy_psf(wavelength_nm=671.0, numerical_aperture=0.8,
                                                           pixel_size_nm=160.0))
    new = _cal()  # what calibrate() gives without the pixel size: an estimated PSF, no optics
    merged = merge_calibration(new, base=base)
    assert merged.pixel_size_nm == 160.0
    assert merged.psf.params["wavelength_nm"] == 671.0 and merged.psf.params["numerical_aperture"] == 0.8
    assert merged.psf.fwhm == new.psf.fwhm and merged.psf.kind == new.psf.kind  # measured PSF kept
    assert merged.notes["kept_from_previous"] == ["pixel_size_nm", "psf.wavelength_nm", "psf.numerical_aperture",
                                                  "psf.pixel_size_nm"]
    assert merge_calibration(new, base=None) is new
    given = _cal(pixel_size_nm=150.0)
    assert merge_calibration(given, base=base).pixel_size_nm == 150.0  # a value the user gave now wins


def test_calibrating_again_keeps_the_drawn_region_and_moves_excluded_sites_with_the_lattice():
    from latticeread.core.geometry import LatticeGeometry
    from latticeread.core.region import RegionShape, SiteRegion

    region = SiteRegion(include=(RegionShape.disk((40, 40), 20),), excluded_sites=((1, 2), (-3, 0)))
    base = _cal().with_options(region=region)
    g = base.geometry
    # the new calibration numbers the sites from another origin: old site (r, c) is new (r - 2, c + 1)
    shifted = LatticeGeometry(a1=g.a1, a2=g.a2, offset=tuple(np.add(g.offset, 2 * np.asarray(g.a1) - np.asarray(g.a2))))
    merged = merge_calibration(_cal().replace(geometry=shifted), base=base)
    assert merged.options.region.include == region.include
    assert merged.options.region.excluded_sites == ((-5, 1), (-1, 3))
    assert "reconstruction.region" in merged.notes["kept_from_previous"]
    assert merge_calibration(_cal(), base=_cal()).options.region.is_everything


def test_window_calibration_keeps_the_pixel_size_of_the_loaded_calibration(frames, tmp_path):
    from latticeread.session import Session

    s = Session()
    s.set_frames(frames.copy())
    s.set_calibration(_cal(pixel_size_nm=160.0), record=False)
    assert s.settings["pixel_size_nm"] is None
    cal = s.calibrate_job()()
    assert cal.pixel_size_nm == 160.0
    s.set_calibration(cal)
    s.reconstruct()
    s.finish_reconstruction()
    out = tmp_path / "occ.h5"
    s.export_occupation_hdf5(out)
    import h5py

    with h5py.File(out, "r") as h5:
        text = " ".join(str(v) for v in h5.attrs.values())
    assert '"pixel_size_nm": 160.0' in text


def _imports(module: str) -> set[str]:
    """Modules of latticeread imported anywhere in ``module``'s source (also inside functions)."""
    import ast
    import importlib.util

    tree = ast.parse(open(importlib.util.find_spec(module).origin, encoding="utf-8").read())
    found = set()
    for node in ast.walk(tree):
        if isinstance(node, ast.ImportFrom) and node.module and node.module.startswith("latticeread"):
            found.add(node.module)
        elif isinstance(node, ast.Import):
            found.update(a.name for a in node.names if a.name.startswith("latticeread"))
    return found


def test_no_import_cycle_between_batch_and_cluster_and_the_service_sits_below_runs():
    assert "latticeread.runs.batch" not in _imports("latticeread.runs.cluster")
    for module in ("latticeread.analysis.service", "latticeread.analysis.executor"):
        # runs.stopping (Ctrl-C and parent-death helpers, no latticeread imports) is the one exception,
        # imported inside functions only
        above = {m for m in _imports(module) if m.startswith(("latticeread.runs", "latticeread.session",
                                                                 "latticeread.gui", "latticeread.commands"))}
        above -= {"latticeread.runs.stopping"}
        assert not above, f"{module} imports {above}"
