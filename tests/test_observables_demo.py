"""The two ordered demo stacks hold what sample_data/README.md says (checked on their truth files).

Expected values follow from the invented scenario by elementary probability (common practice,
no source): one sublattice filled with probability p = 0.9 gives a staggered order
m = ((2p - 1) + 1) / 2 = p = 0.9 per shot (filled sublattice: mean 2p - 1; empty one: +1); a flat core of filling 0.93
gives a radial profile at 0.93 near the centre.
"""

from __future__ import annotations

from pathlib import Path

import numpy as np

from latticeread.core import observables as ob
from latticeread.io.truth_file import read_truth

ROOT = Path(__file__).resolve().parents[1] / "sample_data"


def _truth_stack(name):
    t = read_truth(ROOT / f"{name}.truth.h5")
    occ = np.asarray(t["initial_occupation"])
    rows = np.asarray(t["site_row"]) - t["row_min"]
    cols = np.asarray(t["site_col"]) - t["col_min"]
    region = np.zeros(occ.shape[1:], bool)
    region[rows, cols] = True
    return np.where(region[None], occ, 255).astype(np.uint8), (int(t["row_min"]), int(t["col_min"]))


def test_checkerboard_demo_is_ordered():
    occ, origin = _truth_stack("demo_checkerboard")
    o = ob.staggered_order(occ, origin=origin)
    assert occ.shape[0] == 40
    assert abs(o.mean_abs - 0.9) < 4 * o.mean_abs_err
    assert np.all(o.per_shot > 0.85)                     # the same sublattice in every shot


def test_mott_demo_has_a_flat_core():
    occ, _ = _truth_stack("demo_mott")
    p = ob.radial_profile(occ)
    core = p.coordinate < 6
    assert np.all(np.abs(p.mean[core] - 0.93) < 4 * p.stderr[core] + 0.02)
    assert p.mean[-1] < 0.05
    assert ob.staggered_order(occ).mean_abs < 0.1
