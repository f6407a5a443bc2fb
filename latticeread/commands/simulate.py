"""``latticeread simulate``: write simulated frames (uint16 TIFF) and their ground truth."""

from __future__ import annotations

import argparse
import logging
from pathlib import Path

from latticeread.commands._types import number
from latticeread.errors import UsageError

log = logging.getLogger(__name__)


def add_parser(parser: argparse.ArgumentParser) -> None:
    parser.add_argument("out", type=Path, help="output TIFF stack (the truth goes to OUT with .truth.h5)")
    parser.add_argument("--scenario", default="square", choices=["square", "folded", "triangular"],
                        help="invented demo setting: lattice, PSF and camera (default: square)")
    parser.add_argument("--shots", type=number(low=1, integer=True), default=4, help="independent shots (default 4)")
    parser.add_argument("--images-per-shot", type=number(low=1, integer=True), default=2,
                        help="consecutive images of the same atoms per shot (default 2)")
    parser.add_argument("--size", type=number(low=16, high=16384, integer=True, unit="pixels"), nargs=2, default=(256, 256), metavar=("HEIGHT", "WIDTH"),
                        help="frame size in pixels (default 256 256)")
    parser.add_argument("--filling", type=number(low=0, high=1), default=None,
                        help="probability that a site of the region is loaded, 0..1 (scenario default 0.45)")
    parser.add_argument("--pattern", default="random", choices=["random", "mott", "checkerboard"],
                        help="occupation pattern (default random)")
    parser.add_argument("--photons", type=number(low=0, low_open=True, high=1e7, unit="photons"), default=None, help="mean detected photons per atom")
    parser.add_argument("--loss", type=number(low=0, high=1), default=None, help="loss probability per atom and image")
    parser.add_argument("--hop", type=number(low=0, high=1), default=None, help="hopping probability per atom and image")
    parser.add_argument("--jitter", type=number(low=0, high=1000, unit="pixels"), default=0.3,
                        help="RMS lattice displacement per frame in pixels (default 0.3)")
    real = parser.add_argument_group("imperfections of a real microscope (default: none)")
    real.add_argument("--hot-pixels", type=number(low=0, high=1e6, integer=True), default=0,
                      help="number of hot pixels (dark charge at the same pixels in every frame)")
    real.add_argument("--cosmic-rays", type=number(low=0, high=1000), default=0.0,
                      help="mean cosmic-ray hits (streaks and blobs) per frame")
    real.add_argument("--illumination-waist", type=number(low=0, low_open=True, high=1e6, unit="pixels"),
                      default=None, help="1/e^2 radius of a Gaussian imaging beam centred on the frame, pixels")
    real.add_argument("--stray-light", type=number(low=0, high=1e6, unit="photons"), default=0.0,
                      help="photons per pixel of a gradient and humps that change from frame to frame")
    real.add_argument("--distortion", type=float, default=0.0, metavar="K1",
                      help="radial lens distortion about the frame centre, 1/pixels^2 (negative: barrel; write --distortion=-1e-7)")
    real.add_argument("--aberrations", type=number(low=0, high=2), default=0.0, metavar="WAVES",
                      help="aberrations at the frame corner, waves rms (a PSF that worsens toward the edge)")
    real.add_argument("--drift", type=float, nargs=2, default=(0.0, 0.0), metavar=("DX", "DY"),
                      help="lattice drift per frame, pixels")
    parser.add_argument("--seed", type=int, default=0, help="random seed (default 0)")
    parser.add_argument("--force", action="store_true",
                        help="replace OUT and its truth file when they exist")


def run(args: argparse.Namespace) -> int:
    import tifffile

    from latticeread.core.simulate import demo_scenario, simulate_frames
    from latticeread.io.atomic import atomic_path
    from latticeread.io.limits import describe_bytes, memory_shortfall
    from latticeread.io.outputs import check_outputs, check_suffix
    from latticeread.io.truth_file import write_truth

    out = Path(args.out)
    check_suffix(out, [".tif", ".tiff"], what="the output")
    truth_path = out.with_suffix(".truth.h5")
    check_outputs([out, truth_path], force=args.force)
    n_frames = args.shots * args.images_per_shot
    # float64 photons and the uint16 frames, with temporaries: about 16 bytes per pixel
    short = memory_shortfall(tuple(args.size), n_frames=n_frames, itemsize=16)
    if short is not None:
        raise UsageError(f"simulating {n_frames} frames of {args.size[0]}x{args.size[1]} pixels needs about "
                         f"{describe_bytes(short[0])} of memory but only {describe_bytes(short[1])} is available; "
                         "simulate fewer or smaller frames")
    kw = demo_scenario(args.scenario, frame_shape=tuple(args.size))
    pixel_nm = kw.pop("pixel_size_nm")
    for key, value in (("filling", args.filling), ("photons_per_atom", args.photons),
                       ("loss_probability", args.loss), ("hop_probability", args.hop)):
        if value is not None:
            kw[key] = value
    try:
        frames, truth = simulate_frames(**kw, pattern=args.pattern, n_shots=args.shots,
                                        images_per_shot=args.images_per_shot, phase_jitter=args.jitter,
                                        phase_drift=tuple(args.drift), hot_pixels=int(args.hot_pixels),
                                        cosmic_rays=float(args.cosmic_rays),
                                        illumination_waist=args.illumination_waist,
                                        background_structure=float(args.stray_light), distortion_k1=args.distortion,
                                        psf_field=float(args.aberrations), rng=args.seed)
    except ValueError as exc:
        raise UsageError(f"cannot simulate: {exc}") from exc
    truth.settings.update({"scenario": args.scenario, "seed": args.seed, "pixel_size_nm": pixel_nm})
    with atomic_path(out) as tmp:
        tifffile.imwrite(tmp, frames, photometric="minisblack", compression="zlib",
                         metadata={"axes": "QYX"}, description=None)
    write_truth(truth_path, truth)
    print(f"wrote {out} ({frames.shape[0]} frames of {frames.shape[1]}x{frames.shape[2]} uint16) "
          f"and {truth_path} ({len(truth.sites)} sites, seed {args.seed})")
    return 0
