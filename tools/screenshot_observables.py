"""Screenshots of the observables panel on the two ordered demo stacks, for the README.

Run from the repository root (no display needed):
    QT_QPA_PLATFORM=offscreen python tools/screenshot_observables.py
It opens each demo stack with its calibration in the window, reconstructs every frame, shows
the observables tab and saves docs/observables_checkerboard.png and docs/observables_mott.png.
Look at both PNGs before committing them.
"""

from __future__ import annotations

import os
from pathlib import Path

os.environ.setdefault("QT_QPA_PLATFORM", "offscreen")

ROOT = Path(__file__).resolve().parents[1]
#: (demo stack, output, profile shown: index in the panel's profile list)
SHOTS = [("demo_checkerboard.tif", "observables_checkerboard.png", 0),
         ("demo_mott.tif", "observables_mott.png", 0)]


def main() -> None:
    import tempfile

    from PySide6 import QtWidgets

    from latticeread.gui.app import make_app
    from latticeread.gui.main_window import MainWindow
    from latticeread.gui.settings import AppSettings

    app = make_app()
    with tempfile.TemporaryDirectory() as tmp:
        for stack, out, profile in SHOTS:
            w = MainWindow(settings=AppSettings(Path(tmp) / "s.ini"), synchronous=True, offer_restore=False,
                           autosave_interval_s=0)
            w.resize(1500, 950)
            w.show()
            s = w.session
            s.open_frames(ROOT / "sample_data" / stack)
            s.load_calibration(ROOT / "sample_data" / stack.replace(".tif", ".calibration.json"))
            s.reconstruct()
            s.finish_reconstruction()
            w.flush()
            dock = w.docks["observables_panel"]
            dock.raise_()
            w.observables_panel.profile_box.setCurrentIndex(profile)
            for _ in range(50):
                app.processEvents()
                QtWidgets.QApplication.processEvents()
                if w.observables_panel.observables is not None and not w.observables_feed._stale:
                    break
                w.observables_feed._timer.stop()
                w.observables_feed._compute()
            panel = w.observables_panel
            panel.resize(900, 720)
            dock.setFloating(True)
            dock.resize(920, 760)
            app.processEvents()
            path = ROOT / "docs" / out
            panel.grab().save(str(path))
            print(f"wrote {path}")
            w.close()


if __name__ == "__main__":
    main()
