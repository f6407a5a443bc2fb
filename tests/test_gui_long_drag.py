"""Threshold drag with a stack already reconstructed: every number shown stays exact.

After each drag step, after the release and after undo/redo, the pooled counts in the
histogram panel and the mean-occupation matrix in the occupation view must equal a direct
recount with numpy over every stored amplitude: ``amplitude > threshold`` (strictly above,
the rule of latticeread.core.classify; common practice, no source). Frames come from the
project's forward model (latticeread.core.simulate), potassium-39-like toy scenario.
"""

from __future__ import annotations

import numpy as np
import pytest

pytest.importorskip("pytestqt")

from latticeread.core.calibration import Calibration  # noqa: E402
from latticeread.core.camera import CameraModel  # noqa: E402
from latticeread.core.geometry import LatticeGeometry  # noqa: E402
from latticeread.core.psf import gaussian_psf  # noqa: E402
from latticeread.gui.app import make_app  # noqa: E402
from latticeread.gui.main_window import MainWindow  # noqa: E402
from latticeread.gui.settings import AppSettings  # noqa: E402

GEOMETRY = LatticeGeometry(a1=(0.2, 4.0), a2=(4.0, -0.2), offset=(32.3, 31.6))
PSF = gaussian_psf(fwhm=3.0)
CAMERA = CameraModel(kind="scmos", counts_per_electron=0.5, bias=100.0, read_noise=1.0, quantum_efficiency=0.8)
SHAPE = (64, 64)
N_FRAMES = 30


@pytest.fixture(scope="module")
def stack():
    from latticeread.core.simulate import simulate_frames

    frames, _truth = simulate_frames(geometry=GEOMETRY, frame_shape=SHAPE, psf=PSF, camera=CAMERA,
                                     region=("disk", 6), filling=0.4, photons_per_atom=800.0,
                                     brightness_spread=0.2, n_shots=N_FRAMES, rng=11)
    return frames


def _expected(session):
    """(occupied, empty, mean occupation matrix) recounted with numpy from the stored amplitudes."""
    amps = np.stack([session.amplitudes(i) for i in range(session.n_frames)])
    occ = amps > session.threshold
    finite = np.isfinite(amps)
    mean = session.sites.to_matrix(occ.sum(axis=0) / finite.sum(axis=0), fill=np.nan, dtype=float)
    return int(occ.sum()), int(finite.sum() - occ.sum()), mean


def _check_shown(window):
    s = window.session
    occupied, empty, mean = _expected(s)
    assert f"occupied {occupied} · empty {empty} ·" in window.histogram_panel.counts_label.text()
    np.testing.assert_array_equal(window.occupation_view._mean, mean)
    assert window.occupation_view.mean_plot.titleLabel.text == f"Mean over {N_FRAMES} frames"
    res = s.result()  # the shown frame's matrix follows the same threshold
    assert f"{int(np.count_nonzero(s.amplitudes() > s.threshold))} atoms" in window.occupation_view.summary.text()
    assert np.array_equal(res.occupied, (s.amplitudes() > s.threshold).astype(np.uint8))
    return occupied


def _shows_exact_numbers(window) -> bool:
    try:
        _check_shown(window)
    except AssertionError:
        return False
    return True


def test_drag_over_a_reconstructed_stack_shows_exact_pooled_numbers(qtbot, tmp_path, stack):
    make_app()
    w = MainWindow(settings=AppSettings(tmp_path / "s.ini"), synchronous=True, offer_restore=False,
                   autosave_interval_s=0)
    qtbot.addWidget(w)
    w.show()
    qtbot.waitExposed(w)
    s = w.session
    s.set_frames(stack.copy())
    s.set_calibration(Calibration(geometry=GEOMETRY, psf=PSF, camera=CAMERA, frame_shape=SHAPE))
    s.reconstruct()
    s.finish_reconstruction()
    s.set_index(7)
    w.flush()
    assert s.done.all() and s.calibration.threshold is None
    automatic = _check_shown(w)

    line = w.histogram_panel.threshold_line
    shown = []
    for t in np.linspace(s.threshold, 700.0, 8)[1:]:  # into the occupied peak: atoms turn "empty"
        line.setValue(float(t))  # the same signal path as a mouse drag
        # the coalescing timer fires and the views redraw (seconds allowed on a loaded machine)
        qtbot.waitUntil(lambda: _shows_exact_numbers(w), timeout=10000)
        assert s.calibration.threshold == pytest.approx(t)
        shown.append(_check_shown(w))
    line.sigPositionChangeFinished.emit(line)  # release
    w.flush()
    dragged = _check_shown(w)
    assert shown[-1] == dragged < automatic
    assert len(set(shown)) > 1  # the numbers really moved during the drag

    w.actions_by_name["undo"].trigger()  # one drag = one undo step
    w.flush()
    assert s.calibration.threshold is None
    assert _check_shown(w) == automatic
    w.actions_by_name["redo"].trigger()
    w.flush()
    assert s.calibration.threshold == pytest.approx(700.0)
    assert _check_shown(w) == dragged
