"""The real window for tests/test_x11_smoke.py: runs under an X server, reports its state.

    python tests/x11_driver.py STATE.json FRAMES SETTINGS.ini

Opens FRAMES in a MainWindow (sized by the program itself for the screen) and writes, every
200 ms, a JSON file with what the test needs to aim real input events and to check their effect:
the window's place on the screen, the threshold line's screen position, the number of
reconstructed frames, the threshold, undo state, the last error, and the status text. The
program quits when ``STATE.quit`` appears (or after 10 minutes).
"""

from __future__ import annotations

import json
import os
import sys
import time
from pathlib import Path


def main() -> int:
    state_path, frames, settings = Path(sys.argv[1]), sys.argv[2], sys.argv[3]
    from PySide6 import QtCore

    from latticeread.gui.app import make_app
    from latticeread.gui.main_window import MainWindow
    from latticeread.gui.settings import AppSettings

    app = make_app()
    window = MainWindow(settings=AppSettings(settings), offer_restore=False, autosave_interval_s=0)
    window.show()
    window.open_path(frames)
    started = time.time()

    def line_position():
        hp = window.histogram_panel
        line = getattr(hp, "threshold_line", None)
        if line is None or not line.isVisible():
            return None
        plot = hp.plot_widget
        vb = plot.getPlotItem().getViewBox()
        (y0, y1) = vb.viewRange()[1]
        scene = vb.mapViewToScene(QtCore.QPointF(line.value(), y0 + 0.5 * (y1 - y0)))
        local = plot.mapFromScene(scene)
        glob = plot.viewport().mapToGlobal(local)
        return [glob.x(), glob.y()]

    def report():
        s = window.session
        geo = window.frameGeometry()
        state = {
            "time": time.time() - started,
            "window": [geo.x(), geo.y(), geo.width(), geo.height()],
            "screen": [window.screen().geometry().width(), window.screen().geometry().height()],
            "frames": s.n_frames, "done": int(s.done.sum()) if s.frames is not None else 0,
            "threshold": None if s.calibration is None else s.calibration.threshold,
            "threshold_in_force": s.threshold, "can_undo": s.can_undo,
            "calibration": window.calibration_label.text(), "status": window.status_label.text(),
            "busy": window.workers.busy, "line": line_position(), "last_error": window.last_error,
            "active": window.isActiveWindow(),
        }
        tmp = state_path.with_suffix(".tmp")
        tmp.write_text(json.dumps(state))
        os.replace(tmp, state_path)
        if state_path.with_suffix(".quit").exists() or time.time() - started > 600:
            window.close()
            app.quit()

    timer = QtCore.QTimer()
    timer.timeout.connect(report)
    timer.start(200)
    return app.exec()


if __name__ == "__main__":
    raise SystemExit(main())
