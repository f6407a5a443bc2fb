"""The outside check: frames of an independent simulator, reconstructed unaided and scored on the truth.

Each case of ``shared/reference-frames`` (beside the checkout; see ``tests/reference_frames.py``)
is calibrated and reconstructed once per test session from its ``frame.tif`` and the optics
and camera of its ``public.json`` only, exactly as the folder's README says a user would. Two
checks per case:

* geometry: every truth site (loaded region and its two empty margin rings, every frame) has a
  reconstructed site within 0.02 of the smallest lattice spacing (the project's target for
  tight lattices; a tenth of a spacing already misplaces the PSF enough to cost fidelity);
* fidelity: the mean per-frame fidelity over all truth sites, scored as the README defines
  (match radius 0.25 x ``spacing_min``, :class:`scipy.spatial.cKDTree`), lies within 0.2
  percentage points of the true-model oracle in ``expected.json``.

Cases the program does not pass yet are marked ``xfail(strict=True)`` with the numbers measured
when the mark was set, so the suite stays green and a fix that makes one pass turns the mark
into a failure that asks for its removal.
"""

from __future__ import annotations

import pytest

import reference_frames as rf

FOLDER = rf.reference_dir()
pytestmark = pytest.mark.skipif(FOLDER is None, reason="the reference frames (../shared/reference-frames beside the "
                                f"checkout, or ${rf.ENV_VAR}) are not on this machine")

#: Largest distance from a truth site to the nearest reconstructed site, in units of spacing_min.
SITE_TOLERANCE = 0.02
#: Largest shortfall of the mean fidelity below the oracle's, as a fraction (0.2 percentage points).
FIDELITY_TOLERANCE = 0.002

CASES = ("r1_square_resolved", "r2_mott_disk", "r3_triangular", "r4_sparse_tight", "r5_field_and_drift",
         "r6_distorted")

#: Cases failing today, with the numbers measured when the mark was set (calibrated with the Airy
#: PSF of public.json, default settings otherwise).
GEOMETRY_XFAIL = {
    "r5_field_and_drift": "max site error 0.101 spacing: the offsets hold every frame within 0.018 spacing, but the "
                          "atoms' lattice is 0.33 % too long: the field-dependent PSF moves the Gaussian-fitted centres "
                          "outward from the optical axis (against the truth: +0.08 px at 50-100 px, +0.21 px at "
                          "100-150 px, +0.60 px beyond; 0.18-0.20 % of scale from the centres alone)",
}
FIDELITY_XFAIL: dict = {}


#: The cases checked in this file; tests/test_reference_frames_more.py checks the others, so
#: that the suite's two worker processes (one file each) share the program runs out.
HERE = ("r1_square_resolved", "r2_mott_disk", "r5_field_and_drift")


def _marked(table, cases=HERE):
    return [pytest.param(c, marks=pytest.mark.xfail(strict=True, reason=table[c])) if c in table else c
            for c in cases]


_RUNS: dict = {}


def _scored(case: str):
    """Run and score ``case`` once per session; a failure of the program is re-raised each time."""
    if case not in _RUNS:
        try:
            run = rf.run_case(FOLDER / case)
            _RUNS[case] = (run, rf.score_case(FOLDER / case, run))
        except Exception as exc:  # the program failed on this case: every check of it fails with the reason
            _RUNS[case] = exc
    got = _RUNS[case]
    if isinstance(got, Exception):
        raise AssertionError(f"{case}: the program failed unaided: {type(got).__name__}: {got}") from got
    return got


def check_geometry(case):
    _, score = _scored(case)
    assert score.max_site_error <= SITE_TOLERANCE, f"{case}: {score.summary()}"


def check_fidelity(case):
    _, score = _scored(case)
    oracle = rf.expected(FOLDER)["cases"][case]["oracle_fidelity_mean"]
    assert score.mean_fidelity >= oracle - FIDELITY_TOLERANCE, (
        f"{case}: {score.summary()}; oracle {oracle:.4f}")


@pytest.mark.parametrize("case", _marked(GEOMETRY_XFAIL))
def test_every_site_within_two_hundredths_of_a_spacing(case):
    check_geometry(case)


@pytest.mark.parametrize("case", _marked(FIDELITY_XFAIL))
def test_fidelity_close_to_the_true_model(case):
    check_fidelity(case)


def test_scorer_counts_missing_and_wrong_sites():
    """The scorer itself, on a truth shifted by known amounts (no program involved)."""
    import numpy as np

    truth = rf.load_truth(FOLDER / "r1_square_resolved")
    x, y = truth["site_x_frames"][:1], truth["site_y_frames"][:1]
    occ = truth["occ_initial"][:1].astype(np.uint8)
    perfect = rf.score_frames(truth, x, y, occ)
    assert perfect.mean_fidelity == 1.0 and perfect.max_site_error == 0.0
    spacing = float(truth["spacing_min"])
    # ten sites dropped, five flipped, everything moved by 0.1 spacing
    flipped = occ.copy()
    flipped[0, 10:15] ^= 1
    n = x.shape[1]
    keep = np.arange(n) >= 10
    score = rf.score_frames(truth, [x[0, keep] + 0.1 * spacing], [y[0, keep]], [flipped[0, keep]])
    assert score.mean_fidelity == pytest.approx(1 - 15 / n)  # sites 0..9 missing, 10..14 wrong
    assert score.unmatched[0] == 10
    assert score.max_site_error > 0.9  # a dropped site's nearest neighbour is about a spacing away
    moved = rf.score_frames(truth, [x[0] + 0.3 * spacing], [y[0]], [occ[0]])
    assert moved.mean_fidelity < 0.05  # beyond the match radius: nothing matches
