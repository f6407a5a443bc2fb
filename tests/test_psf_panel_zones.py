"""The PSF panel's zone view: zone PSFs in their places across the field, their widths, too-few-atom zones."""

import numpy as np
import pytest

from latticeread.core.psf import gaussian_psf
from latticeread.core.psf_zones import ZonePSFs
from latticeread.gui.panels.psf_panel import PSFPanel


def _zones():
    widths = [2.4, 2.6, 3.0, 2.5, 2.4, 2.8, 2.9, 2.8, 3.3]
    psfs = tuple(gaussian_psf(fwhm=w, radius=7) for w in widths)
    fitted = (True,) * 8 + (False,)
    return ZonePSFs(grid=(3, 3), bounds=(10, 100, 10, 100), psfs=psfs, n_atoms=(90,) * 8 + (12,), fitted=fitted,
                    fwhm=tuple(widths), warnings=("PSF zone (row 3, column 3): only 12 atoms in 3 frame(s) (need 40); "
                                                  "it uses the PSF of the whole region",))


@pytest.fixture
def panel(qtbot):
    p = PSFPanel()
    qtbot.addWidget(p)
    p.resize(900, 420)
    p.set_psf(gaussian_psf(fwhm=2.7, radius=7))
    return p


def test_zone_view_shows_widths_and_few_atom_zones(panel):
    assert not panel.zones_plot.isVisibleTo(panel)
    panel.set_zones(_zones())
    assert panel.zones_plot.isVisibleTo(panel)
    texts = [item.textItem.toPlainText() for item in panel._zone_labels]
    assert len(texts) == 9 and texts[0] == "2.40 px" and texts[8] == "3.30 px\nfew atoms"
    assert "zone PSFs 3x3" in panel.numbers_label.text() and "2.40-3.30 px" in panel.numbers_label.text()
    assert "only 12 atoms" in panel.warnings_label.text()
    image = panel._zones_image.image
    assert image.shape[0] == image.shape[1] and np.nanmax(image) == pytest.approx(1.0)
    panel.grab().save("/tmp/psf_panel_zones.png")
    panel.set_zones(None)
    assert not panel.zones_plot.isVisibleTo(panel) and panel._zone_labels == []
    assert "zone PSFs" not in panel.numbers_label.text()
