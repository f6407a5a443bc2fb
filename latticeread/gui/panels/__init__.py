"""Analysis panels of the desktop program: pure views with ``set_*`` methods and Qt signals.

Every panel is a ``QWidget`` built with ``parent=None`` only. It never imports the session
model and never computes a result: the main window feeds it data through its ``set_*``
methods and listens to its signals. Setting data programmatically never emits a signal;
signals fire only for user actions.

=================  =====================================================================
panel              module (see its docstring for every set_* method and signal)
=================  =====================================================================
GeometryPanel      :mod:`latticeread.gui.panels.geometry_panel` -- Fourier spectrum with
                   reciprocal peaks, lattice vectors, fit quality, constraints, manual
                   nudges, phase drift over the stack.
PSFPanel           :mod:`latticeread.gui.panels.psf_panel` -- PSF image, radial profile
                   against the ideal Airy pattern for the entered optics, FWHM, atoms used.
HistogramPanel     :mod:`latticeread.gui.panels.histogram_panel` -- site-amplitude
                   histogram, fitted components, draggable threshold, FP/FN rates.
FidelityPanel      :mod:`latticeread.gui.panels.fidelity_panel` -- loss and hopping with
                   intervals, per-shot trend, P(site read correctly), warnings.
ObservablesPanel   :mod:`latticeread.gui.panels.observables_panel` -- density map,
                   profiles, connected correlator, staggered order of the shots.
=================  =====================================================================

Panel classes are imported lazily (``from latticeread.gui.panels import HistogramPanel``
works) so that importing one panel does not pull in the others.
"""

from __future__ import annotations

import importlib
import math

__all__ = ["GeometryPanel", "PSFPanel", "HistogramPanel", "FidelityPanel", "ObservablesPanel", "WARNING_STYLE", "fmt",
           "rate_pct", "show_warnings"]

_LAZY = {
    "GeometryPanel": "latticeread.gui.panels.geometry_panel",
    "PSFPanel": "latticeread.gui.panels.psf_panel",
    "HistogramPanel": "latticeread.gui.panels.histogram_panel",
    "FidelityPanel": "latticeread.gui.panels.fidelity_panel",
    "ObservablesPanel": "latticeread.gui.panels.observables_panel",
}

#: Style sheet of the label that lists warnings (red, bold, framed) in every panel.
WARNING_STYLE = (
    "QLabel { color: #b00020; font-weight: bold; border: 1px solid #b00020;"
    " border-radius: 3px; padding: 3px; background: #fff0f0; }"
)


def fmt(value, digits: int = 3, unit: str = "") -> str:
    """Format a number for a label: ``-`` for None/NaN, ``digits`` significant figures."""
    if value is None:
        return "-"
    try:
        v = float(value)
    except (TypeError, ValueError):
        return str(value)
    if not math.isfinite(v):
        return "-"
    text = f"{v:.0f}" if abs(v) >= 10 ** digits else f"{v:.{digits}g}"
    return f"{text} {unit}".rstrip()


#: Percentages below this are shown as "< 1e-6 %" (a tail probability such as 1e-225 % only
#: says "none in any realistic number of images").
SMALLEST_PERCENT = 1e-6


def rate_pct(rate, digits: int = 2) -> str:
    """Format a probability (fraction 0..1) as a percentage for a label.

    ``-`` for None/NaN, ``0 %`` for zero, ``< 1e-6 %`` below :data:`SMALLEST_PERCENT`,
    otherwise ``digits`` significant figures below 1 % and ``digits`` decimals above.
    """
    try:
        v = 100.0 * float(rate)
    except (TypeError, ValueError):
        return "-"
    if not math.isfinite(v):
        return "-"
    if v == 0:
        return "0 %"
    if abs(v) < SMALLEST_PERCENT:
        return f"{'> -' if v < 0 else '< '}1e-6 %"
    if abs(v) < 1:
        return f"{v:.{digits}g} %"
    return f"{v:.{digits}f} %"


def show_warnings(label, warnings) -> None:
    """Put ``warnings`` (iterable of str) into a QLabel styled with WARNING_STYLE; hide it when empty."""
    from latticeread.gui.dialogs import in_window_terms

    items = [in_window_terms(str(w)) for w in (warnings or ()) if str(w)]
    label.setText("\n".join(f"\u26a0 {w}" for w in items))
    label.setVisible(bool(items))


def __getattr__(name):
    if name in _LAZY:
        module = importlib.import_module(_LAZY[name])
        return getattr(module, name)
    raise AttributeError(f"module {__name__!r} has no attribute {name!r}")
