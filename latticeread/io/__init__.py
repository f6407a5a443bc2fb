"""File input and output: frames in, tables and calibrations out.

Everything that touches files lives here (the numerical core in :mod:`latticeread.core`
never does). All writers are atomic (:mod:`latticeread.io.atomic`): an output file is
either complete or absent, and an existing file is never left half-overwritten.
"""

from latticeread.io.atomic import atomic_path, atomic_write
from latticeread.io.calibration_file import load_calibration, load_camera, save_calibration, save_camera
from latticeread.io.frames import FrameReport, FrameStack, check_frame, load_frames, load_mask
from latticeread.io.export import (
    OccupationFile,
    read_occupation_hdf5,
    read_sites_csv,
    read_sites_metadata,
    write_occupation_hdf5,
    write_sites_csv,
)
from latticeread.io.results import read_results
from latticeread.io.run_file import RunData, read_run

__all__ = [
    "load_frames",
    "load_mask",
    "check_frame",
    "FrameStack",
    "FrameReport",
    "atomic_write",
    "atomic_path",
    "save_calibration",
    "load_calibration",
    "save_camera",
    "load_camera",
    "write_sites_csv",
    "read_sites_csv",
    "read_sites_metadata",
    "write_occupation_hdf5",
    "read_occupation_hdf5",
    "OccupationFile",
    "read_run",
    "RunData",
    "read_results",
]
