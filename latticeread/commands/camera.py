"""``latticeread camera``: bias, read noise and gain from dark and flat frames.

Examples
--------
sCMOS, one dark stack and one stack per illumination level::

    latticeread camera darks.tif flat_1.tif flat_2.tif flat_3.tif --out camera.json

EMCCD with a known conversion gain (from a run with the EM gain off, or the data sheet)::

    latticeread camera darks.tif flats.tif --frames-per-level 10 --camera-kind emccd \\
        --counts-per-electron 0.17 --out camera.json
"""

from __future__ import annotations

import argparse
import logging
import sys
from pathlib import Path

from latticeread.commands._types import number
from latticeread.errors import FrameError, UsageError

log = logging.getLogger(__name__)


def add_parser(parser: argparse.ArgumentParser) -> None:
    parser.add_argument("darks", type=Path, help="dark frames (shutter closed), at least two")
    parser.add_argument("flats", type=Path, nargs="*",
                        help="uniformly lit frames, one file per light level (or see --frames-per-level)")
    parser.add_argument("--out", "-o", type=Path, default=None,
                        help="write the camera description to this JSON file")
    parser.add_argument("--camera-kind", choices=["scmos", "emccd"], default="scmos",
                        help="camera type: scmos/ccd (no excess noise) or emccd (default scmos)")
    parser.add_argument("--kind", dest="camera_kind", choices=["scmos", "emccd"], default=argparse.SUPPRESS,
                        help=argparse.SUPPRESS)  # older spelling of --camera-kind
    parser.add_argument("--counts-per-electron", type=float, default=None,
                        help="conversion gain in counts per electron; for an EMCCD it separates the EM gain "
                             "from the measured product")
    parser.add_argument("--em-gain", type=float, default=None,
                        help="EMCCD gain, if known instead of --counts-per-electron")
    parser.add_argument("--quantum-efficiency", type=float, default=1.0,
                        help="photoelectrons per photon, from the data sheet (default 1)")
    parser.add_argument("--saturation", type=int, default=None,
                        help="largest camera value in counts (default: maximum of the integer type)")
    parser.add_argument("--clock-induced-charge", type=float, default=0.0,
                        help="EMCCD spurious electrons per pixel per frame, copied into the model (default 0)")
    parser.add_argument("--frames-per-level", type=number(low=2, integer=True), default=None,
                        help="split each flat file into consecutive groups of this many frames, one light "
                             "level per group")
    parser.add_argument("--dataset", default=None, help="dataset name inside HDF5/.npz files")
    parser.add_argument("--bad-pixels", type=Path, default=None,
                        help="also write a bad-pixel mask (.npy, True = bad) found from the darks")
    parser.add_argument("--n-sigma", type=number(low=0, low_open=True), default=6.0,
                        help="outlier limit for bad pixels, robust standard deviations (default 6)")
    parser.add_argument("--force", action="store_true",
                        help="replace the --out and --bad-pixels files when they exist")


def _read(path: Path, dataset):
    import warnings

    import numpy as np

    from latticeread.io.frames import load_frames

    with warnings.catch_warnings():
        # constant or saturated frames are reported by the photon-transfer checks instead
        warnings.simplefilter("ignore")
        with load_frames(path, dataset=dataset) as stack:
            data = np.asarray(stack.read_all())
            saturation = stack.saturation
    return data, saturation


def run(args: argparse.Namespace) -> int:
    import numpy as np

    from latticeread.core.camera_estimate import bad_pixel_mask, estimate_camera
    from latticeread.io.atomic import atomic_write
    from latticeread.io.calibration_file import save_camera

    from latticeread.io.outputs import check_outputs, check_suffix

    if args.out is not None:
        check_suffix(args.out, [".json"], what="the camera description")
    if args.bad_pixels is not None:
        check_suffix(args.bad_pixels, [".npy"], what="the bad-pixel mask")
    check_outputs([args.out, args.bad_pixels], force=args.force,
                  inputs={"dark frame file": args.darks, "flat frame file": list(args.flats)})
    if args.out is not None and args.bad_pixels is not None and args.out == args.bad_pixels:
        raise UsageError("--out and --bad-pixels name the same file; give two different names")
    darks, saturation = _read(args.darks, args.dataset)
    if len(darks) < 2:
        raise FrameError(f"{args.darks.name} holds {len(darks)} frame; at least two dark frames are needed")
    levels = []
    for path in args.flats:
        data, _ = _read(path, args.dataset)
        if data.shape[1:] != darks.shape[1:]:
            raise FrameError(f"{path.name} has {data.shape[1]}x{data.shape[2]}-pixel frames but the darks in "
                             f"{args.darks.name} are {darks.shape[1]}x{darks.shape[2]}")
        if args.frames_per_level:
            k = int(args.frames_per_level)
            if k < 2 or len(data) % k:
                raise FrameError(f"{path.name} has {len(data)} frames, which cannot be split into light levels "
                                 f"of {k} frames (need at least two frames per level)")
            levels += [data[i:i + k] for i in range(0, len(data), k)]
        else:
            levels.append(data)
    sat = args.saturation if args.saturation is not None else (saturation if saturation is not None else 65535)
    try:
        est = estimate_camera(darks, levels, kind=args.camera_kind, counts_per_electron=args.counts_per_electron,
                              em_gain=args.em_gain, quantum_efficiency=args.quantum_efficiency,
                              saturation=int(sat), clock_induced_charge=args.clock_induced_charge)
    except ValueError as exc:
        if isinstance(exc, FrameError):
            raise
        raise FrameError(f"cannot build the camera model: {exc}") from exc
    cam, dark = est.camera, est.dark
    lines = [f"dark frames: {dark.n_frames} of {darks.shape[1]}x{darks.shape[2]} pixels",
             f"bias            {cam.bias:.2f} counts",
             f"read noise      {cam.read_noise:.3f} counts rms",
             f"offset pattern  {dark.fixed_pattern_noise:.3f} counts rms over pixels"]
    if est.transfer is not None:
        t = est.transfer
        lines.append(f"photon transfer: {sum(p.used for p in t.points)} of {len(t.points)} levels used, "
                     f"slope {t.slope:.5g} counts/e (+-{100 * t.slope_relative_error:.2f}%), "
                     f"nonlinearity {100 * t.nonlinearity:.2f}%")
        lines.append(f"system gain     {t.system_gain:.5g} counts per photoelectron (F^2 = "
                     f"{t.excess_noise_factor_squared:.4g})")
    lines.append(f"conversion gain {cam.counts_per_electron:.5g} counts per electron")
    if cam.kind == "emccd":
        lines.append(f"EM gain         {cam.em_gain:.5g}")
    print("\n".join(lines))
    for w in est.warnings:
        print(f"warning: {w}", file=sys.stderr)
    inputs = [args.darks, *args.flats]
    if args.bad_pixels is not None:
        mask = bad_pixel_mask(darks, n_sigma=args.n_sigma)
        with atomic_write(args.bad_pixels, protect=inputs) as fh:
            np.save(fh, mask)
        print(f"wrote {args.bad_pixels} ({int(mask.sum())} bad pixels)")
    if args.out is not None:
        save_camera(args.out, est, inputs={"darks": str(args.darks), "flats": [str(p) for p in args.flats]},
                    protect=inputs)
        print(f"wrote {args.out}")
    return 0
