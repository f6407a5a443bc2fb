"""Shared scorer for the reference frames of an independent simulator (``shared/reference-frames``).

The folder (outside this repository) holds cases ``r1_...`` .. ``r6_...``, each with
``frame.tif`` (raw counts), ``public.json`` (what a lab knows: optics and camera, nothing about
the lattice or the atoms) and ``truth.npz`` (for scoring only). Its README defines the score:

1. per frame, every truth site (loaded region and its two rings of empty margin sites);
2. each truth site is matched to the nearest reconstructed site of that frame within
   0.25 x ``spacing_min`` (a k-d tree query with a distance bound, :class:`scipy.spatial.cKDTree`);
3. a matched site is right when the reconstructed occupation equals ``occ_initial``; an
   unmatched truth site is an error;
4. fidelity_k = 1 - errors_k / n_sites; a stack reports the mean over its frames.

:func:`run_case` runs the program unaided, as a user would: it reads ``frame.tif`` with the
program's own reader and only the optics and the camera from ``public.json``, then calls the
same Python API as the ``calibrate`` and ``reconstruct`` commands
(:func:`latticeread.core.pipeline.calibrate`, :func:`latticeread.core.pipeline.reconstruct_stack`).
The program itself never reads ``truth.npz``; only :func:`score_case` does.

The folder is found beside the checkout (``../shared/reference-frames`` from the repository or
one of its parents), or at ``$LATTICEREAD_REFERENCE_FRAMES``; :func:`reference_dir` returns None
when it is absent so that tests can skip with a reason.
"""

from __future__ import annotations

import json
import os
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np
from scipy.spatial import cKDTree

#: Match radius as a fraction of the smallest true spacing (the folder's README, "How to score").
MATCH_RADIUS = 0.25
ENV_VAR = "LATTICEREAD_REFERENCE_FRAMES"


def reference_dir() -> Path | None:
    """The reference-frame folder, or None when it is not beside this checkout."""
    env = os.environ.get(ENV_VAR)
    if env:
        path = Path(env)
        return path if (path / "expected.json").is_file() else None
    repo = Path(__file__).resolve().parents[1]
    for parent in repo.parents:  # ../shared beside the checkout, or beside a folder of worktrees
        path = parent / "shared" / "reference-frames"
        if (path / "expected.json").is_file():
            return path
    return None


def expected(folder: Path) -> dict:
    """``expected.json``: per case the oracle and baseline fidelities and the case's facts."""
    return json.loads((Path(folder) / "expected.json").read_text())


@dataclass(frozen=True)
class CaseRun:
    """What the program reported on one case.

    Attributes
    ----------
    x, y : list of (N_k,) ndarray
        Reconstructed site centres per frame, pixels ((column, row), pixel centres at integers).
    occupied : list of (N_k,) ndarray of uint8
        Reconstructed occupation per frame.
    calibration : Calibration
        The calibration the program made from the frames.
    warnings : tuple of str
        Calibration warnings and every frame's warnings.
    offsets : list of (2,) ndarray
        Each frame's lattice offset, pixels.
    amplitudes : list of (N_k,) ndarray
        Site amplitudes per frame, photons (to score other thresholds offline).
    offset_methods : list of str
        How each frame's offset was found (``FrameResult.offset_method``).
    offset_sigmas : list of (2,) ndarray
        Each frame's offset 1-sigma (x, y), pixels (NaN where the method gives none).
    """

    x: list
    y: list
    occupied: list
    calibration: object = field(repr=False)
    warnings: tuple = ()
    offsets: list = field(default_factory=list)
    amplitudes: list = field(default_factory=list, repr=False)
    offset_methods: list = field(default_factory=list)
    offset_sigmas: list = field(default_factory=list)


def camera_from_public(public: dict):
    """The program's CameraModel from ``public.json``'s camera entry (electrons -> counts).

    ``e_per_adu`` electrons per count gives ``counts_per_electron = 1 / e_per_adu``; the read
    noise is given in electrons and the program wants counts. The photons of the folder are
    detected photons (photo-electrons), so the quantum efficiency is 1.
    """
    from latticeread.core.camera import CameraModel

    cam = public["camera"]
    e_per_adu = float(cam["e_per_adu"])
    return CameraModel(kind=cam["kind"], em_gain=float(cam.get("em_gain", 1.0) or 1.0),
                       counts_per_electron=1.0 / e_per_adu, bias=float(cam["bias"]),
                       read_noise=float(cam["read_noise_e"]) / e_per_adu,
                       clock_induced_charge=float(cam.get("cic", 0.0) or 0.0))


def pixel_size_nm(public: dict) -> float:
    """Camera pixel projected into the atom plane, nanometres."""
    return float(public["camera_pixel_um"]) * 1000.0 / float(public["magnification"])


def run_case(case_dir, *, max_frames: int | None = None, refit_phase: bool = True) -> CaseRun:
    """Calibrate and reconstruct one case with only the optics and camera of ``public.json``.

    The PSF is the ideal Airy pattern of the given wavelength and numerical aperture (the
    ``calibrate --psf airy`` route); the lattice, threshold and amplitude method are left to
    the program.

    Parameters
    ----------
    case_dir : path
        One case folder (``frame.tif``, ``public.json``).
    max_frames : int, optional
        Reconstruct only the first frames (default: all).
    refit_phase : bool
        Re-find the lattice offset per frame (the ``reconstruct`` default).
    """
    from latticeread.core.pipeline import calibrate, reconstruct_stack
    from latticeread.core.psf import airy_psf
    from latticeread.io.frames import load_frames

    case_dir = Path(case_dir)
    public = json.loads((case_dir / "public.json").read_text())
    camera = camera_from_public(public)
    pix = pixel_size_nm(public)
    psf = airy_psf(wavelength_nm=float(public["wavelength_nm"]),
                   numerical_aperture=float(public["numerical_aperture"]), pixel_size_nm=pix)
    with load_frames(case_dir / "frame.tif", saturation=camera.saturation, nonfinite="keep") as stack:
        frames = stack.read_all()
    if max_frames is not None:
        frames = frames[:max_frames]
    cal = calibrate(frames, psf=psf, camera=camera, pixel_size_nm=pix)
    xs, ys, occ, offsets, amps, methods, sigmas = [], [], [], [], [], [], []
    warnings = list(cal.notes.get("warnings", []))
    for result in reconstruct_stack(frames, cal, refit_phase=refit_phase):
        xs.append(np.asarray(result.sites.x, float))
        ys.append(np.asarray(result.sites.y, float))
        occ.append(np.asarray(result.occupied, np.uint8))
        offsets.append(np.asarray(result.geometry.offset, float))
        amps.append(np.asarray(result.amplitudes, float))
        methods.append(result.offset_method)
        sigmas.append(np.asarray(result.offset_sigma, float))
        warnings.extend(f"frame {result.frame_index}: {w}" for w in result.warnings)
    return CaseRun(x=xs, y=ys, occupied=occ, calibration=cal, warnings=tuple(warnings), offsets=offsets,
                   amplitudes=amps, offset_methods=methods, offset_sigmas=sigmas)


@dataclass(frozen=True)
class CaseScore:
    """A run scored against the truth.

    Attributes
    ----------
    fidelity : (n_frames,) ndarray
        Per-frame fidelity over all truth sites.
    mean_fidelity : float
        Mean over the frames.
    false_positive, false_negative : (n_frames,) ndarray
        Wrong 'occupied' over the empty truth sites; wrong 'empty' over the occupied ones.
    unmatched : (n_frames,) ndarray of int
        Truth sites with no reconstructed site within the match radius.
    max_site_error : float
        Largest distance from a truth site to its nearest reconstructed site, over all frames,
        in units of ``spacing_min``.
    site_error_p99 : float
        The 99th percentile of that distance (units of ``spacing_min``).
    """

    fidelity: np.ndarray
    mean_fidelity: float
    false_positive: np.ndarray
    false_negative: np.ndarray
    unmatched: np.ndarray
    max_site_error: float
    site_error_p99: float

    def summary(self) -> str:
        return (f"fidelity {self.mean_fidelity:.4f} (frames {', '.join(f'{f:.4f}' for f in self.fidelity)}), "
                f"max site error {self.max_site_error:.3f} spacing (p99 {self.site_error_p99:.3f}), "
                f"unmatched {int(self.unmatched.sum())}")


def load_truth(case_dir) -> dict:
    """The scoring keys of ``truth.npz`` (only the tests read this file)."""
    with np.load(Path(case_dir) / "truth.npz", allow_pickle=False) as data:
        return {k: np.asarray(data[k]) for k in ("site_x_frames", "site_y_frames", "occ_initial", "spacing_min",
                                                  "in_region", "n_frames")}


def score_frames(truth: dict, x, y, occupied) -> CaseScore:
    """Score per-frame reconstructed sites against the truth as the folder's README defines.

    Parameters
    ----------
    truth : dict
        From :func:`load_truth`.
    x, y, occupied : sequences of (N_k,) arrays
        Reconstructed site centres (pixels) and occupations, one entry per frame (frame k is
        scored against the truth of frame k).
    """
    spacing = float(truth["spacing_min"])
    radius = MATCH_RADIUS * spacing
    fid, fp, fn, unmatched, dists = [], [], [], [], []
    for k in range(len(x)):
        tx, ty = truth["site_x_frames"][k], truth["site_y_frames"][k]
        tocc = truth["occ_initial"][k].astype(np.uint8)
        rx, ry = np.asarray(x[k], float), np.asarray(y[k], float)
        rocc = np.asarray(occupied[k]).astype(np.uint8)
        tree = cKDTree(np.column_stack([rx, ry]))
        d, idx = tree.query(np.column_stack([tx, ty]), distance_upper_bound=radius)
        matched = np.isfinite(d)
        got = np.full(tx.size, 255, np.uint8)
        got[matched] = rocc[idx[matched]]
        wrong = got != tocc
        fid.append(1.0 - wrong.sum() / tx.size)
        fp.append(np.sum(wrong & (tocc == 0)) / max(1, np.sum(tocc == 0)))
        fn.append(np.sum(wrong & (tocc == 1)) / max(1, np.sum(tocc == 1)))
        unmatched.append(int((~matched).sum()))
        dn, _ = tree.query(np.column_stack([tx, ty]))
        dists.append(dn / spacing)
    alld = np.concatenate(dists)
    fid = np.asarray(fid)
    return CaseScore(fidelity=fid, mean_fidelity=float(fid.mean()), false_positive=np.asarray(fp),
                     false_negative=np.asarray(fn), unmatched=np.asarray(unmatched),
                     max_site_error=float(alld.max()), site_error_p99=float(np.percentile(alld, 99)))


def score_case(case_dir, run: CaseRun) -> CaseScore:
    """Score a :class:`CaseRun` of ``case_dir`` against its ``truth.npz``."""
    return score_frames(load_truth(case_dir), run.x, run.y, run.occupied)


def main(argv=None) -> int:
    """Print the score of every case (or the named ones): ``python tests/reference_frames.py [r1 r3 ...]``."""
    import sys
    import time

    folder = reference_dir()
    if folder is None:
        print(f"no reference frames beside this checkout (set {ENV_VAR})")
        return 1
    exp = expected(folder)["cases"]
    names = argv if argv is not None else sys.argv[1:]
    cases = [c for c in sorted(exp) if not names or any(c.startswith(n) for n in names)]
    for case in cases:
        t0 = time.perf_counter()
        try:
            run = run_case(folder / case)
        except Exception as exc:  # report every case, whatever fails
            print(f"{case}: FAILED {type(exc).__name__}: {exc} ({time.perf_counter() - t0:.0f} s)")
            continue
        score = score_case(folder / case, run)
        oracle = exp[case]["oracle_fidelity_mean"]
        print(f"{case}: {score.summary()}; oracle {oracle:.4f} (diff {100 * (score.mean_fidelity - oracle):+.2f} pp);"
              f" {time.perf_counter() - t0:.0f} s; {len(run.warnings)} warning(s)")
        notes = run.calibration.notes
        sigmas = [float(np.hypot(*s)) for s in run.offset_sigmas]
        worst = max((s for s in sigmas if np.isfinite(s)), default=float("nan"))
        spacing = min(run.calibration.geometry.spacings)
        print(f"    geometry by {notes.get('geometry_method', '?')}, offsets by "
              f"{run.calibration.options.phase_method} (per frame: {', '.join(sorted(set(run.offset_methods)))}; "
              f"largest 1-sigma {worst / spacing:.4f} spacing); threshold {run.calibration.threshold:.0f} photons "
              f"(lost-atom share {getattr(run.calibration.threshold_fit, 'loss_fraction', 0.0):.3f}); "
              f"check {notes.get('geometry_check')}")
        for w in sorted(set(run.warnings))[:6]:
            print(f"    warning: {w}")
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
