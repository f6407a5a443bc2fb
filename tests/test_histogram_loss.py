"""The histogram panel draws the atoms lost during the exposure with the occupied class.

A threshold fit with a lost-atom share (``loss_fraction``) puts those atoms between the peaks
(uniform between the empty level and a full atom); the panel's occupied curve carries them as a
plateau there and the summary names the share. The density itself integrates to one
(scipy.integrate.quad, an outside reference) and is flat at the middle between the peaks.
"""

from __future__ import annotations

import numpy as np
import pytest
from scipy import integrate, stats

from latticeread.core.classify import lost_atom_density

PEAKS = dict(empty_mean=0.0, empty_std=60.0, occupied_mean=1000.0, occupied_std=150.0)


def test_lost_atom_density_is_a_blurred_uniform_spread():
    total, _ = integrate.quad(lambda a: float(lost_atom_density(a, **PEAKS)), -1000, 2000, limit=200)
    assert total == pytest.approx(1.0, abs=1e-6)
    # flat in the middle: 1/1000 per photon less the upper edge's normal tail at 3.3 sigma (4e-4)
    assert lost_atom_density(500.0, **PEAKS) == pytest.approx(1 / 1000.0, rel=1e-3)


def test_occupied_curve_carries_the_lost_atoms_between_the_peaks(qtbot):
    from latticeread.gui.panels.histogram_panel import HistogramPanel

    panel = HistogramPanel()
    qtbot.addWidget(panel)
    rng = np.random.default_rng(3)
    amps = np.concatenate([rng.normal(0, 60, 7000), rng.normal(1000, 150, 2850), rng.uniform(0, 1000, 150)])
    panel.set_amplitudes(amps)
    result = {"threshold": 300.0, "method": "mixture", **PEAKS, "occupied_fraction": 0.3,
              "false_positive_rate": 1e-4, "false_negative_rate": 0.02, "loss_fraction": 0.05}
    panel.set_threshold_result(result)
    x, occ = panel._occ_curve.getData()
    middle = np.argmin(np.abs(x - 500.0))
    edges, _ = panel._hist_curve.getData()
    per_bin = amps.size * (edges[1] - edges[0])
    # 5 % of the 30 % occupied spread over 1000 photons; the atom peak adds nothing at 3.3 sigma
    expected = per_bin * 0.3 * (0.05 / 1000.0 + 0.95 * stats.norm.pdf(500.0, 1000.0, 150.0))
    assert occ[middle] == pytest.approx(expected, rel=0.02)
    assert "lost during the exposure 5.0 % of the atoms" in panel.summary_label.text()
    panel.set_threshold_result({**result, "loss_fraction": 0.0})  # without: the normal peak alone
    x, occ = panel._occ_curve.getData()
    alone = occ[np.argmin(np.abs(x - 500.0))]  # hidden (NaN) where it runs along the axis
    assert np.isnan(alone) or alone < expected / 10
    assert "lost during the exposure" not in panel.summary_label.text()
