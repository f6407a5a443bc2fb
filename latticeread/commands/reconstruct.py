"""``latticeread reconstruct``: frames -> per-site table (CSV) or occupation matrices (HDF5).

For every frame: re-fit the lattice phase, extract the site amplitudes (photons), classify.
The table has the columns ``frame,row,col,x,y,amplitude,occupied,p_occupied,flags`` (see
:mod:`latticeread.io.export`); the HDF5 file follows the output contract with the settings
as attributes. Without ``--calibration`` the geometry, PSF and threshold are estimated from
the input itself. Frames are streamed: memory does not grow with the number of frames.
"""

from __future__ import annotations

import argparse
import logging
import sys
from pathlib import Path

from latticeread.commands._types import pixel_size_nm, psf_fwhm
from latticeread.commands.calibrate import (
    NUMERICAL_APERTURE,
    WAVELENGTH_NM,
    add_camera_arguments,
    camera_from_args,
    psf_from_args,
)
log = logging.getLogger(__name__)

_OUT_SUFFIXES = {".csv": "csv", ".h5": "hdf5", ".hdf5": "hdf5"}


def threshold_photons(text: str) -> float:
    """argparse type of ``--threshold``: a finite number of photons in the physical range."""
    from latticeread.io.limits import check_threshold

    try:
        return check_threshold(float(text), where="the threshold")
    except ValueError as exc:
        raise argparse.ArgumentTypeError(str(exc) if "photons" in str(exc)
                                         else f"must be a number of photons, got {text!r}") from None


def add_parser(parser: argparse.ArgumentParser) -> None:
    parser.add_argument("frames", type=Path, help="frame stack (TIFF, HDF5, .npy/.npz)")
    parser.add_argument("--calibration", "-c", type=Path, default=None, metavar="CAL.json",
                        help="calibration from 'latticeread calibrate' (default: estimate from the input)")
    parser.add_argument("--out", "-o", type=Path, required=True,
                        help="output: sites.csv (per-site table) or sites.h5 (occupation matrices)")
    parser.add_argument("--dataset", default=None, help="dataset inside an HDF5/.npz input file")
    parser.add_argument("--method", choices=["linear", "nonlinear", "wiener", "richardson_lucy"], default=None,
                        help="amplitude estimator (default: the calibration's)")
    parser.add_argument("--weighting", choices=["none", "camera"], default=None,
                        help="pixel weights of the amplitude fit: none, or camera (inverse camera-noise variance "
                             "of the mean frame); default: the calibration's, else none")
    parser.add_argument("--threshold", type=threshold_photons, default=None,
                        help="fixed threshold in photons (default: the calibration's)")
    parser.add_argument("--no-phase-refit", action="store_true",
                        help="use the calibration's lattice offset for every frame")
    parser.add_argument("--bad-pixels", type=Path, default=None,
                        help="bad-pixel mask file (nonzero = bad pixel, left out of the fit)")
    parser.add_argument("--force", action="store_true", help="overwrite an existing output file")
    parser.add_argument("--quiet", "-q", action="store_true", help="no progress bar")
    est = parser.add_argument_group("without --calibration")
    est.add_argument("--psf", choices=["estimate", "airy", "gaussian"], default="estimate",
                     help="PSF: measured from isolated atoms (default), ideal Airy, or Gaussian")
    est.add_argument("--wavelength-nm", type=WAVELENGTH_NM, default=None,
                     help="fluorescence wavelength, nm (--psf airy)")
    est.add_argument("--na", type=NUMERICAL_APERTURE, default=None, help="numerical aperture (--psf airy)")
    est.add_argument("--pixel-size-nm", type=pixel_size_nm, default=None,
                     help="pixel in the atom plane, nm (--psf airy)")
    est.add_argument("--fwhm", type=psf_fwhm, default=None, help="PSF FWHM in pixels (--psf gaussian)")
    add_camera_arguments(parser)


def run(args: argparse.Namespace) -> int:
    from tqdm import tqdm

    from latticeread.analysis.service import analyse_stack, open_stack
    from latticeread.core.frame_check import amplitude_unit
    from latticeread.core.pipeline import calibrate, with_camera_weighting
    from latticeread.io import load_calibration, write_occupation_hdf5, write_sites_csv
    from latticeread.io.export import sidecar_path
    from latticeread.io.frames import load_mask
    from latticeread.io.outputs import check_outputs, check_suffix

    out = Path(args.out)
    kind = _OUT_SUFFIXES[check_suffix(out, {".csv": "per-site table", ".h5": "occupation matrices",
                                            ".hdf5": "occupation matrices"}, what="the output")]
    check_outputs([out, sidecar_path(out) if kind == "csv" else None], force=args.force,
                  inputs={"frame file": args.frames, "calibration": args.calibration,
                          "bad-pixel mask": args.bad_pixels, "camera description": getattr(args, "camera", None)})
    if args.calibration is not None:
        cal = load_calibration(args.calibration)
        stack = open_stack(args.frames, cal, dataset=args.dataset)
    else:
        camera = camera_from_args(args)
        stack = open_stack(args.frames, dataset=args.dataset)
        log.info("no calibration given: estimating geometry, PSF and threshold from %s", args.frames)
        cal = calibrate(stack, psf=psf_from_args(args), camera=camera, pixel_size_nm=args.pixel_size_nm,
                        method=args.method)
    weighting = getattr(args, "weighting", None)
    if weighting == "camera" and (cal.options.weighting != "camera" or cal.options.reference is None):
        # no stored mean frame (calibration made without it, or estimated here): average the input
        cal = with_camera_weighting(cal, stack)
    elif weighting == "none":
        cal = cal.with_options(weighting="none")
    # command-line settings become part of the calibration, so they are stored with the results
    if args.method is not None:
        cal = cal.replace(amplitude_method=args.method)
    if args.no_phase_refit:
        cal = cal.with_options(refit_phase=False)
    if args.threshold is not None:
        cal = cal.replace(threshold=float(args.threshold))
    mask = None
    if args.bad_pixels is not None:
        mask = ~load_mask(args.bad_pixels, frame_shape=tuple(cal.frame_shape))
    n = len(stack)
    bar = tqdm(total=n, unit="frame", disable=args.quiet or n < 2, file=sys.stderr, desc="reconstruct")

    def progress(done, total):
        bar.update(1)

    metadata = {"inputs": [str(args.frames)],
                "command": "reconstruct",
                "method": args.method or cal.amplitude_method,
                "phase_refit": not args.no_phase_refit,
                "weighting": cal.options.weighting}
    if args.calibration is not None:
        metadata["calibration_file"] = str(args.calibration)
    try:
        results = analyse_stack(stack, cal, mask=mask, progress=progress)
        results = _with_load_warnings(results, stack)
        protect = [args.frames] + ([args.calibration] if args.calibration is not None else [])
        if kind == "csv":
            written = write_sites_csv(out, results, calibration=cal, metadata=metadata, protect=protect)
        else:
            written = write_occupation_hdf5(out, results, calibration=cal, metadata=metadata, protect=protect)
    finally:
        bar.close()
        stack.close()
    print(f"wrote {out}: {n} frame(s), {written} {'rows' if kind == 'csv' else 'frames'}; "
          + (f"threshold {cal.threshold:.1f} {amplitude_unit(cal.camera)}" if cal.threshold is not None
             else f"threshold: {cal.threshold_policy.describe()}"))
    return 0


def _with_load_warnings(results, stack):
    """Attach the stack's new load warnings (constant frame, saturated pixels) to each result.

    The frames are read one at a time just before their result is made, so the warnings
    that appeared since the previous result belong to this frame; the writers store them
    with the frame.
    """
    import dataclasses

    seen = 0
    for result in results:
        new = stack.warnings[seen:]
        seen = len(stack.warnings)
        if new:
            result = dataclasses.replace(result, warnings=(*new, *result.warnings))
        yield result
