"""``latticeread calibrate``: lattice geometry, PSF and threshold from a stack, saved as JSON.

The lattice is estimated from the Fourier peaks of the frames, with the spacing and angle held
at the lab's values when ``--lattice-spacing`` / ``--lattice-angle`` are given; when the peaks
are invisible (spacing below about one PSF FWHM) and both values and the PSF are given, the
lattice is fitted to the image model from them instead. ``--refine-vectors`` refits the
vectors to the image model of ``--refine-frames`` frames together. The PSF is
the ideal Airy pattern (``--psf airy`` with ``--wavelength-nm --na --pixel-size-nm``), a
Gaussian of given FWHM (``--psf gaussian --fwhm``) or measured from isolated atoms
(``--psf estimate``, the default). The threshold is chosen on the pooled histogram of site
amplitudes (photons, converted with the camera description).
"""

from __future__ import annotations

import argparse
import logging
from pathlib import Path

from latticeread.commands._types import lattice_spacing, number, pixel_size_nm, psf_fwhm
from latticeread.errors import CalibrationError

#: Fluorescence wavelengths from the ultraviolet to the near infrared, nm (common practice, no source).
WAVELENGTH_NM = number(low=100, high=3000, unit="nm")
#: Numerical aperture of a dry or immersion objective (NA = n sin(theta), n at most about 1.7).
NUMERICAL_APERTURE = number(low=0, high=1.7, low_open=True)

log = logging.getLogger(__name__)


def add_camera_arguments(parser: argparse.ArgumentParser) -> None:
    """Camera options shared by ``calibrate`` and ``reconstruct``."""
    cam = parser.add_argument_group("camera (counts to photons)")
    cam.add_argument("--camera", type=Path, default=None, metavar="CAMERA.json",
                     help="camera description from 'latticeread camera' (overrides the options below)")
    cam.add_argument("--camera-kind", choices=["emccd", "scmos"], default="emccd", help="sensor type (default emccd)")
    cam.add_argument("--em-gain", type=float, default=1.0, help="electron-multiplying gain (default 1)")
    cam.add_argument("--counts-per-electron", type=float, default=1.0,
                     help="read-out conversion gain, counts per electron (default 1)")
    cam.add_argument("--bias", type=float, default=0.0, help="offset of every pixel, counts (default 0)")
    cam.add_argument("--read-noise", type=float, default=0.0, help="RMS read noise, counts (default 0)")
    cam.add_argument("--quantum-efficiency", type=float, default=1.0,
                     help="photoelectrons per photon, 0..1 (default 1)")
    cam.add_argument("--qe", dest="quantum_efficiency", type=float, default=argparse.SUPPRESS,
                     help=argparse.SUPPRESS)  # short spelling kept for old scripts
    cam.add_argument("--saturation", type=int, default=65535, help="largest value the camera outputs (default 65535)")


def camera_from_args(args):
    """A CameraModel from ``--camera FILE`` or the individual options."""
    from latticeread.core.camera import CameraModel

    if getattr(args, "camera", None) is not None:
        from latticeread.io import load_camera  # camera JSON reader

        return load_camera(args.camera)
    try:
        return CameraModel(kind=args.camera_kind, em_gain=args.em_gain, counts_per_electron=args.counts_per_electron,
                           bias=args.bias, read_noise=args.read_noise, quantum_efficiency=args.quantum_efficiency,
                           saturation=args.saturation)
    except ValueError as exc:
        raise CalibrationError(f"bad camera options: {exc}") from exc


def add_parser(parser: argparse.ArgumentParser) -> None:
    parser.add_argument("frames", type=Path, help="frame stack (TIFF, HDF5, .npy/.npz) with atoms")
    parser.add_argument("--out", "-o", type=Path, required=True, help="calibration file to write (.json)")
    parser.add_argument("--dataset", default=None, help="dataset inside an HDF5/.npz file")
    parser.add_argument("--psf", choices=["estimate", "airy", "gaussian"], default="estimate",
                        help="PSF: measured from isolated atoms (default), ideal Airy, or Gaussian")
    parser.add_argument("--wavelength-nm", type=WAVELENGTH_NM, default=None,
                        help="fluorescence wavelength, nm (--psf airy)")
    parser.add_argument("--na", type=NUMERICAL_APERTURE, default=None,
                        help="numerical aperture of the objective (--psf airy)")
    parser.add_argument("--pixel-size-nm", type=pixel_size_nm, default=None,
                        help="camera pixel projected into the atom plane, nm (--psf airy; stored)")
    parser.add_argument("--fwhm", type=psf_fwhm, default=None, help="PSF FWHM in pixels (--psf gaussian)")
    parser.add_argument("--threshold-method", choices=["mixture", "otsu", "minimum"], default="mixture",
                        help="threshold on the pooled histogram (default mixture)")
    parser.add_argument("--method", choices=["linear", "nonlinear", "wiener", "richardson_lucy"], default=None,
                        help="amplitude estimator (default: nonlinear below 0.7 FWHM spacing, else linear)")
    parser.add_argument("--max-frames", type=number(low=1, integer=True), default=50, help="use at most this many frames (default 50)")
    parser.add_argument("--weighting", choices=["none", "camera"], default="none",
                        help="pixel weights of the amplitude fit: none (default) or camera (inverse camera-noise "
                             "variance of the mean frame, stored in the calibration)")
    lat = parser.add_argument_group("lattice (the lab's own knowledge, optional)")
    lat.add_argument("--lattice-spacing", type=lattice_spacing, nargs="+", default=None, metavar="PX",
                     help="lattice spacing in pixels (one value, or one per vector): held fixed by the estimate, "
                          "and the prior of the image-model fit when the Fourier peaks are invisible")
    lat.add_argument("--lattice-angle", type=number(), default=None, metavar="DEG",
                     help="direction of the first lattice vector, degrees from +x towards +y (image rows down)")
    lat.add_argument("--lattice-angle-between", type=number(low=0, high=180, low_open=True, unit="degrees"), default=None, metavar="DEG",
                     help="angle from the second to the first vector, degrees (default 90; 60 or 120 for "
                          "triangular lattices)")
    lat.add_argument("--refine-vectors", action="store_true",
                     help="refit the lattice vectors to the full image model (seconds to minutes; most useful "
                          "near or below one PSF FWHM); prints the 1-sigma spacing uncertainty")
    lat.add_argument("--refine-frames", type=number(low=1, integer=True), default=4, metavar="N",
                     help="frames fitted together by the image-model fit (default 4; the spacing error falls "
                          "as 1/sqrt(N))")
    parser.add_argument("--background", choices=["constant", "plane", "poly2", "poly3", "auto"], default="constant",
                        help="background fitted with the sites in every frame: a constant (default), a plane, a "
                             "polynomial surface of degree 2 or 3 (gradients, broad stray-light humps), or 'auto' "
                             "(degree 2 when the frames show one)")
    parser.add_argument("--psf-zones", type=number(low=1, high=8, integer=True), default=None, metavar="N",
                        help="measure the PSF in N x N zones of the atoms' region and blend them across the field "
                             "(a PSF that worsens toward the edge; adds seconds to a minute)")
    parser.add_argument("--force", action="store_true", help="overwrite an existing output file")
    add_camera_arguments(parser)


def lattice_prior_from_args(args) -> dict | None:
    """The ``lattice_prior`` of :func:`latticeread.core.pipeline.calibrate` from the options."""
    spacing = getattr(args, "lattice_spacing", None)
    angle = getattr(args, "lattice_angle", None)
    between = getattr(args, "lattice_angle_between", None)
    if spacing is None and angle is None and between is None:
        return None
    if spacing is not None:
        if len(spacing) > 2 or any(not v > 0 for v in spacing):
            raise CalibrationError(f"--lattice-spacing takes one or two positive values in pixels, got {spacing}")
        spacing = spacing[0] if len(spacing) == 1 else list(spacing)
    if between is not None and angle is None:
        raise CalibrationError("--lattice-angle-between needs --lattice-angle (the direction of the first vector)")
    return {"spacing_px": spacing, "angle_deg": angle, "angle_between_deg": between}


def psf_from_args(args):
    """The PSFModel asked for on the command line, or None for 'estimate'."""
    from latticeread.core.psf import airy_psf, gaussian_psf

    if args.psf == "airy":
        missing = [f"--{n}" for n, v in (("wavelength-nm", args.wavelength_nm), ("na", args.na),
                                          ("pixel-size-nm", args.pixel_size_nm)) if v is None]
        if missing:
            raise CalibrationError(f"--psf airy needs {', '.join(missing)}")
        try:
            return airy_psf(wavelength_nm=args.wavelength_nm, numerical_aperture=args.na,
                            pixel_size_nm=args.pixel_size_nm)
        except ValueError as exc:
            raise CalibrationError(f"bad PSF options: {exc}") from exc
    if args.psf == "gaussian":
        if args.fwhm is None:
            raise CalibrationError("--psf gaussian needs --fwhm (pixels)")
        try:
            return gaussian_psf(fwhm=args.fwhm)
        except ValueError as exc:
            raise CalibrationError(f"bad PSF options: {exc}") from exc
    return None


def run(args: argparse.Namespace) -> int:
    from latticeread.core.frame_check import amplitude_unit
    from latticeread.core.pipeline import calibrate, with_camera_weighting
    from latticeread.io import save_calibration
    from latticeread.io.frames import load_frames

    from latticeread.io.outputs import check_outputs, check_suffix

    out = Path(args.out)
    check_suffix(out, [".json"], what="the calibration file")
    check_outputs([out], force=args.force,
                  inputs={"frame file": args.frames, "camera description": getattr(args, "camera", None)})
    camera = camera_from_args(args)
    psf = psf_from_args(args)
    prior = lattice_prior_from_args(args)
    if getattr(args, "refine_frames", 4) < 1:
        raise CalibrationError(f"--refine-frames must be at least 1, got {args.refine_frames}")
    stack = load_frames(args.frames, dataset=args.dataset, saturation=camera.saturation, nonfinite="keep")
    try:
        cal = calibrate(stack, psf=psf, camera=camera, pixel_size_nm=args.pixel_size_nm,
                        threshold_method=args.threshold_method, method=args.method, max_frames=args.max_frames,
                        refine_vectors=getattr(args, "refine_vectors", False),
                        refine_frames=getattr(args, "refine_frames", 4), lattice_prior=prior,
                        psf_zones=getattr(args, "psf_zones", None), background=getattr(args, "background", "constant"))
        if getattr(args, "weighting", "none") == "camera":
            cal = with_camera_weighting(cal, stack, max_frames=args.max_frames)
    finally:
        stack.close()
    notes = dict(cal.notes, source=str(args.frames))
    if stack.warnings:  # constant frames, saturated pixels: stored with the calibration
        notes["warnings"] = list(dict.fromkeys([*notes.get("warnings", []), *stack.warnings]))
    cal = cal.replace(notes=notes)
    save_calibration(out, cal, protect=[args.frames])
    a1, a2 = cal.geometry.spacings
    print(f"wrote {out}: spacings {a1:.3f}, {a2:.3f} px, PSF {cal.psf.kind} FWHM {cal.psf.fwhm:.3f} px, "
          f"{cal.amplitude_method} amplitudes, threshold {cal.threshold:.1f} {amplitude_unit(cal.camera)}"
          + (", camera-noise weights" if cal.options.weighting == "camera" else ""))
    for key, what in (("geometry_from_prior", "lattice fitted from the given spacing and angle"),
                      ("vectors_model_fit", "lattice vectors refined by the image-model fit")):
        fit = cal.notes.get(key)
        if fit:
            print(f"{what} on {fit['n_frames']} frame(s): spacing uncertain to {fit['spacing_sigma']:.1e} "
                  f"(relative, 1 sigma)")
    for key in ("psf_zones", "background"):
        if cal.notes.get(key):
            print(f"{key.replace('_', ' ')}: {cal.notes[key]}")
    for text in cal.notes.get("warnings", []):
        print(f"warning: {text}")
    return 0
