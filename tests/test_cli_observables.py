"""``latticeread observables``: run/occupation file in, HDF5 + CSV out, with groups and rates.

Checks against outside references: the values in the file equal those of the core functions
(whose own checks name their sources in tests/test_observables.py); the fidelity report's
95 % interval becomes a standard error with the normal quantile 1.96 (``scipy.stats.norm``).
"""

from __future__ import annotations

import csv
import json
from types import SimpleNamespace

import h5py
import numpy as np
import pytest
from scipy import stats

from latticeread.cli import main
from latticeread.core import observables as ob
from latticeread.io.observables_file import (ParameterFileError, read_observables_attrs, read_occupation_input,
                                             read_shot_parameters)
from latticeread.io.run_file import RunWriter, ShotKey, ShotRecord

CAL = json.dumps({"geometry": {"a1": [5.0, 0.0], "a2": [0.0, 5.0], "offset": [10.0, 10.0]}})
N_SHOTS = 24
SHAPE = (10, 12)


def _occupation(seed=0):
    rng = np.random.default_rng(seed)
    occ = (rng.random((N_SHOTS, *SHAPE)) < 0.4).astype(np.uint8)
    occ[:, 0, 0] = 255
    occ[N_SHOTS // 2:, :, 8:] = 0           # second half: fewer atoms on the right (a transport-like shift)
    occ[:, 0, 0] = 255
    return occ


@pytest.fixture
def run_file(tmp_path):
    occ = _occupation()
    path = tmp_path / "run.h5"
    with RunWriter(path, calibration_json=CAL) as w:
        for i, m in enumerate(occ):
            p = np.where(m == 255, np.nan, np.where(m == 1, 0.99, 0.01))
            w.append(ShotRecord(key=ShotKey("/data/shots.tif", "0" * 32, i), occupation=m, amplitude=p * 900,
                                p_occupied=p, x=p, y=p, flags=np.zeros(SHAPE, np.uint8), offset=(10.0, 10.0),
                                a1=(5.0, 0.0), a2=(0.0, 5.0), threshold=300.0, false_positive_rate=0.01,
                                false_negative_rate=0.02 + 0.001 * (i % 3)))
    return path


@pytest.fixture
def params(tmp_path):
    path = tmp_path / "shots.csv"
    rows = ["shot,hold_ms,label"] + [f"{i},{0 if i < N_SHOTS // 2 else 20},x{i % 2}" for i in range(N_SHOTS)]
    path.write_text("\n".join(rows) + "\n")
    return path


def test_command_writes_hdf5_and_csv_matching_the_core(run_file, tmp_path, capsys):
    out = tmp_path / "obs.h5"
    assert main(["observables", str(run_file), "--out", str(out), "--bootstrap", "20", "-q"]) == 0
    occ = _occupation()
    ref = ob.compute_observables(occ, vectors=((5, 0), (0, 5)), n_bootstrap=20, rng=0,
                                 rates=ob.MisreadRates(0.01, 0.021, 0.0, false_positive_err=0.0,
                                                       false_negative_err=np.std([0.02 + 0.001 * (i % 3)
                                                                                  for i in range(N_SHOTS)],
                                                                                 ddof=1) / np.sqrt(N_SHOTS)))
    with h5py.File(out, "r") as h5:
        g = h5["all"]
        np.testing.assert_allclose(g["density/mean"][()], ref.density.mean, equal_nan=True)
        np.testing.assert_allclose(g["correlator/map"][()], ref.correlator.map, rtol=1e-6)
        np.testing.assert_allclose(g["correlator/err"][()], ref.correlator.err, rtol=1e-6)
        np.testing.assert_allclose(g["order/per_shot"][()], ref.order.per_shot)
        np.testing.assert_allclose(g["structure/s"][()], ref.structure.s, rtol=1e-6)
        np.testing.assert_allclose(g["corrected/density"][()], ref.corrected.density, rtol=1e-9, equal_nan=True)
        assert g["density/mean"].attrs["units"].startswith("atoms per site")
        assert g["density/posterior_mean"].shape == SHAPE
    attrs = read_observables_attrs(out)
    assert attrs["inputs"]["format"] == "latticeread-run" and attrs["inputs"]["n_shots"] == N_SHOTS
    assert attrs["inputs"]["shots"][3]["frame_index"] == 3
    assert attrs["settings"]["vectors"] == [[5.0, 0.0], [0.0, 5.0]]
    corr = attrs["settings"]["misread_correction"]
    assert corr["applied"] and "threshold fits of 24 shot(s)" in corr["sources"]["false_negative"]
    with open(out.with_name("obs.profiles.csv"), newline="") as fh:
        rows = list(csv.DictReader(fh))
    radial = [r for r in rows if r["profile"] == "radial"]
    np.testing.assert_allclose([float(r["mean"]) for r in radial], ref.radial.mean)
    assert json.loads(out.with_name("obs.profiles.csv.json").read_text())["columns"]["mean"] == "atoms per site"


def test_group_by_writes_each_group_and_transport(run_file, params, tmp_path, capsys):
    out = tmp_path / "g.h5"
    code = main(["observables", str(run_file), "--out", str(out), "--params", str(params), "--group-by", "hold_ms",
                 "--bootstrap", "20", "--centre", "5", "6"])
    assert code == 0
    text = capsys.readouterr().out
    assert "along a1 by hold_ms" in text and "wrote" in text
    with h5py.File(out, "r") as h5:
        assert sorted(h5["by_hold_ms"]) == ["0", "20"]
        np.testing.assert_array_equal(h5["by_hold_ms/20/shots"][()], np.arange(N_SHOTS // 2, N_SHOTS))
        t = h5["transport_a2"]
        # fewer atoms on the right in the second group: the centre of mass along a2 moves left
        assert t["delta_com"][1] < -3 * t["delta_com_err"][1]
    with open(out.with_name("g.transport.csv"), newline="") as fh:
        rows = list(csv.DictReader(fh))
    assert [r["hold_ms"] for r in rows if r["axis"] == "a1"] == ["0", "20"]


def test_keep_and_min_atoms_post_select(run_file, params, tmp_path):
    out = tmp_path / "k.h5"
    assert main(["observables", str(run_file), "--out", str(out), "--params", str(params),
                 "--keep", "hold_ms", "0", "5", "--bootstrap", "20", "-q"]) == 0
    with h5py.File(out, "r") as h5:
        np.testing.assert_array_equal(h5["all/shots"][()], np.arange(N_SHOTS // 2))


def test_min_atoms_selecting_too_few_is_an_error(run_file, tmp_path, capsys):
    code = main(["observables", str(run_file), "--out", str(tmp_path / "x.h5"), "--min-atoms", "1e6", "-q"])
    assert code == 3
    assert "only 0 of 24 shots pass the post-selection" in capsys.readouterr().err


def test_fidelity_report_rates_and_command_line_override(run_file, tmp_path):
    report = tmp_path / "fid.json"
    report.write_text(json.dumps({"format": "latticeread-fidelity",
                                  "loss": {"value": 0.02, "low": 0.01, "high": 0.03},
                                  "false_positive_rate": {"value": None}, "false_negative_rate": {"value": None}}))
    out = tmp_path / "f.h5"
    assert main(["observables", str(run_file), "--out", str(out), "--fidelity", str(report),
                 "--false-positive", "0.005", "--bootstrap", "20", "-q"]) == 0
    info = read_observables_attrs(out)["settings"]["misread_correction"]
    assert info["loss"][0] == 0.02
    # 95 % interval -> standard error with the normal quantile (scipy.stats.norm.ppf(0.975))
    assert info["loss"][1] == pytest.approx(0.01 / stats.norm.ppf(0.975))
    assert info["false_positive"] == [0.005, 0.0] and info["sources"]["false_positive"] == "command line"


def test_no_rates_means_no_correction_and_says_why(tmp_path, capsys):
    occ = _occupation()
    path = tmp_path / "run.h5"
    with RunWriter(path, calibration_json=CAL) as w:
        for i, m in enumerate(occ):
            p = np.where(m == 255, np.nan, m.astype(float))
            w.append(ShotRecord(key=ShotKey("/d.tif", "1" * 32, i), occupation=m, amplitude=p, p_occupied=p, x=p,
                                y=p, flags=np.zeros(SHAPE, np.uint8), offset=(0, 0), a1=(5, 0), a2=(0, 5),
                                threshold=1.0))
    out = tmp_path / "n.h5"
    assert main(["observables", str(path), "--out", str(out), "--bootstrap", "20"]) == 0
    assert "not applied: no false-positive and no false-negative rate" in capsys.readouterr().out
    with h5py.File(out, "r") as h5:
        assert "corrected" not in h5["all"]


def test_occupation_file_input(tmp_path):
    from latticeread.io.export import write_occupation_hdf5

    rng = np.random.default_rng(3)
    rows, cols = np.meshgrid(np.arange(2, 8), np.arange(-1, 6), indexing="ij")
    results = []
    for i in range(6):
        occ = (rng.random(rows.size) < 0.5).astype(np.uint8)
        sites = SimpleNamespace(rows=rows.ravel(), cols=cols.ravel(), x=cols.ravel() * 5.0, y=rows.ravel() * 5.0)
        results.append(SimpleNamespace(sites=sites, amplitudes=occ * 900.0, occupied=occ,
                                       p_occupied=occ * 0.98 + 0.01, frame_index=i, threshold=400.0,
                                       geometry=SimpleNamespace(offset=(0.0, 0.0), a1=(0.0, 5.0), a2=(5.0, 0.0))))
    from pathlib import Path

    from latticeread.io import load_calibration

    cal = load_calibration(Path(__file__).resolve().parents[1] / "sample_data" / "demo_mott.calibration.json")
    assert cal.threshold_fit is not None
    path = tmp_path / "sites.h5"
    write_occupation_hdf5(path, results, calibration=cal)
    inp = read_occupation_input(path)
    assert inp.origin == (2, -1) and inp.occupation.shape == (6, 6, 7)
    # without per-shot rates the misread rates come from the stored calibration's threshold fit
    np.testing.assert_array_equal(inp.false_positive, cal.threshold_fit.false_positive_rate)
    np.testing.assert_array_equal(inp.false_negative, cal.threshold_fit.false_negative_rate)
    np.testing.assert_allclose(inp.vectors, [(0.0, 5.0), (5.0, 0.0)])
    out = tmp_path / "o.h5"
    assert main(["observables", str(path), "--out", str(out), "--bootstrap", "20", "-q"]) == 0
    with h5py.File(out, "r") as h5:
        np.testing.assert_allclose(h5["all/order/per_shot"][()],
                                   ob.staggered_order(inp.occupation, origin=(2, -1)).per_shot)


def test_parameter_tables_csv_and_json(tmp_path):
    j1 = tmp_path / "a.json"
    j1.write_text(json.dumps({"0": {"hold_ms": 5, "tag": "a"}, "2": {"hold_ms": 7.5}}))
    p = read_shot_parameters(j1, n_shots=3)
    assert p["hold_ms"][0] == 5 and np.isnan(p["hold_ms"][1]) and p["hold_ms"][2] == 7.5 and p["tag"][0] == "a"
    j2 = tmp_path / "b.json"
    j2.write_text(json.dumps({"shot": [1, 0], "v": [3, 4]}))
    assert read_shot_parameters(j2, n_shots=2)["v"] == [4, 3]
    j3 = tmp_path / "c.json"
    j3.write_text(json.dumps([{"shot": 0, "v": 1}]))
    assert read_shot_parameters(j3, n_shots=1)["v"] == [1]
    c = tmp_path / "d.csv"
    c.write_text("idx,v\n1,2.5\n0,x\n")
    assert read_shot_parameters(c, n_shots=2)["v"] == ["x", 2.5]


@pytest.mark.parametrize("name, text, match", [
    ("a.txt", "shot,v\n0,1\n", "must end in .csv or .json"),
    ("a.csv", "shot,v\n", "needs a header line and at least one row"),
    ("a.csv", "shot,v\n0,1,2\n", "line 2 has 3 fields but the header has 2"),
    ("a.csv", "shot,v\n7,1\n", "shot 7 does not exist \\(the input has shots 0..2\\)"),
    ("a.csv", "shot,v\n1,1\n1,2\n", "shot 1 is listed twice"),
    ("a.csv", "shot,v\none,1\n", "shot index 'one' is not a whole number"),
    ("a.csv", "shot\n1\n", "no parameter columns"),
    ("a.json", "{", "not valid JSON"),
    ("a.json", '{"0": 5}', "entry of shot '0' must be an object"),
    ("a.json", '{"shot": [0, 1], "v": [1]}', "different lengths"),
    ("a.json", "[1, 2]", "expected an object or a list of records"),
    ("a.json", '[{"v": 1}]', "a record has no 'shot' index"),
])
def test_parameter_table_errors(tmp_path, name, text, match):
    path = tmp_path / name
    path.write_text(text)
    with pytest.raises(ParameterFileError, match=match):
        read_shot_parameters(path, n_shots=3)


def test_parameter_table_missing(tmp_path):
    with pytest.raises(ParameterFileError, match="does not exist"):
        read_shot_parameters(tmp_path / "none.csv", n_shots=3)


@pytest.mark.parametrize("extra, match", [
    (["--group-by", "hold_ms"], "--group-by needs a parameter table"),
    (["--keep", "hold_ms", "0", "1"], "--keep needs a parameter table"),
    (["--params", "PARAMS", "--group-by", "temperature"], "no column 'temperature'; it has hold_ms, label"),
    (["--false-positive", "1.5"], "--false-positive must be a probability"),
    (["--loss", "0.01", "--loss-uncertainty", "-1"], "--loss-uncertainty must be 0 or more"),
    (["--fidelity", "REPORT"], "is not a report of 'latticeread fidelity'"),
])
def test_command_errors(run_file, params, tmp_path, capsys, extra, match):
    report = tmp_path / "r.json"
    report.write_text("{}")
    extra_raw = extra
    extra = [str(params) if e == "PARAMS" else str(report) if e == "REPORT" else e for e in extra]
    code = main(["observables", str(run_file), "--out", str(tmp_path / "e.h5"), "-q", *extra])
    assert code == (3 if "REPORT" in extra_raw else 2)
    assert match.replace("\\", "") in capsys.readouterr().err


def test_refuses_to_overwrite_without_force(run_file, tmp_path, capsys):
    out = tmp_path / "obs.h5"
    out.write_bytes(b"keep me")
    assert main(["observables", str(run_file), "--out", str(out), "-q"]) != 0
    assert "exists; pass --force to overwrite it" in capsys.readouterr().err
    assert out.read_bytes() == b"keep me"
    (tmp_path / "obs2.profiles.csv").write_text("keep")
    assert main(["observables", str(run_file), "--out", str(tmp_path / "obs2.h5"), "-q"]) != 0
    assert main(["observables", str(run_file), "--out", str(out), "--force", "--bootstrap", "20", "-q"]) == 0
    assert read_observables_attrs(out)["format"] == "latticeread-observables"


@pytest.mark.parametrize("make, match", [
    (lambda p: None, "does not exist"),
    (lambda p: p.write_bytes(b"not hdf5"), "not a readable HDF5 file"),
    (lambda p: h5py.File(p, "w").close(), "holds no occupation matrices"),
])
def test_bad_inputs(tmp_path, capsys, make, match):
    path = tmp_path / "in.h5"
    make(path)
    code = main(["observables", str(path), "--out", str(tmp_path / "o.h5"), "-q"])
    assert code == 3
    assert match in capsys.readouterr().err


def test_wrong_output_suffix(run_file, tmp_path, capsys):
    assert main(["observables", str(run_file), "--out", str(tmp_path / "o.csv")]) == 2
    assert "must end in .h5 or .hdf5" in capsys.readouterr().err


def test_shots_with_different_origins_are_aligned():
    from latticeread.io.observables_file import _aligned

    occ = np.array([[[1, 0], [0, 1]], [[0, 1], [1, 1]]], np.uint8)
    post = occ.astype(float)
    out, p, origin = _aligned(occ, post, [(3, 5), (4, 4)])
    assert origin == (3, 4) and out.shape == (2, 3, 3)
    np.testing.assert_array_equal(out[0], [[255, 1, 0], [255, 0, 1], [255, 255, 255]])
    np.testing.assert_array_equal(out[1], [[255, 255, 255], [0, 1, 255], [1, 1, 255]])
    assert np.isnan(p[1, 0, 0]) and p[1, 2, 1] == 1
    same, _, o = _aligned(occ, post, [(1, 2), (1, 2)])
    assert same is occ and o == (1, 2)
