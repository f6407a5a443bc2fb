"""Atomic writer, per-site CSV, occupation HDF5 and calibration JSON: round trips and failures.

Outside references used here:
* POSIX.1-2008 ``rename()``: replacing a file by rename is atomic, so a reader sees either
  the old or the new file (the basis of the temp-file-then-rename writer).
* Python's float ``repr`` is the shortest string that reads back to the same IEEE-754
  double (Python 3.1+ "short float repr"); so the CSV round trip must be bit-exact.
* ``numpy.loadtxt`` and ``h5py`` as independent readers of the files we write.
* RFC 8259 (JSON): no NaN/Infinity tokens, checked with ``json.loads(parse_constant=...)``.
"""

from __future__ import annotations

import errno
import json
import os
from dataclasses import dataclass, field

import h5py
import numpy as np
import pytest

from latticeread.core.calibration import Calibration
from latticeread.core.camera import CameraModel
from latticeread.core.geometry import LatticeGeometry, LatticeQuality, lattice_sites
from latticeread.core.psf import airy_psf, empirical_psf, gaussian_psf
from latticeread.errors import CalibrationError, ExportError, FrameFileError, ReconstructionError
from latticeread.io import (
    atomic_write,
    load_calibration,
    read_occupation_hdf5,
    read_sites_csv,
    read_sites_metadata,
    save_calibration,
    write_occupation_hdf5,
    write_sites_csv,
)
from latticeread.io.export import sidecar_path


@dataclass(frozen=True)
class FakeResult:
    """The attributes of a per-frame result that the exporters read (duck typing)."""

    frame_index: int
    geometry: LatticeGeometry
    sites: object
    amplitudes: np.ndarray
    occupied: np.ndarray
    p_occupied: np.ndarray
    flags: np.ndarray
    threshold: float
    warnings: tuple = field(default=())


GEOM = LatticeGeometry(a1=(4.1, 0.3), a2=(-0.3, 4.1), offset=(20.25, 19.75))


def make_results(n_frames=3, *, rng=0, shape=(64, 64)):
    rng = np.random.default_rng(rng)
    out = []
    base = lattice_sites(GEOM, shape, margin=3)
    for k in range(n_frames):
        shift = rng.uniform(-0.4, 0.4, 2)
        geom = GEOM.with_offset(np.add(GEOM.offset, shift))
        x, y = geom.site_positions(base.rows, base.cols)
        sites = type(base)(base.rows, base.cols, x, y, base.row_min, base.col_min, base.n_rows, base.n_cols)
        n = len(base)
        occ = (rng.random(n) < 0.4).astype(np.uint8)
        amp = occ * 900.0 + rng.normal(0, 80, n)
        p = np.clip(rng.random(n) * 0.2 + 0.8 * occ, 0, 1)
        flags = rng.choice([0, 0, 0, 1, 16], size=n).astype(np.uint8)
        out.append(FakeResult(k, geom, sites, amp, occ, p, flags, 450.0 + k,
                              warnings=("few atoms",) if k == 1 else ()))
    return out


def make_calibration(kind="airy"):
    if kind == "airy":
        psf = airy_psf(wavelength_nm=767, numerical_aperture=0.75, pixel_size_nm=130)
    elif kind == "gaussian":
        psf = gaussian_psf(fwhm=2.7)
    else:
        rng = np.random.default_rng(3)
        psf = empirical_psf(rng.random((21, 21)) + 1.0, supersample=3, fwhm=2.5, n_atoms=42, ellipticity=0.03)
    geom = LatticeGeometry(a1=(4.0925, 0.0713), a2=(-0.0713, 4.0925), offset=(10.5, 11.25),
                           quality=LatticeQuality(peak_to_background=37.5, residual=float("nan"),
                                                  n_sites_used=312, warnings=("weak peak",)))
    camera = CameraModel(kind="emccd", em_gain=300.0, counts_per_electron=0.17, bias=500.0, read_noise=40.0,
                         quantum_efficiency=0.9, clock_induced_charge=0.005, saturation=65535)
    return Calibration(geometry=geom, psf=psf, camera=camera, frame_shape=(128, 96), threshold=412.5,
                       threshold_method="mixture", pixel_size_nm=130.0,
                       notes={"source": ["run_0042.tif"], "residual": float("inf")})


# --- atomic writer -------------------------------------------------------------------------

def test_atomic_write_replaces_whole_file(tmp_path):
    """POSIX rename(): after the block the target holds exactly the new bytes, no temp left."""
    target = tmp_path / "a.bin"
    target.write_bytes(b"old")
    with atomic_write(target) as fh:
        fh.write(b"new content")
        assert target.read_bytes() == b"old"  # nothing visible before the rename
    assert target.read_bytes() == b"new content"
    assert sorted(p.name for p in tmp_path.iterdir()) == ["a.bin"]


def test_atomic_write_exception_keeps_old_file(tmp_path):
    """An error inside the block leaves the old file and no temporary file (common practice)."""
    target = tmp_path / "a.txt"
    target.write_text("old")
    with pytest.raises(RuntimeError, match="boom"):
        with atomic_write(target, "w") as fh:
            fh.write("half")
            raise RuntimeError("boom")
    assert target.read_text() == "old"
    assert sorted(p.name for p in tmp_path.iterdir()) == ["a.txt"]


def test_atomic_write_keeps_permissions_of_existing_file(tmp_path):
    """Replacing a file keeps its mode bits (what an in-place editor would do; common practice)."""
    target = tmp_path / "a.txt"
    target.write_text("old")
    os.chmod(target, 0o640)
    with atomic_write(target, "w") as fh:
        fh.write("new")
    assert (target.stat().st_mode & 0o777) == 0o640


def test_atomic_write_parent_is_a_file(tmp_path):
    """Running as root, chmod cannot make a folder read-only; a path below a FILE always fails."""
    blocker = tmp_path / "notes.txt"
    blocker.write_text("x")
    with pytest.raises(ExportError, match=r"notes\.txt is a file, not a folder"):
        with atomic_write(blocker / "out.csv", "w") as fh:
            fh.write("a")
    assert blocker.read_text() == "x"


def test_atomic_write_missing_folder(tmp_path):
    with pytest.raises(ExportError, match="does not exist"):
        with atomic_write(tmp_path / "nope" / "out.csv", "w"):
            pass


def test_atomic_write_target_is_folder(tmp_path):
    (tmp_path / "out.csv").mkdir()
    with pytest.raises(ExportError, match="a folder of that name already exists"):
        with atomic_write(tmp_path / "out.csv", "w"):
            pass


def test_atomic_write_refuses_protected_input(tmp_path):
    frames = tmp_path / "run_0042.tif"
    frames.write_bytes(b"II*\x00frames")
    with pytest.raises(ExportError, match="one of the input frame files"):
        with atomic_write(tmp_path / "." / "run_0042.tif", protect={frames}):
            pass
    assert frames.read_bytes() == b"II*\x00frames"


def test_atomic_write_read_only_folder(tmp_path, monkeypatch):
    """Permission denied when creating the temporary file (simulated: tests run as root)."""
    real_open = os.open

    def deny(path, flags, *args, **kw):
        if flags & os.O_CREAT:
            raise PermissionError(errno.EACCES, "Permission denied", str(path))
        return real_open(path, flags, *args, **kw)

    monkeypatch.setattr(os, "open", deny)
    with pytest.raises(ExportError, match="is read-only"):
        with atomic_write(tmp_path / "out.csv", "w"):
            pass
    assert list(tmp_path.iterdir()) == []


def test_atomic_write_disk_full_on_rename(tmp_path, monkeypatch):
    """ENOSPC at the last step: the old file survives and the temporary file is removed."""
    target = tmp_path / "out.csv"
    target.write_text("old")

    def full(src, dst):
        raise OSError(errno.ENOSPC, "No space left on device")

    monkeypatch.setattr(os, "replace", full)
    with pytest.raises(ExportError, match="is full"):
        with atomic_write(target, "w") as fh:
            fh.write("new")
    assert target.read_text() == "old"
    assert sorted(p.name for p in tmp_path.iterdir()) == ["out.csv"]


# --- CSV -----------------------------------------------------------------------------------

def test_csv_round_trip_bit_exact(tmp_path):
    """Python's shortest float repr reads back to the identical double; numpy.loadtxt agrees."""
    results = make_results(3)
    path = tmp_path / "sites.csv"
    n = write_sites_csv(path, (r for r in results), calibration=make_calibration(),
                        metadata={"inputs": [tmp_path / "run_0042.tif"], "operator_note": "test"})
    table = read_sites_csv(path)
    assert n == sum(len(r.sites) for r in results) == table["frame"].size
    for col, key in (("x", "x"), ("y", "y")):
        np.testing.assert_array_equal(table[col], np.concatenate([getattr(r.sites, key) for r in results]))
    np.testing.assert_array_equal(table["amplitude"], np.concatenate([r.amplitudes for r in results]))
    np.testing.assert_array_equal(table["p_occupied"], np.concatenate([r.p_occupied for r in results]))
    np.testing.assert_array_equal(table["occupied"], np.concatenate([r.occupied for r in results]))
    np.testing.assert_array_equal(table["flags"], np.concatenate([r.flags for r in results]))
    np.testing.assert_array_equal(table["row"], np.concatenate([r.sites.rows for r in results]))
    np.testing.assert_array_equal(table["frame"], np.repeat([0, 1, 2], [len(r.sites) for r in results]))
    assert table["occupied"].dtype == np.uint8 and table["frame"].dtype == np.int64
    # an independent reader with no options beyond skipping the header
    plain = np.loadtxt(path, delimiter=",", skiprows=1)
    np.testing.assert_array_equal(plain[:, 5], table["amplitude"])
    assert path.read_text().splitlines()[0] == "frame,row,col,x,y,amplitude,occupied,p_occupied,flags"


def test_csv_round_trip_exact_for_awkward_values(tmp_path):
    """Negative and large site indices, NaN, infinities, -0.0, subnormal and huge amplitudes
    come back as the identical doubles (numpy.loadtxt as the independent reader)."""
    base = make_results(1)[0]
    n = len(base.sites)
    rng = np.random.default_rng(4)
    special = np.array([np.nan, np.inf, -np.inf, -0.0, 5e-324, 1.7976931348623157e308, 0.1, 1 / 3])
    amp = rng.normal(0, 1e6, n) * 10.0 ** rng.integers(-200, 200, n)
    amp[:special.size] = special
    rows = base.sites.rows - 5000  # below zero and beyond the small-number table
    sites = type(base.sites)(rows, base.sites.cols, base.sites.x, base.sites.y, int(rows.min()), base.sites.col_min,
                             base.sites.n_rows, base.sites.n_cols)
    frame = FakeResult(123456, base.geometry, sites, amp, base.occupied, base.p_occupied, base.flags, 1.0)
    path = tmp_path / "odd.csv"
    assert write_sites_csv(path, [frame]) == n
    table = read_sites_csv(path)
    np.testing.assert_array_equal(table["amplitude"], amp)
    assert np.signbit(table["amplitude"][3]) and table["amplitude"][4] == 5e-324
    np.testing.assert_array_equal(table["row"], rows)
    assert (table["frame"] == 123456).all()
    plain = np.loadtxt(path, delimiter=",", skiprows=1)
    np.testing.assert_array_equal(plain[:, 5], amp)
    np.testing.assert_array_equal(plain[:, 3], base.sites.x)


def test_csv_sidecar_holds_settings_as_strict_json(tmp_path):
    """RFC 8259: the companion JSON has no NaN tokens; the calibration reads back equal."""
    path = tmp_path / "sites.csv"
    cal = make_calibration()
    write_sites_csv(path, make_results(2), calibration=cal, metadata={"inputs": ["run_0042.tif"]})

    def refuse(token):
        raise AssertionError(f"non-standard JSON token {token}")

    json.loads(sidecar_path(path).read_text(), parse_constant=refuse)
    meta = read_sites_metadata(path)
    assert meta["columns"]["amplitude"] == "photons"
    assert meta["inputs"] == ["run_0042.tif"]
    assert meta["n_frames"] == 2
    assert meta["frame_warnings"] == {"1": ["few atoms"]}
    back = Calibration.from_dict(meta["calibration"])
    assert back == cal and np.isnan(back.geometry.quality.residual)


def test_csv_failure_mid_stream_leaves_nothing(tmp_path):
    """A generator that fails after two frames: no CSV, no sidecar, no temporary files."""
    good = make_results(2)

    def frames():
        yield from good
        raise ReconstructionError("frame 2 of run.tif has no lattice")

    with pytest.raises(ReconstructionError, match="no lattice"):
        write_sites_csv(tmp_path / "sites.csv", frames())
    assert list(tmp_path.iterdir()) == []


def test_csv_inconsistent_result_rejected(tmp_path):
    bad = make_results(1)[0]
    bad = FakeResult(0, bad.geometry, bad.sites, bad.amplitudes[:-1], bad.occupied, bad.p_occupied,
                     bad.flags, 1.0)
    with pytest.raises(ReconstructionError, match="amplitudes has shape"):
        write_sites_csv(tmp_path / "s.csv", [bad])
    assert list(tmp_path.iterdir()) == []


def test_csv_result_missing_attribute(tmp_path):
    with pytest.raises(ReconstructionError, match="no attribute 'sites'"):
        write_sites_csv(tmp_path / "s.csv", [object()])


def test_read_csv_wrong_table(tmp_path):
    p = tmp_path / "other.csv"
    p.write_text("a,b\n1,2\n")
    with pytest.raises(FrameFileError, match="column"):
        read_sites_csv(p)


# --- HDF5 ----------------------------------------------------------------------------------

def test_hdf5_round_trip(tmp_path):
    """Matrices and per-site arrays come back equal; h5py reads the same bytes independently."""
    results = make_results(4, rng=5)
    path = tmp_path / "run.h5"
    cal = make_calibration("empirical")
    n = write_occupation_hdf5(path, iter(results), calibration=cal,
                              metadata={"inputs": ["run_0042.tif"], "fidelity": {"loss": 0.012, "ci": [0.008, 0.017]}})
    assert n == 4
    f = read_occupation_hdf5(path)
    s0 = results[0].sites
    assert f.occupation.shape == (4, s0.n_rows, s0.n_cols)
    assert (f.row_min, f.col_min) == (s0.row_min, s0.col_min)
    for k, r in enumerate(results):
        np.testing.assert_array_equal(f.occupation[k], r.sites.to_matrix(r.occupied, fill=255, dtype=np.uint8))
        np.testing.assert_array_equal(f.amplitude[k], r.sites.to_matrix(r.amplitudes, fill=np.nan))
        np.testing.assert_array_equal(f.x[k], r.sites.to_matrix(r.sites.x, fill=np.nan))
        np.testing.assert_array_equal(f.p_occupied[k], r.sites.to_matrix(r.p_occupied, fill=np.nan))
        np.testing.assert_array_equal(f.flags[k], r.sites.to_matrix(r.flags, fill=0, dtype=np.uint8))
        assert tuple(f.offset[k]) == r.geometry.offset
    np.testing.assert_array_equal(f.frame_index, [0, 1, 2, 3])
    np.testing.assert_array_equal(f.threshold, [450.0, 451.0, 452.0, 453.0])
    assert f.warnings == ("", "few atoms", "", "")
    assert f.attrs["inputs"] == ["run_0042.tif"]
    assert f.attrs["fidelity"]["loss"] == 0.012
    assert f.attrs["units"]["amplitude"] == "photons"
    back = f.calibration
    assert back == cal and np.array_equal(back.psf.kernel, cal.psf.kernel)
    with h5py.File(path, "r") as h5:
        assert h5["occupation"].dtype == np.uint8
        assert h5["occupation"].fillvalue == 255
        assert h5["occupation"].maxshape[0] is None  # appendable, written frame by frame
        assert h5["amplitude"].attrs["units"] == "photons"


def test_hdf5_failure_mid_stream_leaves_old_file(tmp_path):
    path = tmp_path / "run.h5"
    path.write_bytes(b"previous run")
    good = make_results(2)

    def frames():
        yield from good
        raise KeyboardInterrupt

    with pytest.raises(KeyboardInterrupt):
        write_occupation_hdf5(path, frames())
    assert path.read_bytes() == b"previous run"
    assert sorted(p.name for p in tmp_path.iterdir()) == ["run.h5"]


def test_hdf5_empty_results(tmp_path):
    with pytest.raises(ReconstructionError, match="no frame results"):
        write_occupation_hdf5(tmp_path / "run.h5", [])
    assert list(tmp_path.iterdir()) == []


def test_hdf5_site_set_must_match_first_frame(tmp_path):
    a = make_results(1, shape=(40, 40))[0]
    b = make_results(1, shape=(80, 80))[0]
    with pytest.raises(ReconstructionError, match="outside the index range of the first frame"):
        write_occupation_hdf5(tmp_path / "run.h5", [a, b])
    assert list(tmp_path.iterdir()) == []


def test_read_hdf5_not_ours(tmp_path):
    p = tmp_path / "other.h5"
    with h5py.File(p, "w") as h5:
        h5["frames"] = np.zeros((2, 4, 4))
    with pytest.raises(FrameFileError, match="dataset"):
        read_occupation_hdf5(p)


# --- calibration JSON ----------------------------------------------------------------------

@pytest.mark.parametrize("kind", ["airy", "gaussian", "empirical"])
def test_calibration_round_trip_identical(tmp_path, kind):
    """JSON round trip: equal dataclasses, identical dicts, bit-exact kernel (RFC 8259, strict)."""
    cal = make_calibration(kind)
    path = save_calibration(tmp_path / "cal.json", cal)
    json.loads(path.read_text(), parse_constant=lambda t: (_ for _ in ()).throw(AssertionError(t)))
    back = load_calibration(path)
    assert back == cal
    a, b = back.to_dict(), cal.to_dict()
    # NaN != NaN, so compare the residual and the (not computed) spacing uncertainty separately
    for key in ("residual", "spacing_sigma"):
        assert np.isnan(a["geometry"]["quality"].pop(key)) and np.isnan(b["geometry"]["quality"].pop(key))
    assert a == b
    assert back.geometry.quality.warnings == ("weak peak",)
    if kind == "empirical":
        np.testing.assert_array_equal(back.psf.kernel, cal.psf.kernel)


def test_calibration_save_failure_keeps_old(tmp_path, monkeypatch):
    path = tmp_path / "cal.json"
    save_calibration(path, make_calibration())
    before = path.read_bytes()

    def full(src, dst):
        raise OSError(errno.ENOSPC, "No space left on device")

    monkeypatch.setattr(os, "replace", full)
    with pytest.raises(ExportError, match="is full"):
        save_calibration(path, make_calibration("gaussian"))
    assert path.read_bytes() == before
    assert sorted(p.name for p in tmp_path.iterdir()) == ["cal.json"]


# --- whole chain: simulate -> TIFF -> load_frames -> reconstruct -> export -> read ---------

def test_export_of_real_pipeline_results(tmp_path):
    """Ground truth from the project's forward model (core.simulate); the export must keep
    every frame's matrix identical to FrameResult.occupation_matrix and the site indexing
    aligned with the truth (a shuffled or shifted export agrees only ~50%)."""
    import tifffile

    from latticeread.core.pipeline import calibrate, reconstruct_stack
    from latticeread.core.simulate import demo_scenario, simulate_frames
    from latticeread.io import load_frames

    kw = demo_scenario("square", frame_shape=(96, 96))
    pixel_nm = kw.pop("pixel_size_nm")
    frames, truth = simulate_frames(**kw, n_shots=3, images_per_shot=1, rng=3)
    tifffile.imwrite(tmp_path / "run.tif", frames, photometric="minisblack")
    with load_frames(tmp_path / "run.tif") as stack:
        cal = calibrate(stack, psf=kw["psf"], camera=kw["camera"], geometry=kw["geometry"], pixel_size_nm=pixel_nm)
        results = list(reconstruct_stack(stack, cal))
    write_occupation_hdf5(tmp_path / "run.h5", iter(results), calibration=cal,
                          metadata={"inputs": [str(tmp_path / "run.tif")]}, protect=[tmp_path / "run.tif"])
    write_sites_csv(tmp_path / "run.csv", iter(results), calibration=cal)
    f = read_occupation_hdf5(tmp_path / "run.h5")
    table = read_sites_csv(tmp_path / "run.csv")
    assert f.calibration == cal
    for k, r in enumerate(results):
        np.testing.assert_array_equal(f.occupation[k], r.occupation_matrix(fill=255))
        in_frame = table["frame"] == k
        np.testing.assert_array_equal(table["amplitude"][in_frame], r.amplitudes)
        rows, cols = truth.sites.rows - f.row_min, truth.sites.cols - f.col_min
        assert rows.min() >= 0 and cols.min() >= 0
        agree = np.mean(f.occupation[k][rows, cols] == truth.final_occupation[k])
        assert agree > 0.9


def test_damaged_sidecar(tmp_path):
    write_sites_csv(tmp_path / "sites.csv", make_results(1))
    sidecar_path(tmp_path / "sites.csv").write_text("{truncated")
    with pytest.raises(FrameFileError, match=r"sites\.csv\.json \(settings of sites\.csv\) is not valid JSON"):
        read_sites_metadata(tmp_path / "sites.csv")


def test_settings_of_another_table_are_refused(tmp_path):
    """A run stopped between the two renames (or a table replaced by hand) leaves a table beside
    another table's settings: reading them names the mismatch instead of describing the wrong
    table. The checksum is SHA-256 (hashlib) of the table's bytes."""
    import hashlib
    import shutil

    first, second = tmp_path / "first.csv", tmp_path / "second.csv"
    write_sites_csv(first, make_results(1))
    write_sites_csv(second, make_results(2))
    meta = read_sites_metadata(first)
    assert meta["table_sha256"] == hashlib.sha256(first.read_bytes()).hexdigest()
    assert meta["table_bytes"] == first.stat().st_size
    shutil.copyfile(sidecar_path(first), sidecar_path(second))
    with pytest.raises(FrameFileError, match=r"second\.csv\.json holds the settings of another table than second\.csv"):
        read_sites_metadata(second)


def test_settings_written_before_the_checksum_still_read(tmp_path):
    path = tmp_path / "sites.csv"
    write_sites_csv(path, make_results(1))
    old = json.loads(sidecar_path(path).read_text())
    del old["table_sha256"], old["table_bytes"]
    sidecar_path(path).write_text(json.dumps(old))
    assert read_sites_metadata(path)["n_frames"] == 1


def test_single_input_name_is_not_split_into_letters(tmp_path):
    write_occupation_hdf5(tmp_path / "run.h5", make_results(1), metadata={"inputs": tmp_path / "run_0042.tif"})
    assert read_occupation_hdf5(tmp_path / "run.h5").attrs["inputs"] == [str(tmp_path / "run_0042.tif")]
