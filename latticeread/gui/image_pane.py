"""The camera frame with contrast control, a frame slider and lattice overlays.

A pure view: the main window feeds it with ``set_*`` calls and listens to its signals.

Methods
-------
set_frame(image, *, index, n_frames, photons=None)
    Show a frame (counts); ``photons`` (same shape) is used for the blended view.
set_lattice(geometry, sites)
    Lattice grid lines and the site set (SiteGrid: rows, cols, x, y) for hover look-up; None clears.
set_site_states(occupied, p_occupied, amplitudes)
    Per-site classification for the coloured site markers (arrays of the SiteGrid's length).
set_model(model)
    The model image (photons): sum of PSFs times site amplitudes; None clears.
set_grid_visible(bool), set_sites_visible(bool), set_view_mode(mode)
    Overlay toggles and "raw" / "model" / "side" (side by side) / "blend".

Signals
-------
frameRequested(int)     the user moved the frame slider / spin box
siteHovered(object)     dict with x, y (pixels), value (counts) and, over a site, row, col,
                        amplitude (photons), p_occupied, occupied; None when the cursor leaves
siteClicked(object)     the same dict for a left click on a site (to inspect it)
modelWanted()           the view mode needs a model image that has not been given yet
overlaysChanged(dict)   {"grid": bool, "sites": bool, "mode": str} after a user toggle
"""

from __future__ import annotations

import numpy as np
import pyqtgraph as pg
from PySide6 import QtCore, QtWidgets

__all__ = ["ImagePane", "VIEW_MODES", "grid_segments", "ring_paths"]

VIEW_MODES = {
    "raw": "Raw",
    "model": "Model",
    "side": "Side by side",
    "blend": "Blend",
}
VIEW_MODE_TIPS = {
    "raw": "the camera frame as recorded (counts)",
    "model": "the model rebuilt from the fitted site amplitudes and the PSF (photons)",
    "side": "raw frame and model next to each other, zoom and pan linked",
    "blend": "raw frame (photons) blended with the model; the slider sets the weight",
}

#: Colour maps of the image and, for each, marker colours (occupied, empty, uncertain) that
#: stand out from every colour of that map: CIE76 colour difference of at least 40 (checked in
#: tests/test_gui_image_pane_colours.py with scikit-image; about 2.3 is just noticeable).
COLOR_MAPS = {
    "inferno": {"occupied": (0, 230, 255), "empty": (255, 255, 255), "uncertain": (255, 0, 255)},
    "viridis": {"occupied": (255, 40, 40), "empty": (255, 255, 255), "uncertain": (255, 140, 26)},
    "cividis": {"occupied": (255, 0, 255), "empty": (0, 230, 255), "uncertain": (255, 40, 40)},
    "grey": {"occupied": (255, 40, 40), "empty": (60, 140, 255), "uncertain": (255, 230, 0)},
}
COLOR_MAP_NAMES = {"inferno": "Inferno (black-red-yellow)", "viridis": "Viridis (blue-green-yellow)",
                   "cividis": "Cividis (colour-blind safe)", "grey": "Grey"}
MARKER_LABELS = {"occupied": "occupied", "empty": "empty",
                 "uncertain": "uncertain (0.1 ≤ P(atom) ≤ 0.9)"}


def color_map(name: str):
    """The pyqtgraph ColorMap called ``name`` (one of :data:`COLOR_MAPS`)."""
    if name not in COLOR_MAPS:
        raise ValueError(f"unknown colour map {name!r}; use one of {', '.join(COLOR_MAPS)}")
    if name == "grey":
        return pg.ColorMap([0.0, 1.0], [(0, 0, 0), (255, 255, 255)])
    full = pg.colormap.get(name)
    stops = np.linspace(0.0, 1.0, 17)  # enough stops to follow the map; few enough to edit
    return pg.ColorMap(stops, full.map(stops, mode="byte"))


#: opacity of the small empty-site markers (many of them; they must not hide the image)
EMPTY_ALPHA = 150


def _marker_pen(state: str, cmap: str, width: float = 1):
    r, g, b = COLOR_MAPS[cmap][state]
    return pg.mkPen((r, g, b, EMPTY_ALPHA if state == "empty" else 255), width=width)


def nice_scale_length_um(frame_width_um: float) -> float:
    """A round scale-bar length (1, 2 or 5 times a power of ten, micrometres) near a fifth of
    the frame width."""
    target = max(frame_width_um / 5.0, 1e-6)
    power = 10.0 ** np.floor(np.log10(target))
    for step in (5.0, 2.0, 1.0):
        if step * power <= target:
            return float(step * power)
    return float(power)


def grid_segments(geometry, frame_shape) -> tuple[np.ndarray, np.ndarray]:
    """End points of the lattice cell boundaries covering a frame, for a ``connect="pairs"`` curve.

    Lines run half a lattice vector away from the site centres, so every site sits in the
    middle of its cell.

    Returns
    -------
    x, y : ndarray
        Pairs of points (pixels), consecutive entries form one segment.
    """
    h, w = frame_shape
    cx = np.array([-0.5, w - 0.5, -0.5, w - 0.5])
    cy = np.array([-0.5, -0.5, h - 0.5, h - 0.5])
    fr, fc = geometry.fractional_indices(cx, cy)
    r0, r1 = int(np.floor(fr.min())), int(np.ceil(fr.max()))
    c0, c1 = int(np.floor(fc.min())), int(np.ceil(fc.max()))
    rb = np.arange(r0, r1 + 1) - 0.5
    cb = np.arange(c0, c1 + 1) - 0.5
    # lines of constant row index (running along a2) and of constant col index (along a1)
    r_start = np.stack([rb, np.full_like(rb, c0 - 0.5)], axis=1)
    r_end = np.stack([rb, np.full_like(rb, c1 + 0.5)], axis=1)
    c_start = np.stack([np.full_like(cb, r0 - 0.5), cb], axis=1)
    c_end = np.stack([np.full_like(cb, r1 + 0.5), cb], axis=1)
    starts = np.concatenate([r_start, c_start])
    ends = np.concatenate([r_end, c_end])
    pts = np.empty((2 * len(starts), 2))
    pts[0::2] = starts
    pts[1::2] = ends
    x, y = geometry.site_positions(pts[:, 0], pts[:, 1])
    return x, y


def ring_paths(x, y, *, radius: float, n_corners: int = 8) -> tuple[np.ndarray, np.ndarray]:
    """Closed polygons of ``n_corners`` around every point, separated by NaN (for connect="finite").

    Parameters
    ----------
    x, y : (N,) ndarray
        Centres in pixels.
    radius : float
        Ring radius in pixels.

    Returns
    -------
    rx, ry : (N * (n_corners + 2),) ndarray
    """
    x = np.asarray(x, float)
    y = np.asarray(y, float)
    phi = np.linspace(0, 2 * np.pi, n_corners + 1)
    ox = np.append(radius * np.cos(phi), np.nan)
    oy = np.append(radius * np.sin(phi), np.nan)
    return (x[:, None] + ox[None, :]).ravel(), (y[:, None] + oy[None, :]).ravel()


class ImagePane(QtWidgets.QWidget):
    """Frame view with histogram contrast, frame slider, grid/site overlays and a model view."""

    frameRequested = QtCore.Signal(int)
    siteHovered = QtCore.Signal(object)
    siteClicked = QtCore.Signal(object)
    modelWanted = QtCore.Signal()
    overlaysChanged = QtCore.Signal(dict)
    regionEdited = QtCore.Signal(object)

    def __init__(self, parent=None):
        super().__init__(parent)
        self._image = None
        self._photons = None
        self._model = None
        self._geometry = None
        self._sites = None
        self._site_lookup = None
        self._occupied = None
        self._p = None
        self._amplitudes = None
        self._grid_shape = None
        self._mode = "raw"
        self._drawn_markers: dict = {}  # state -> (radius, selection, x, y) of the path drawn last

        self.graphics = pg.GraphicsLayoutWidget()
        self.graphics.setToolTip("Camera frame: scroll to zoom, drag to pan, right-click for view options")
        self.view = self.graphics.addViewBox(row=0, col=0, lockAspect=True, invertY=True)
        self.view.setMenuEnabled(True)
        self.image_item = pg.ImageItem(axisOrder="row-major")
        self.view.addItem(self.image_item)
        self.model_view = self.graphics.addViewBox(row=0, col=1, lockAspect=True, invertY=True)
        self.model_item = pg.ImageItem(axisOrder="row-major")
        self.model_view.addItem(self.model_item)
        self._cmap = "inferno"
        self.model_item.setColorMap(color_map(self._cmap))
        self.model_view.setVisible(False)
        # the two views show the same region; synchronised by hand because pyqtgraph's axis
        # links fight the locked aspect ratio when both axes are linked
        self._syncing = False
        self.view.sigRangeChanged.connect(lambda *_: self._sync_views(self.view, self.model_view))
        self.model_view.sigRangeChanged.connect(lambda *_: self._sync_views(self.model_view, self.view))
        self.lut = pg.HistogramLUTItem(image=self.image_item)
        self.lut.gradient.setColorMap(color_map(self._cmap))
        self.lut.gradient.showTicks(False)
        self.lut.axis.setLabel("counts")
        self.graphics.addItem(self.lut, row=0, col=2)
        self.lut.setToolTip("Colour scale of the image (counts for the raw frame, photons for the "
                            "model and the blend): drag the handles to change the contrast")
        self._pixel_size_nm = None
        self.scale_bar = None

        self.grid_item = pg.PlotCurveItem(pen=pg.mkPen((120, 255, 120, 110), width=1), connect="pairs",
                                          antialias=False)
        self.grid_item.setZValue(5)
        self.view.addItem(self.grid_item)
        self.site_items = {}
        # site markers: rings in frame pixels (they zoom with the image), one polyline per
        # state with NaN breaks -- a single vectorised path, fast for tens of thousands of sites
        self._marker_radius = {"occupied": 0.3, "uncertain": 0.3, "empty": 0.11}  # x lattice spacing
        for state in ("empty", "occupied", "uncertain"):
            item = pg.PlotCurveItem(pen=_marker_pen(state, self._cmap), connect="finite", antialias=False)
            item.setZValue(6)
            self.view.addItem(item)
            self.site_items[state] = item
        # legend of the markers, fixed in the view's top-left corner (not in frame pixels)
        self.legend = pg.LegendItem(offset=(6, 6), labelTextColor=(235, 235, 235), brush=pg.mkBrush(0, 0, 0, 170),
                                    pen=pg.mkPen(90, 90, 90))
        self.legend.setParentItem(self.view)
        self._legend_samples = {}
        for state in ("occupied", "empty", "uncertain"):
            sample = pg.PlotDataItem([0], [0], pen=None, symbol="o" if state != "empty" else "d",
                                     symbolSize=9 if state != "empty" else 6, symbolBrush=None,
                                     symbolPen=pg.mkPen(COLOR_MAPS[self._cmap][state], width=2))
            self._legend_samples[state] = sample
            self.legend.addItem(sample, MARKER_LABELS[state])
        self.legend.setVisible(False)
        self.hover_item = pg.ScatterPlotItem(size=10, pxMode=True, pen=pg.mkPen("w", width=2),
                                             brush=pg.mkBrush(None), symbol="s")
        self._marker_px = None
        self.view.sigRangeChanged.connect(lambda *_: self._rescale_markers())
        self.view.sigResized.connect(lambda *_: self._rescale_markers())
        self.marker_counts = {"occupied": 0, "empty": 0, "uncertain": 0}
        self.hover_item.setZValue(7)
        self.view.addItem(self.hover_item)
        self.graphics.scene().sigMouseMoved.connect(self._mouse_moved)
        self.graphics.scene().sigMouseClicked.connect(self._mouse_clicked)
        from latticeread.gui.region_editor import ADD_KINDS, RegionEditor

        self.region_editor = RegionEditor(self.view, self)
        self.region_editor.regionEdited.connect(self.regionEdited)
        self._excluded_lookup: set = set()
        self.region_button = QtWidgets.QToolButton()
        self.region_button.setText("Region")
        self.region_button.setPopupMode(QtWidgets.QToolButton.InstantPopup)
        self.region_button.setToolTip("Draw the analysed region (cyan) or masked areas (red, dashed) on the image: "
                                      "drag a shape to move it, its handles to resize or turn it, click a polygon "
                                      "edge to add a corner, right-click a shape to remove it. Sites outside the "
                                      "region are fitted but get no result (crosses); each edit is one undo step")
        region_menu = QtWidgets.QMenu(self.region_button)
        region_menu.setToolTipsVisible(True)
        self.region_actions = {}
        for excluded, label in ((False, "Analyse only inside a"), (True, "Mask a")):
            for kind, text in ADD_KINDS.items():
                act = region_menu.addAction(f"{label} {text}")
                act.triggered.connect(lambda _c=False, k=kind, e=excluded: self.region_editor.add_shape(k, excluded=e))
                self.region_actions[(kind, excluded)] = act
            region_menu.addSeparator()
        self.region_actions["clear"] = region_menu.addAction("Analyse every site (remove all shapes and exclusions)")
        self.region_actions["clear"].triggered.connect(self.region_editor.clear)
        self.region_button.setMenu(region_menu)
        self.region_button.setEnabled(False)

        # --- controls -------------------------------------------------------------------
        self.prev_button = QtWidgets.QToolButton()
        self.prev_button.setText("\u25c0")
        self.prev_button.setToolTip("Previous frame (Left or Page Up)")
        self.next_button = QtWidgets.QToolButton()
        self.next_button.setText("\u25b6")
        self.next_button.setToolTip("Next frame (Right or Page Down)")
        self.slider = QtWidgets.QSlider(QtCore.Qt.Horizontal)
        self.slider.setToolTip("Frame of the stack shown (0-based index)")
        self.slider.setFocusPolicy(QtCore.Qt.NoFocus)
        self.spin = QtWidgets.QSpinBox()
        self.spin.setToolTip("Frame index (0-based); type a number to jump")
        self.count_label = QtWidgets.QLabel("of 0")
        self.count_label.setMinimumWidth(48)
        self.count_label.setToolTip("Number of frames in the stack (numbered from 0)")
        self.grid_check = QtWidgets.QCheckBox("Grid")
        self.grid_check.setChecked(True)
        self.grid_check.setToolTip("Show the lattice cell boundaries (G)")
        self.sites_check = QtWidgets.QCheckBox("Sites")
        self.sites_check.setChecked(True)
        self.sites_check.setToolTip("Mark site centres: large rings = occupied, small diamonds = empty, "
                                    "rings of the third colour = uncertain (posterior between 0.1 and "
                                    "0.9); the legend in the image gives the colours")
        self.mode_combo = QtWidgets.QComboBox()
        for i, (key, text) in enumerate(VIEW_MODES.items()):
            self.mode_combo.addItem(text, key)
            self.mode_combo.setItemData(i, VIEW_MODE_TIPS[key].capitalize(), QtCore.Qt.ToolTipRole)
        self.mode_combo.setToolTip("Compare the raw frame with the model rebuilt from the fitted site "
                                   "amplitudes and the PSF (in photons)")
        self.blend_slider = QtWidgets.QSlider(QtCore.Qt.Horizontal)
        self.blend_slider.setRange(0, 100)
        self.blend_slider.setValue(50)
        self.blend_slider.setMinimumWidth(60)
        self.blend_slider.setMaximumWidth(90)
        self.blend_slider.setEnabled(False)
        self.blend_slider.setToolTip("Blend weight: left = raw frame (photons), right = model")

        self.slider.setMinimumWidth(56)
        controls = QtWidgets.QHBoxLayout()
        controls.setContentsMargins(4, 0, 4, 2)
        controls.addWidget(self.prev_button)
        controls.addWidget(self.slider, 1)
        for w in (self.next_button, self.spin, self.count_label):
            controls.addWidget(w)
        controls.addSpacing(12)
        for w in (self.grid_check, self.sites_check, self.region_button, self.mode_combo, self.blend_slider):
            controls.addWidget(w)
        layout = QtWidgets.QVBoxLayout(self)
        layout.setContentsMargins(0, 0, 0, 0)
        layout.addWidget(self.graphics, 1)
        layout.addLayout(controls)

        self.slider.valueChanged.connect(self._slider_moved)
        self.spin.valueChanged.connect(self._slider_moved)
        self.prev_button.clicked.connect(lambda: self.frameRequested.emit(self.slider.value() - 1))
        self.next_button.clicked.connect(lambda: self.frameRequested.emit(self.slider.value() + 1))
        self.grid_check.toggled.connect(self._toggled)
        self.sites_check.toggled.connect(self._toggled)
        self.mode_combo.currentIndexChanged.connect(self._mode_changed)
        self.blend_slider.valueChanged.connect(lambda _v: self._update_display())
        self.set_frame_count(0)

    # ------------------------------------------------------------------ frames
    def set_frame_count(self, n: int) -> None:
        for w in (self.slider, self.spin):
            w.blockSignals(True)
            w.setRange(0, max(0, n - 1))
            w.blockSignals(False)
        self.count_label.setText(f"of {max(0, n)}")
        self.count_label.setToolTip(f"{n} frame(s) in the stack, numbered 0 to {max(0, n - 1)}" if n
                                    else "No frames")
        enabled = n > 1
        for w in (self.slider, self.spin, self.prev_button, self.next_button):
            w.setEnabled(enabled)

    def set_frame(self, image, *, index: int = 0, n_frames: int = 1, photons=None) -> None:
        """Show ``image`` (counts), keeping the user's zoom and contrast between frames."""
        first = self._image is None or self._image.shape != np.shape(image)
        self._image = np.asarray(image)
        self._photons = None if photons is None else np.asarray(photons, dtype=float)
        self._model = None
        if self.slider.maximum() != max(0, n_frames - 1):
            self.set_frame_count(n_frames)
        for w in (self.slider, self.spin):
            w.blockSignals(True)
            w.setValue(index)
            w.blockSignals(False)
        self._update_display(auto_levels=first)
        if first:
            self.view.autoRange(padding=0.02)
            self._update_scale_bar()
        if self._mode != "raw":
            self.modelWanted.emit()

    def clear(self) -> None:
        self._image = self._photons = self._model = None
        self.image_item.clear()
        self.model_item.clear()
        self.set_lattice(None, None)
        self.set_frame_count(0)
        self._update_scale_bar()

    def _slider_moved(self, value: int) -> None:
        self.frameRequested.emit(int(value))

    # ------------------------------------------------------------------ overlays
    def set_lattice(self, geometry, sites) -> None:
        """Grid lines from ``geometry`` and the site set used for hover look-up (None clears)."""
        same_grid = geometry is not None and geometry == self._geometry and self._grid_shape == (
            None if self._image is None else self._image.shape)
        if same_grid and sites is self._sites:
            return
        self._geometry = geometry
        self._sites = sites
        self._site_lookup = None
        self.region_button.setEnabled(geometry is not None)
        if sites is not None and len(sites):
            lut = np.full((sites.n_rows, sites.n_cols), -1, dtype=np.int64)
            lut[sites.rows - sites.row_min, sites.cols - sites.col_min] = np.arange(len(sites))
            self._site_lookup = lut
        self._rescale_markers()
        if geometry is None or self._image is None:
            self.grid_item.setData([], [])
            self._grid_shape = None
        elif not same_grid:
            x, y = grid_segments(geometry, self._image.shape)
            self.grid_item.setData(x, y, connect="pairs")
            self._grid_shape = self._image.shape
        if sites is None:
            self.set_site_states(None, None, None)
        self.grid_item.setVisible(self.grid_check.isChecked())

    def _sync_views(self, source, target) -> None:
        if self._syncing or not self.model_view.isVisible():
            return
        self._syncing = True
        try:
            target.setRange(source.viewRect(), padding=0)
        finally:
            self._syncing = False

    def _rescale_markers(self) -> None:
        """Marker sizes (screen pixels) = fraction of the lattice spacing at the current zoom."""
        if self._geometry is None:
            return
        width = self.view.width()
        x0, x1 = self.view.viewRange()[0]
        if width <= 0 or x1 <= x0:
            return
        spacing_px = min(self._geometry.spacings) * width / (x1 - x0)
        key = round(spacing_px, 1)
        if key == self._marker_px:
            return
        self._marker_px = key
        self.hover_item.setSize(float(np.clip(0.95 * spacing_px, 6.0, 100.0)))

    def set_site_states(self, occupied, p_occupied, amplitudes) -> None:
        """Colour the site markers (arrays over the current SiteGrid); None hides them."""
        self._occupied = None if occupied is None else np.asarray(occupied)
        self._p = None if p_occupied is None else np.asarray(p_occupied)
        self._amplitudes = None if amplitudes is None else np.asarray(amplitudes)
        if self._sites is None or self._occupied is None:
            for state, item in self.site_items.items():
                item.setData([], [])
                self.marker_counts[state] = 0
            self._drawn_markers.clear()
            return
        x, y = self._sites.x, self._sites.y
        occ = self._occupied.astype(bool)
        with np.errstate(invalid="ignore"):
            unc = np.zeros_like(occ) if self._p is None else (self._p >= 0.1) & (self._p <= 0.9)
        spacing = min(self._geometry.spacings) if self._geometry is not None else 1.0
        drawn = self._drawn_markers
        for state, sel in (("occupied", occ & ~unc), ("empty", ~occ & ~unc), ("uncertain", unc)):
            radius = self._marker_radius[state] * spacing
            key = drawn.get(state)
            if (key is not None and key[0] == radius and np.array_equal(key[1], sel) and np.array_equal(key[2], x)
                    and np.array_equal(key[3], y)):
                continue  # same sites in this state (e.g. a small threshold step): keep the drawn path
            rx, ry = ring_paths(x[sel], y[sel], radius=radius, n_corners=6 if state != "empty" else 4)
            self.site_items[state].setData(rx, ry, connect="finite")
            self.marker_counts[state] = int(np.count_nonzero(sel))
            drawn[state] = (radius, sel, np.array(x, copy=True), np.array(y, copy=True))
        visible = self.sites_check.isChecked()
        for item in self.site_items.values():
            item.setVisible(visible)
        self._update_legend()

    def _update_legend(self) -> None:
        self.legend.setVisible(self.sites_check.isChecked() and self._occupied is not None
                               and self._sites is not None)

    # ------------------------------------------------------------------ colours and scale
    @property
    def color_map_name(self) -> str:
        return self._cmap

    def set_color_map(self, name: str) -> None:
        """Use colour map ``name`` (:data:`COLOR_MAPS`) for the image, the model and the markers."""
        cmap = color_map(name)
        self._cmap = name
        levels = self.lut.getLevels()
        self.lut.gradient.setColorMap(cmap)
        self.lut.gradient.showTicks(False)
        self.lut.setLevels(*levels)
        self.model_item.setColorMap(cmap)
        for state, item in self.site_items.items():
            item.setPen(_marker_pen(state, name))
            self._legend_samples[state].setSymbolPen(pg.mkPen(COLOR_MAPS[name][state], width=2))
        self.overlaysChanged.emit(self.overlays())

    def marker_colors(self) -> dict:
        """(r, g, b) of the occupied / empty / uncertain markers in the current colour map."""
        return dict(COLOR_MAPS[self._cmap])

    def set_pixel_size(self, pixel_size_nm) -> None:
        """Pixel size in the atom plane (nm) for the scale bar; None hides the bar."""
        self._pixel_size_nm = float(pixel_size_nm) if pixel_size_nm else None
        self._update_scale_bar()

    def _update_scale_bar(self) -> None:
        if self._pixel_size_nm is None or self._image is None:
            if self.scale_bar is not None:
                self.scale_bar.setVisible(False)
            return
        um_per_px = self._pixel_size_nm / 1000.0
        length_um = nice_scale_length_um(self._image.shape[1] * um_per_px)
        if self.scale_bar is None:
            self.scale_bar = pg.ScaleBar(size=1.0, width=4, brush=pg.mkBrush(255, 255, 255), pen=pg.mkPen(0, 0, 0),
                                         offset=(-12, -12))
            self.scale_bar.setParentItem(self.view)
        bar = self.scale_bar
        bar.size = length_um / um_per_px  # frame pixels: the bar zooms with the image
        bar.updateBar()
        bar.text.setText(f"{length_um:g} \u00b5m")
        bar.setToolTip(f"{length_um:g} micrometres in the atom plane ({self._pixel_size_nm:g} nm per pixel)")
        bar.setVisible(True)
        self.scale_bar_length_um = length_um

    def shows_result(self, sites, occupied) -> bool:
        """True when the markers already show exactly these (identical) site and occupation arrays."""
        return sites is not None and sites is self._sites and occupied is not None and occupied is self._occupied

    def set_grid_visible(self, visible: bool) -> None:
        self.grid_check.setChecked(bool(visible))

    def set_sites_visible(self, visible: bool) -> None:
        self.sites_check.setChecked(bool(visible))

    def toggle_grid(self) -> None:
        self.grid_check.toggle()

    def _toggled(self, _checked=None) -> None:
        self.grid_item.setVisible(self.grid_check.isChecked())
        for item in self.site_items.values():
            item.setVisible(self.sites_check.isChecked())
        self._update_legend()
        self.overlaysChanged.emit(self.overlays())

    def overlays(self) -> dict:
        return {"grid": self.grid_check.isChecked(), "sites": self.sites_check.isChecked(), "mode": self._mode,
                "colormap": self._cmap}

    # ------------------------------------------------------------------ raw vs model
    @property
    def view_mode(self) -> str:
        return self._mode

    def set_view_mode(self, mode: str) -> None:
        if mode not in VIEW_MODES:
            raise ValueError(f"unknown view mode {mode!r}; use one of {', '.join(VIEW_MODES)}")
        self.mode_combo.setCurrentIndex(list(VIEW_MODES).index(mode))

    def _mode_changed(self, _i: int) -> None:
        self._mode = self.mode_combo.currentData()
        side = self._mode == "side"
        self.model_view.setVisible(side)
        layout = self.graphics.ci.layout
        layout.setColumnStretchFactor(0, 1)
        layout.setColumnStretchFactor(1, 1 if side else 0)
        layout.setColumnMaximumWidth(1, 1e6 if side else 0)
        self.graphics.ci.updateGeometry()
        if side:
            QtCore.QTimer.singleShot(0, lambda: self._sync_views(self.view, self.model_view))
        self.blend_slider.setEnabled(self._mode == "blend")
        self._update_display(auto_levels=True)
        if self._mode != "raw" and self._model is None and self._image is not None:
            self.modelWanted.emit()
        self.overlaysChanged.emit(self.overlays())

    def set_model(self, model) -> None:
        """Model image in photons (same shape as the frame) or None."""
        self._model = None if model is None else np.asarray(model, dtype=float)
        self._update_display(auto_levels=True)

    @property
    def has_model(self) -> bool:
        return self._model is not None

    def _update_display(self, auto_levels: bool = False) -> None:
        if self._image is None:
            return
        mode = self._mode
        if mode == "raw" or self._model is None:
            shown = self._image
        elif mode == "model":
            shown = self._model
        elif mode == "side":
            shown = self._image
            self.model_item.setImage(self._model, autoLevels=True)
            self._centre_pixels(self.model_item)
            self._sync_views(self.view, self.model_view)
        else:  # blend in photons
            w = self.blend_slider.value() / 100.0
            raw = self._photons if self._photons is not None else self._image.astype(float)
            shown = (1 - w) * raw + w * self._model
        self.lut.axis.setLabel("counts" if shown is self._image else "photons")
        self.image_item.setImage(shown, autoLevels=auto_levels)
        self._centre_pixels(self.image_item)
        if auto_levels:
            finite = np.asarray(shown, dtype=float)
            finite = finite[np.isfinite(finite)]
            if finite.size:
                lo, hi = np.percentile(finite, [0.5, 99.9])
                self.lut.setLevels(float(lo), float(hi) if hi > lo else float(lo) + 1.0)

    def set_region(self, region, excluded=None) -> None:
        """Show the calibration's analysed region and the sites it leaves out (SiteGrid or None)."""
        xy = None if excluded is None else (excluded.x, excluded.y)
        self.region_editor.set_region(region, excluded_xy=xy)
        self._excluded_lookup = set() if excluded is None else set(zip(excluded.rows.tolist(),
                                                                       excluded.cols.tolist()))

    @staticmethod
    def _centre_pixels(item) -> None:
        """Draw pixel (r, c) centred on (x, y) = (c, r): the coordinates of the sites and region shapes."""
        image = item.image
        if image is not None:
            h, w = image.shape[:2]
            item.setRect(QtCore.QRectF(-0.5, -0.5, w, h))

    # ------------------------------------------------------------------ hover
    def site_at(self, x: float, y: float) -> dict:
        """What lies under pixel position ``(x, y)``: pixel value and, over a site, its data."""
        info: dict = {"x": float(x), "y": float(y)}
        if self._image is not None:
            h, w = self._image.shape
            ix, iy = int(round(x)), int(round(y))
            if 0 <= ix < w and 0 <= iy < h:
                info["value"] = float(self._image[iy, ix])
        if self._geometry is None:
            return info
        fr, fc = self._geometry.fractional_indices(x, y)
        row, col = int(np.rint(fr)), int(np.rint(fc))
        if (row, col) in self._excluded_lookup:
            info.update(row=row, col=col, excluded=True)
            return info
        if self._site_lookup is None:
            return info
        s = self._sites
        r, c = row - s.row_min, col - s.col_min
        if 0 <= r < s.n_rows and 0 <= c < s.n_cols and self._site_lookup[r, c] >= 0:
            k = int(self._site_lookup[r, c])
            info.update(row=row, col=col, site_x=float(s.x[k]), site_y=float(s.y[k]))
            if self._amplitudes is not None:
                info["amplitude"] = float(self._amplitudes[k])
            if self._p is not None:
                info["p_occupied"] = float(self._p[k])
            if self._occupied is not None:
                info["occupied"] = int(self._occupied[k])
        return info

    def _mouse_moved(self, pos) -> None:
        if self._image is None:
            return
        if not self.view.sceneBoundingRect().contains(pos):
            self.hover_item.setData([], [])
            self.siteHovered.emit(None)
            return
        p = self.view.mapSceneToView(pos)
        info = self.site_at(p.x(), p.y())
        if "site_x" in info:
            self.hover_item.setData([info["site_x"]], [info["site_y"]])
        else:
            self.hover_item.setData([], [])
        self.siteHovered.emit(info)

    def _mouse_clicked(self, event) -> None:
        if self._image is None or event.button() != QtCore.Qt.MouseButton.LeftButton or event.double():
            return
        pos = event.scenePos()
        if not self.view.sceneBoundingRect().contains(pos):
            return
        p = self.view.mapSceneToView(pos)
        info = self.site_at(p.x(), p.y())
        if "row" in info:
            self.siteClicked.emit(info)
