"""A lattice found too fine is made coarse again (latticeread.core.sublattice).

Sources: the number of sublattices of index n of Z^2 is sigma(n), the sum of the divisors of n
(standard lattice algebra, e.g. Cohen, *A Course in Computational Algebraic Number Theory*,
2.4.2, quoted from memory): 3, 4, 7 for n = 2, 3, 4. The binomial tail for the chance share
is checked with scipy.stats.binom.
"""

import warnings

import numpy as np
import pytest
from scipy import stats

from latticeread.core.geometry import LatticeGeometry
from latticeread.core.lattice import offset_error
from latticeread.core.sublattice import MIN_ATOMS, MIN_SHARE, coarsest_lattice, sublattice_forms

TRUE = LatticeGeometry(a1=(0.55, 5.975), a2=(5.975, -0.55), offset=(80.3, 79.6))


def _fine(geometry, form):
    """A lattice of which ``geometry`` is the sublattice spanned by ``form`` (integer columns)."""
    basis = geometry.basis @ np.linalg.inv(form)
    return LatticeGeometry(a1=tuple(basis[:, 0]), a2=tuple(basis[:, 1]), offset=geometry.offset)


def _atoms(geometry, n, seed, *, frames=1, drift=0.0, jitter=0.15):
    rng = np.random.default_rng(seed)
    rows, cols = rng.integers(-12, 13, size=(2, n))
    frame = rng.integers(0, frames, size=n)
    x, y = geometry.site_positions(rows, cols)
    x = x + drift * frame + rng.normal(0, jitter, n)
    y = y + rng.normal(0, jitter, n)
    return x, y, frame


def _same_lattice(a, b, atol=1e-6):
    """Same sites: one basis is the other times a unimodular integer matrix (within atol)."""
    m = np.linalg.inv(a.basis) @ b.basis
    return np.allclose(m, np.rint(m), atol=atol) and abs(abs(np.linalg.det(np.rint(m))) - 1) < 1e-9


@pytest.mark.parametrize("index, count", [(2, 3), (3, 4), (4, 7)])
def test_one_hermite_form_per_sublattice(index, count):
    forms = sublattice_forms(index)
    assert len(forms) == count  # sigma(n)
    assert all(round(abs(np.linalg.det(f))) == index for f in forms)
    # distinct sublattices: no form's columns lie in another's span
    for i, f in enumerate(forms):
        for g in forms[i + 1:]:
            assert not np.allclose(np.linalg.solve(g, f) % 1, 0)


@pytest.mark.parametrize("form", [np.array([[1, 1], [-1, 1]]), np.array([[2, 0], [0, 1]]),
                                  np.array([[2, 0], [0, 2]]), np.array([[2, 1], [-1, 1]])])
def test_atoms_on_a_lattice_found_too_fine_give_back_the_true_one(form):
    x, y, frame = _atoms(TRUE, 70, seed=1, frames=3, drift=1.7)
    fine = _fine(TRUE, form)
    test = coarsest_lattice(fine, x, y, frame=frame)
    assert test.index == round(abs(np.linalg.det(form)))
    assert test.share == 1.0 and test.n_atoms == 70
    assert _same_lattice(test.geometry, TRUE)
    # the offset is the first frame's, as the input's (the other frames drifted by 1.7 px each)
    assert offset_error(test.geometry, TRUE) < 0.5


def test_atoms_loaded_at_random_on_the_true_lattice_leave_it_alone():
    x, y, frame = _atoms(TRUE, 400, seed=2)
    test = coarsest_lattice(TRUE, x, y, frame=frame)
    assert not test.too_fine and test.index == 1
    assert test.geometry is TRUE


def test_chance_share_at_the_minimum_is_negligible():
    # 20 atoms loaded at random on two cosets: the chance that 19 or more land on one of them
    p = 2 * stats.binom.sf(np.ceil(MIN_SHARE * MIN_ATOMS) - 1, MIN_ATOMS, 0.5)
    assert p < 1e-4


def test_too_few_atoms_are_not_tested():
    x, y, frame = _atoms(TRUE, MIN_ATOMS - 1, seed=3)
    test = coarsest_lattice(_fine(TRUE, np.array([[1, 1], [-1, 1]])), x, y, frame=frame)
    assert test.index == 1 and test.n_atoms == MIN_ATOMS - 1


def test_refuses_mismatched_lengths():
    with pytest.raises(ValueError, match="same length"):
        coarsest_lattice(TRUE, [1.0, 2.0], [1.0], frame=[0, 0])


@pytest.fixture(scope="module")
def few_atoms():
    """Three 160x160 frames, spacing 6 px = 1.2 FWHM (Airy), filling 0.3, 600 photons."""
    from latticeread.core.psf import airy_psf
    from latticeread.core.simulate import simulate_frames

    # Born & Wolf: FWHM = 0.514 lambda / NA; this pixel size makes it 5 pixels
    psf = airy_psf(wavelength_nm=767.0, numerical_aperture=0.75, pixel_size_nm=0.514 * 767.0 / 0.75 / 5.0)
    frames, _ = simulate_frames(geometry=TRUE, frame_shape=(160, 160), psf=psf, filling=0.3,
                                photons_per_atom=600.0, background=2.0, n_shots=3, rng=7, margin=0)
    return frames, psf


def test_calibrate_takes_the_coarser_lattice_when_the_atoms_route_comes_out_too_fine(few_atoms, monkeypatch):
    """The atoms' route as it was before its fit kept only atoms near a site: it returned the
    lattice sqrt(2) finer at 45 degrees (spacing 4.24 px). calibrate must take the true one
    and name the change in the calibration's warnings."""
    import latticeread.core.atoms as atoms_module
    from latticeread.core.pipeline import calibrate
    from latticeread.errors import LatticeReadWarning

    frames, psf = few_atoms
    found = atoms_module.lattice_from_atoms

    def too_fine(*args, **kwargs):
        right = found(*args, **kwargs)
        return _fine(right, np.array([[1, 1], [-1, 1]]))

    monkeypatch.setattr(atoms_module, "lattice_from_atoms", too_fine)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", LatticeReadWarning)
        cal = calibrate(frames, psf=psf, restrict_region=False)
    assert _same_lattice(cal.geometry, TRUE, atol=2e-3), cal.geometry
    assert offset_error(cal.geometry, TRUE) < 0.05 * 6.0
    assert cal.notes["geometry_too_fine"]["index"] == 2
    assert any("one site in 2" in w for w in cal.notes["warnings"])


def test_calibrate_of_a_few_atoms_does_not_report_a_lattice_sqrt2_too_fine(few_atoms):
    """Three 160x160 frames, spacing 6 px = 1.2 FWHM (Airy), filling 0.3, 600 photons: the
    positions of the ~70 atoms that stand apart showed a lattice sqrt(2) finer at 45 degrees
    (spacing 4.24 px) with a spacing 'uncertain to 4e-4'; the true lattice is found now and the
    change is named in the calibration's warnings."""
    from latticeread.core.pipeline import calibrate
    from latticeread.errors import LatticeReadWarning

    frames, psf = few_atoms
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", LatticeReadWarning)
        cal = calibrate(frames, psf=psf, restrict_region=False)
    assert _same_lattice(cal.geometry, TRUE, atol=2e-3), cal.geometry  # spacing within 0.2 %
    assert offset_error(cal.geometry, TRUE) < 0.05 * 6.0
    # the atoms' positions fit may find the true lattice at once (it keeps only atoms near a site);
    # when it did not, the coarser lattice was taken and the change is named
    if "geometry_too_fine" in cal.notes:
        assert cal.notes["geometry_too_fine"]["index"] == 2
        assert any("one site in 2" in w for w in cal.notes["warnings"])
