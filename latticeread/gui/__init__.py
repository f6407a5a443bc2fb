"""The desktop program (PySide6 + pyqtgraph). The only package that imports Qt.

:mod:`~latticeread.gui.app` starts it; :mod:`~latticeread.gui.main_window` wires the views
(:mod:`~latticeread.gui.image_pane`, :mod:`~latticeread.gui.occupation_view` and the panels in
:mod:`latticeread.gui.panels`) to a :class:`latticeread.session.Session`; long work runs in
:mod:`~latticeread.gui.workers`.
"""
