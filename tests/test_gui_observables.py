"""Observables panel: what it draws, its PNG/SVG export, and live updates during a threshold drag.

The numbers drawn must be those of latticeread.core.observables (checked against outside
references in tests/test_observables.py); after a drag the panel must show the observables of
a direct numpy recount of ``amplitude > threshold`` (the classification rule of
latticeread.core.classify; common practice, no source). Frames come from the project's forward
model, an invented toy scenario.
"""

from __future__ import annotations

import numpy as np
import pytest

pytest.importorskip("pytestqt")

from latticeread.core import observables as ob  # noqa: E402
from latticeread.gui.app import make_app  # noqa: E402


def _checkerboard_result():
    ii, jj = np.indices((10, 12))
    cb = ((ii + jj) % 2 == 0).astype(np.uint8)
    occ = np.stack([cb if k % 2 == 0 else 1 - cb for k in range(8)])
    occ[:, 0, :3] = 255
    return ob.compute_observables(occ, n_bootstrap=20, rng=0, rates=ob.MisreadRates(0.02, 0.03, 0.01))


def test_panel_draws_the_result_and_exports(qtbot, tmp_path):
    from latticeread.gui.panels import ObservablesPanel

    make_app()
    panel = ObservablesPanel()
    qtbot.addWidget(panel)
    panel.resize(900, 700)
    panel.show()
    qtbot.waitExposed(panel)
    assert not panel.png_button.isEnabled()
    obs = _checkerboard_result()
    panel.set_observables(obs, source="test")
    np.testing.assert_array_equal(panel.density_image.image, obs.density.mean)
    k = obs.correlator.map.shape[0] // 2
    shown = panel.corr_image.image / panel.corr_scale
    assert np.isnan(shown[k, k])
    np.testing.assert_allclose(np.delete(shown.ravel(), k * shown.shape[1] + k),
                                  np.delete(obs.correlator.map.ravel(), k * shown.shape[1] + k))
    np.testing.assert_array_equal(panel.order_bars.opts["height"], obs.order.histogram)
    text = panel.summary_label.text()
    assert "8 shots" in text and f"of {117}" in text and "S(π,π) 117" in text
    assert "only 8 shots" in panel.warnings_label.text() and panel.warnings_label.isVisibleTo(panel)
    # profile choice: along a2 shows the band profile of the core
    panel.profile_box.setCurrentIndex(2)
    x, y = panel.profile_curve.getData()
    ok = np.isfinite(obs.line_a2.mean)
    np.testing.assert_allclose(y, obs.line_a2.mean[ok])
    # corrected view
    assert panel.corrected_box.isEnabled()
    panel.corrected_box.setChecked(True)
    np.testing.assert_allclose(panel.density_image.image[obs.density.region], obs.corrected.density[obs.density.region])
    png = panel.save_figure(tmp_path / "obs.png")
    svg = panel.save_figure(tmp_path / "obs.svg")
    assert png.read_bytes()[:8] == b"\x89PNG\r\n\x1a\n" and png.stat().st_size > 5000
    text = svg.read_text()
    assert text.lstrip().startswith("<?xml") and "<svg" in text and "latticeread observables" in text
    panel.grab().save(str(tmp_path / "panel.png"))
    panel.set_message("no observables: test")
    assert panel.summary_label.text() == "no observables: test" and panel.observables is None
    assert not panel.corrected_box.isEnabled()


def test_export_buttons_emit(qtbot):
    from latticeread.gui.panels import ObservablesPanel

    make_app()
    panel = ObservablesPanel()
    qtbot.addWidget(panel)
    panel.set_observables(_checkerboard_result())
    with qtbot.waitSignal(panel.exportRequested) as sig:
        panel.svg_button.click()
    assert sig.args == ["svg"]


# --- live in the window ---------------------------------------------------------------------

@pytest.fixture(scope="module")
def hundred_shots():
    from latticeread.core.calibration import Calibration
    from latticeread.core.camera import CameraModel
    from latticeread.core.geometry import LatticeGeometry
    from latticeread.core.psf import gaussian_psf
    from latticeread.core.simulate import simulate_frames

    geometry = LatticeGeometry(a1=(0.2, 4.0), a2=(4.0, -0.2), offset=(20.3, 19.6))
    psf = gaussian_psf(fwhm=3.0)
    camera = CameraModel(kind="scmos", counts_per_electron=0.5, bias=100.0, read_noise=1.0, quantum_efficiency=0.8)
    frames, _ = simulate_frames(geometry=geometry, frame_shape=(40, 40), psf=psf, camera=camera,
                                region=("disk", 4), pattern="checkerboard", filling=0.9, photons_per_atom=800.0,
                                brightness_spread=0.2, n_shots=100, rng=5)
    return frames, Calibration(geometry=geometry, psf=psf, camera=camera, frame_shape=(40, 40))


def test_panel_follows_a_threshold_drag_on_100_shots(qtbot, tmp_path, hundred_shots):
    from latticeread.gui.main_window import MainWindow
    from latticeread.gui.settings import AppSettings

    frames, cal = hundred_shots
    make_app()
    w = MainWindow(settings=AppSettings(tmp_path / "s.ini"), synchronous=True, offer_restore=False,
                   autosave_interval_s=0)
    qtbot.addWidget(w)
    w.resize(1400, 900)
    w.show()
    qtbot.waitExposed(w)
    s = w.session
    s.set_frames(frames.copy())
    s.set_calibration(cal)
    s.reconstruct()
    s.finish_reconstruction()
    w.flush()
    feed, panel = w.observables_feed, w.observables_panel
    assert panel.observables is None                       # hidden behind the occupation tab: not computed
    w.docks["observables_panel"].raise_()
    qtbot.waitUntil(lambda: panel.observables is not None, timeout=5000)
    first = panel.observables
    assert first.density.n_shots == 100
    # the checkerboard core is seen: local order near 1 inside, S(pi, pi) far above 1 (no order)
    assert np.nanmax(first.order.local) > 0.8 and first.order.s_pi_pi > 5
    line = w.histogram_panel.threshold_line
    before = feed.n_computed
    for t in np.linspace(float(s.threshold), 650.0, 6)[1:]:
        line.setValue(float(t))                             # the same signal path as a mouse drag
        qtbot.wait(200)                                     # longer than the throttle: one update per step
    assert feed.n_computed >= before + 1                    # it updated while dragging (more on an idle machine)
    line.sigPositionChangeFinished.emit(line)
    w.flush()
    qtbot.wait(300)
    qtbot.waitUntil(lambda: not feed._running and not feed._stale, timeout=5000)
    occ = s.occupation_stack()
    amps = np.stack([s.amplitudes(i) for i in range(s.n_frames)])
    assert int((occ == 1).sum()) == int((amps > s.threshold).sum())
    shown = panel.observables
    np.testing.assert_allclose(shown.density.mean, ob.density_map(occ).mean, equal_nan=True)
    assert shown.density.filling < first.density.filling   # atoms turned "empty" above the threshold
    w.grab().save(str(tmp_path / "window.png"))
