"""Render screenshots of the desktop program offscreen into docs/ (run by hand).

    .venv/bin/python tools/screenshots.py [--out docs]

Opens the bundled demo stack (sample_data/demo_square.tif: invented sodium-23 atoms, 589 nm,
NA 0.70, 160 nm pixels, EMCCD at gain 150, frames in pairs), calibrates it with the ideal
Airy PSF for those optics, reconstructs every frame, estimates the fidelity, and saves:

    main_window_1366x768.png   whole window on a 1366x768 laptop screen, geometry panel in front
    main_window_1920x1080.png  whole window on a 1920x1080 screen
    main_window_psf.png        whole window (1366x768), PSF panel in front
    main_window_fidelity.png   whole window (1366x768), fidelity panel in front
    image_pane_zoom.png        image pane zoomed in: grid, site rings, site under the cursor
    image_pane_side_by_side.png  raw frame next to the model image
    occupation_view.png        occupation matrix of one frame and the mean over the stack
    main_window_region.png     whole window (1366x768) with an analysed disk, a masked rectangle
                               and one excluded site shown in the site inspector
"""

from __future__ import annotations

import argparse
import os
import sys
import tempfile
import time
from pathlib import Path

os.environ.setdefault("QT_QPA_PLATFORM", "offscreen")

ROOT = Path(__file__).resolve().parents[1]
sys.path.insert(0, str(ROOT))


def settle(app, seconds: float = 0.3) -> None:
    """Let layouts and deferred redraws run before grabbing."""
    end = time.time() + seconds
    while time.time() < end:
        app.processEvents()
        time.sleep(0.02)


def wait_idle(app, window, timeout: float = 600.0) -> None:
    end = time.time() + timeout
    while (window.workers.busy or window._refresh_timer.isActive()) and time.time() < end:
        app.processEvents()
        time.sleep(0.02)
    settle(app)


def main() -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--out", default=str(ROOT / "docs"), help="folder for the PNG files")
    args = parser.parse_args()
    out = Path(args.out)
    out.mkdir(parents=True, exist_ok=True)

    from PySide6 import QtCore, QtGui

    from latticeread.core.simulate import demo_camera
    from latticeread.gui.app import make_app
    from latticeread.gui.main_window import MainWindow
    from latticeread.gui.settings import AppSettings

    app = make_app()
    tmp = tempfile.mkdtemp()
    w = MainWindow(settings=AppSettings(Path(tmp) / "settings.ini"), offer_restore=False, autosave_interval_s=0)
    w.resize(1366, 768)
    w.show()
    settle(app)
    w.size_docks()
    if not w.open_path(ROOT / "sample_data" / "demo_square.tif"):
        print(w.last_error, file=sys.stderr)
        return 1
    w.session.update_settings(camera=demo_camera("emccd").to_dict(), images_per_shot=2, pixel_size_nm=160.0,
                              wavelength_nm=589.0, numerical_aperture=0.70, psf_source="airy")
    w.calibrate()
    wait_idle(app, w)
    if w.session.calibration is None:
        print(f"calibration failed: {w.last_error}", file=sys.stderr)
        return 1
    w.reconstruct_all()
    wait_idle(app, w)
    w.estimate_fidelity()
    wait_idle(app, w)
    w.set_frame_index(2)
    wait_idle(app, w)

    # site under the cursor: move the mouse over an occupied site of the shown frame
    res = w.session.result()
    k = int(next(i for i in range(len(res.occupied)) if res.occupied[i] and 110 < res.sites.x[i] < 150
                 and 110 < res.sites.y[i] < 150))
    pane = w.image_pane

    def hover_site():
        scene_pos = pane.view.mapViewToScene(QtCore.QPointF(res.sites.x[k], res.sites.y[k]))
        pane._mouse_moved(scene_pos)

    shots = []
    for dock, name in (("geometry_panel", "main_window_1366x768.png"), ("psf_panel", "main_window_psf.png"),
                       ("fidelity_panel", "main_window_fidelity.png")):
        w.docks[dock].raise_()
        pane.view.autoRange(padding=0.02)
        settle(app)
        hover_site()
        settle(app, 0.2)
        w.grab().save(str(out / name))
        shots.append(name)
    w.resize(1920, 1080)
    settle(app)
    w.size_docks()
    w.docks["geometry_panel"].raise_()
    pane.view.autoRange(padding=0.02)
    settle(app, 0.5)
    hover_site()
    settle(app, 0.2)
    w.grab().save(str(out / "main_window_1920x1080.png"))
    shots.append("main_window_1920x1080.png")
    w.resize(1366, 768)
    settle(app)
    w.size_docks()
    settle(app)

    pane.view.setRange(xRange=(res.sites.x[k] - 22, res.sites.x[k] + 22),
                       yRange=(res.sites.y[k] - 16, res.sites.y[k] + 16), padding=0)
    settle(app)
    hover_site()
    settle(app, 0.2)
    pane.grab().save(str(out / "image_pane_zoom.png"))
    shots.append("image_pane_zoom.png")

    left = [d for k, d in w.docks.items() if k in ("geometry_panel", "psf_panel", "fidelity_panel")]
    for d in left:  # room for two images next to each other
        d.hide()
    pane.set_view_mode("side")
    wait_idle(app, w)
    pane.view.setRange(xRange=(res.sites.x[k] - 40, res.sites.x[k] + 40),
                       yRange=(res.sites.y[k] - 40, res.sites.y[k] + 40), padding=0)
    settle(app, 0.5)
    pane.grab().save(str(out / "image_pane_side_by_side.png"))
    shots.append("image_pane_side_by_side.png")
    pane.set_view_mode("raw")
    for d in left:
        d.show()

    w.occupation_view.resize(900, 480)
    settle(app)
    w.occupation_view.grab().save(str(out / "occupation_view.png"))
    shots.append("occupation_view.png")
    # region editing: an analysed disk, a masked area and one site excluded from the inspector
    from latticeread.core.region import RegionShape, SiteRegion

    geometry = w.session.calibration.geometry
    cx, cy = geometry.offset
    w.set_region(SiteRegion(include=(RegionShape.disk((cx, cy), 70.0),),
                            exclude=(RegionShape.rectangle((cx + 12, cy - 30), 26, 16, angle=15.0),)))
    wait_idle(app, w)
    w.inspect_site(0, 0)
    w.exclude_site(0, 0)
    w.reconstruct_all()
    wait_idle(app, w)
    w.inspect_site(0, 0)
    w.docks["inspector"].raise_()
    w.docks["geometry_panel"].raise_()
    pane.view.autoRange(padding=0.02)
    settle(app, 0.5)
    w.grab().save(str(out / "main_window_region.png"))
    shots.append("main_window_region.png")
    for name in shots:
        img = QtGui.QImage(str(out / name))
        print(f"{out / name}: {img.width()}x{img.height()}")
    w.close()
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
