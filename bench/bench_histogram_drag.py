"""Updates per second of the histogram panel while the threshold line is dragged.

Scenario: 10,000 site amplitudes (photons; 30 % filling, empty 0 +- 60, occupied 1000 +- 150),
threshold chosen by the two-component fit. Every drag step does what the main window does:
``ThresholdResult.with_threshold`` + ``classify`` on all sites, then ``set_threshold_result``
and ``set_counts`` on the panel, then a synchronous repaint of the panel (offscreen raster).

Two ways of dragging are timed:
* ``setValue``: the line is moved programmatically through the same signal path a drag uses;
* ``mouse``: raw press / move / release events sent to the plot viewport (as a user's drag).

Also timed: ``set_amplitudes`` (re-histogram) for 10^4 to 4x10^6 sites.

Run by hand: ``QT_QPA_PLATFORM=offscreen .venv/bin/python bench/bench_histogram_drag.py``.
The target of the issue is >= 20 updates/s.
"""

import os

os.environ.setdefault("QT_QPA_PLATFORM", "offscreen")

import time

import numpy as np
import pyqtgraph as pg
from PySide6 import QtCore, QtGui, QtWidgets

from latticeread.core.classify import classify, select_threshold
from latticeread.gui.panels import HistogramPanel

N_SITES = 10_000
N_STEPS = 200


def main():
    app = QtWidgets.QApplication.instance() or QtWidgets.QApplication([])
    pg.setConfigOption("mouseRateLimit", 0)  # count every move (pyqtgraph drops moves < 10 ms apart)
    rng = np.random.default_rng(0)
    n_occ = int(0.3 * N_SITES)
    amps = np.concatenate([rng.normal(0, 60, N_SITES - n_occ), rng.normal(1000, 150, n_occ)])
    result = select_threshold(amps, method="mixture")

    panel = HistogramPanel()
    panel.resize(800, 500)
    panel.show()
    app.processEvents()
    t0 = time.perf_counter()
    panel.set_amplitudes(amps)
    panel.set_threshold_result(result)
    app.processEvents()
    print(f"set_amplitudes + first draw ({N_SITES} sites): {1e3 * (time.perf_counter() - t0):.1f} ms")

    state = {"n": 0, "classify_s": 0.0}

    def on_drag(t):
        c0 = time.perf_counter()
        r = result.with_threshold(t)
        occupied, p = classify(amps, r)
        n_unc = int(np.count_nonzero((p > 0.1) & (p < 0.9)))
        n_occ_now = int(occupied.sum())
        state["classify_s"] += time.perf_counter() - c0
        panel.set_threshold_result(r)
        panel.set_counts(n_occ_now, amps.size - n_occ_now, n_unc)
        panel.repaint()
        state["n"] += 1

    panel.thresholdDragged.connect(on_drag)

    # 1) programmatic moves through the drag signal path
    line = panel.threshold_line
    values = np.linspace(300, 700, N_STEPS)
    t0 = time.perf_counter()
    for v in values:
        line.setPos(v)  # emits sigPositionChanged -> thresholdDragged (not programmatic flag)
        app.processEvents()
    dt = time.perf_counter() - t0
    print(f"setValue drag: {state['n']} updates in {dt:.3f} s = {state['n'] / dt:.0f} updates/s "
          f"(classification {1e3 * state['classify_s'] / max(state['n'], 1):.2f} ms per update)")

    # 2) raw mouse events on the plot viewport
    state["n"], state["classify_s"] = 0, 0.0
    panel.set_threshold(300.0)
    app.processEvents()
    view = panel.plot_widget
    vb = view.getPlotItem().getViewBox()
    y_mid = float(np.mean(vb.viewRange()[1]))

    def vp(x):
        return QtCore.QPointF(view.mapFromScene(vb.mapViewToScene(QtCore.QPointF(x, y_mid))))

    def send(kind, pos, button, buttons):
        ev = QtGui.QMouseEvent(kind, pos, view.viewport().mapToGlobal(pos), button, buttons,
                               QtCore.Qt.KeyboardModifier.NoModifier)
        QtWidgets.QApplication.sendEvent(view.viewport(), ev)

    left, none = QtCore.Qt.MouseButton.LeftButton, QtCore.Qt.MouseButton.NoButton
    t0 = time.perf_counter()
    send(QtCore.QEvent.Type.MouseMove, vp(300.0), none, none)
    send(QtCore.QEvent.Type.MouseButtonPress, vp(300.0), left, left)
    for x in np.linspace(300, 700, N_STEPS)[1:]:
        send(QtCore.QEvent.Type.MouseMove, vp(x), none, left)
        app.processEvents()
    send(QtCore.QEvent.Type.MouseButtonRelease, vp(700.0), left, none)
    dt = time.perf_counter() - t0
    print(f"mouse drag:    {state['n']} updates in {dt:.3f} s = {state['n'] / dt:.0f} updates/s")

    # 3) panel alone (no classification): line, labels and repaint only
    panel.thresholdDragged.disconnect(on_drag)
    n = 0
    t0 = time.perf_counter()
    for v in values:
        r = result.with_threshold(float(v))
        panel.set_threshold_result(r)
        panel.set_counts(1, 2, 3)
        panel.repaint()
        n += 1
    dt = time.perf_counter() - t0
    print(f"panel only:    {n} updates in {dt:.3f} s = {n / dt:.0f} updates/s")

    # 4) re-histogramming when the amplitudes change (whole stacks): set_amplitudes + repaint
    for n_sites in (10_000, 1_000_000, 4_000_000):
        big = np.concatenate([rng.normal(0, 60, n_sites - n_sites // 3), rng.normal(1000, 150, n_sites // 3)])
        panel.set_amplitudes(big[:1000])  # not the first call of its kind
        t0 = time.perf_counter()
        panel.set_amplitudes(big)
        panel.repaint()
        print(f"set_amplitudes + repaint, {n_sites:>9,} sites: {1e3 * (time.perf_counter() - t0):.1f} ms")


if __name__ == "__main__":
    main()
