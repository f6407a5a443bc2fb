"""Keeps the observables panel up to date with the session, throttled and off the GUI thread.

The main window calls :meth:`ObservablesFeed.request` whenever the classification changes (a
threshold drag, new reconstructed frames, another calibration). The feed waits
``THROTTLE_MS`` (collecting further requests), takes the occupation matrices of the
reconstructed frames from the session (one vectorised classification), and computes the
observables in a worker thread. While one computation runs, new requests only mark the
result stale; when it ends the latest state is computed, so during a drag the panel shows
a result at most one computation old and never a stale one at rest. Nothing is computed
while the panel is hidden.

Misread rates: the threshold fit's false-positive and false-negative rates, and the loss
from the fidelity estimate when there is one (its 95 % interval turned into a standard
error); without a threshold fit nothing is corrected.
"""

from __future__ import annotations

import logging
import math
from pathlib import Path

from PySide6 import QtCore, QtWidgets

log = logging.getLogger(__name__)

__all__ = ["ObservablesFeed", "THROTTLE_MS", "GUI_BOOTSTRAP"]

#: Delay collecting requests before a recomputation (ms).
THROTTLE_MS = 150
#: Bootstrap replicates of the correlator errors in the window (the command uses 200).
GUI_BOOTSTRAP = 100
#: Two-sided 95 % normal quantile (interval -> standard error).
Z95 = 1.959963984540054


def _estimate(report, name):
    est = getattr(report, name, None) if not isinstance(report, dict) else report.get(name)
    if est is None:
        return None
    value = getattr(est, "value", None) if not isinstance(est, dict) else est.get("value")
    lo = getattr(est, "low", None) if not isinstance(est, dict) else est.get("low")
    hi = getattr(est, "high", None) if not isinstance(est, dict) else est.get("high")
    try:
        value = float(value)
        err = (float(hi) - float(lo)) / (2 * Z95)
    except (TypeError, ValueError):
        return None
    if not math.isfinite(value):
        return None
    return value, (err if math.isfinite(err) and err >= 0 else 0.0)


def session_rates(session):
    """MisreadRates from the session's threshold fit (and fidelity report), or None."""
    from latticeread.core.observables import MisreadRates, ObservablesError

    tr = session.threshold_result
    fp = getattr(tr, "false_positive_rate", None)
    fn = getattr(tr, "false_negative_rate", None)
    if fp is None or fn is None or not (math.isfinite(fp) and math.isfinite(fn)):
        return None
    loss = _estimate(session.fidelity, "loss") if session.fidelity is not None else None
    try:
        return MisreadRates(float(fp), float(fn), loss[0] if loss else 0.0, loss_err=loss[1] if loss else 0.0)
    except ObservablesError as exc:
        log.info("no misread correction in the window: %s", exc)
        return None


class ObservablesFeed(QtCore.QObject):
    """Feeds an ObservablesPanel from a main window's session.

    Parameters
    ----------
    window : MainWindow
        Provides ``session``, ``workers`` (a WorkerPool) and ``docks``.
    panel : ObservablesPanel
    """

    def __init__(self, window, panel):
        super().__init__(window)
        self.window = window
        self.panel = panel
        self._timer = QtCore.QTimer(self)
        self._timer.setSingleShot(True)
        self._timer.setInterval(THROTTLE_MS)
        self._timer.timeout.connect(self._compute)
        self._stale = False
        self._running = False
        self.n_computed = 0
        panel.exportRequested.connect(self._export)
        dock = window.docks.get("observables_panel")
        if dock is not None:
            dock.visibilityChanged.connect(lambda shown: shown and self._stale and self.request())

    def request(self) -> None:
        """The occupation changed: recompute soon (throttled)."""
        self._stale = True
        if not self._running and not self._timer.isActive():
            self._timer.start()

    def _compute(self) -> None:
        if not self._stale:
            return
        if not self.panel.isVisible():
            return                      # recomputed when the panel is shown again
        self._stale = False
        s = self.window.session
        occ = s.occupation_stack() if s is not None else None
        if occ is None or occ.shape[0] < 2:
            n = 0 if occ is None else occ.shape[0]
            self.panel.set_message(f"no observables: {n} frame(s) reconstructed; reconstruct at least 2 "
                                   "(Analysis > Reconstruct all)")
            return
        cal = s.calibration
        geometry = getattr(cal, "geometry", None)
        vectors = None if geometry is None else (tuple(geometry.a1), tuple(geometry.a2))
        sites = s.sites
        origin = (0, 0) if sites is None else (int(sites.row_min), int(sites.col_min))
        rates = session_rates(s)
        k = max(1, min(4, min(occ.shape[1:]) - 1))

        def job(should_stop):
            from latticeread.core.observables import compute_observables

            return compute_observables(occ, vectors=vectors, origin=origin, max_distance=k,
                                       n_bootstrap=GUI_BOOTSTRAP, rates=rates, rng=0)

        self._running = True
        self.window.workers.submit("observables", job, on_result=self._show, on_error=self._failed,
                                   on_end=self._ended)

    def _show(self, obs) -> None:
        self.n_computed += 1
        self.panel.set_observables(obs, source="reconstructed frames")

    def _failed(self, exc) -> None:
        self.panel.set_message(f"no observables: {exc}")

    def _ended(self) -> None:
        self._running = False
        if self._stale:
            self._timer.start()

    def _export(self, fmt: str) -> None:
        start = str(Path.home() / f"observables.{fmt}")
        filt = "PNG image (*.png)" if fmt == "png" else "SVG vector (*.svg)"
        from latticeread.gui.replace_guard import SAVE_DIALOG_OPTIONS

        name, _ = QtWidgets.QFileDialog.getSaveFileName(self.window, "Save observables plots", start, filt,
                                                        options=SAVE_DIALOG_OPTIONS)
        if not name:
            return
        self.window.confirm_write([name], title="Save observables plots", then=lambda: self.save(name))

    def save(self, name) -> None:
        """Write the observables plots to ``name`` (PNG or SVG); failures go to the status bar."""
        try:
            path = self.panel.save_figure(name)
        except Exception as exc:  # noqa: BLE001 - report any export failure in the status bar
            self.window.show_status(f"could not save the plots: {exc}")
            return
        self.window.show_status(f"saved {path}")
