"""The window's route keeps each frame's offset method and 1-sigma, as `reconstruct` does.

The session (the window's state) stores per frame how its lattice offset was found and the
offset's 1-sigma, passes them to every FrameResult it builds (so exports from the window carry
them), keeps them through a saved and reopened session, and the geometry panel's drift plot
draws them as error bars. Reference: :func:`latticeread.core.pipeline.reconstruct_stack` on the
same frames (the path of `reconstruct`).
"""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pytest
import tifffile

from latticeread.core.pipeline import reconstruct_stack
from latticeread.io.calibration_file import load_calibration

SAMPLE = Path(__file__).resolve().parents[1] / "sample_data"


@pytest.fixture(scope="module")
def demo(tmp_path_factory):
    """The first four frames of the square demo as a stack file, its calibration, and reconstruct's results."""
    frames = tifffile.imread(SAMPLE / "demo_square.tif")[:4]
    path = tmp_path_factory.mktemp("offsets") / "four.tif"
    tifffile.imwrite(path, frames, photometric="minisblack")
    cal = load_calibration(SAMPLE / "demo_square.calibration.json")
    return path, cal, list(reconstruct_stack(frames, cal))


def _session(frames, cal, processes=0):
    from latticeread.session import Session

    s = Session()
    s.open_frames(frames)
    s.set_calibration(cal, record=False)
    for batch in s.reconstruct_job(batch_size=2, processes=processes)():
        s.store_batch(batch)
    s.finish_reconstruction()
    return s


@pytest.mark.parametrize("processes", [0, 1])
def test_session_results_carry_the_offset_method_and_sigma_of_reconstruct(demo, processes):
    frames, cal, reference = demo
    s = _session(frames, cal, processes=processes)
    for i, ref in enumerate(reference):
        got = s.result(i)
        assert ref.offset_method == "model" and np.all(np.isfinite(ref.offset_sigma))
        assert got.offset_method == ref.offset_method
        np.testing.assert_allclose(got.offset_sigma, ref.offset_sigma, rtol=1e-9)


def test_a_reopened_session_keeps_them(demo, tmp_path):
    from latticeread.session import Session

    frames, cal, reference = demo
    s = _session(frames, cal)
    again = Session.open(s.save(tmp_path / "offsets.json"))
    for i, ref in enumerate(reference):
        got = again.result(i)
        assert got.offset_method == ref.offset_method
        np.testing.assert_allclose(got.offset_sigma, ref.offset_sigma, rtol=1e-9)


def test_drift_plot_draws_the_sigma_as_error_bars(qtbot):
    from latticeread.gui.panels.geometry_panel import GeometryPanel

    panel = GeometryPanel()
    qtbot.addWidget(panel)
    offsets = np.array([[10.0, 20.0], [10.1, 20.2], [10.3, 20.1]])
    sigma = np.array([[0.01, 0.02], [np.nan, np.nan], [0.03, 0.01]])
    panel.set_drift([0, 1, 2], offsets, units="px", sigma=sigma, methods=("model", "", "model"))
    bar_x = panel._drift_bars[0].opts
    assert list(bar_x["x"]) == [0.0, 2.0]  # the frame without a 1-sigma has no bar
    np.testing.assert_allclose(bar_x["height"], [0.02, 0.06])
    assert "offset from model (2), not recorded (1)" in panel.drift_label.text()
    with pytest.raises(ValueError, match="3 frame indices but 2 offset sigmas"):
        panel.set_drift([0, 1, 2], offsets, sigma=sigma[:2])
