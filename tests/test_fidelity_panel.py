"""Fidelity panel: readable misread rates and the meaning of loss and hopping per image.

Outside check: none needed beyond arithmetic; the "< 1e-6 %" cut-off is the project's
display choice (common practice, no source: a rate that small means no misread in any
realistic number of images).
"""

from __future__ import annotations

import numpy as np
import pytest

from latticeread.gui.panels import rate_pct
from latticeread.gui.panels.fidelity_panel import MEANING, FidelityPanel


@pytest.mark.parametrize("rate, text", [
    (1.3e-227, "< 1e-6 %"),
    (0.0, "0 %"),
    (2.5e-9, "< 1e-6 %"),
    (3.4e-6, "0.00034 %"),
    (0.0012, "0.12 %"),
    (0.0345, "3.45 %"),
    (float("nan"), "-"),
    (None, "-"),
])
def test_rates_are_readable(rate, text):
    assert rate_pct(rate) == text


def _report(**fp):
    est = {"value": 0.012, "low": 0.008, "high": 0.016}
    return {"loss": est, "hop": {"value": 0.003, "low": 0.001, "high": 0.005},
            "false_positive_rate": {"value": 1.3e-227, "low": 0.0, "high": 2e-12},
            "false_negative_rate": {"value": 0.0021, "low": 0.0018, "high": 0.0024},
            "n_atom_images": 834, "n_shots": 1, "n_images": 2,
            "settings": {"confidence": 0.95, "interval": "bootstrap over blocks of 4x4 sites (169 blocks)",
                         "peak_shape": "skewed"}, **fp}


def test_panel_shows_tiny_rates_and_says_what_it_counts(qtbot, tmp_path):
    panel = FidelityPanel()
    qtbot.addWidget(panel)
    panel.resize(560, 620)
    panel.show()
    qtbot.waitExposed(panel)
    panel.set_report(_report())
    assert panel.table.item(3, 0).text() == "< 1e-6 %"
    assert panel.table.item(3, 1).text() == "0 – < 1e-6 %"
    assert panel.table.item(4, 0).text() == "0.21 %"
    assert panel.table.item(0, 0).text() == "1.20 %"
    assert "e-2" not in "".join(panel.table.item(r, c).text() for r in range(7) for c in range(2))
    assert panel.meaning_label.text() == MEANING
    assert "Loss per image" in MEANING and "Hopping per image" in MEANING and "pair loss" in MEANING
    summary = panel.summary_label.text()
    assert "blocks of 4x4 sites" in summary and "skewed histogram peaks" in summary
    assert all(panel.table.verticalHeaderItem(r).toolTip() for r in range(7))
    path = tmp_path / "fidelity_panel.png"
    assert panel.grab().save(str(path))
    assert np.asarray(panel.grab().toImage().size().toTuple()).min() > 100
