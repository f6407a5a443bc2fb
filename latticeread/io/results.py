"""Read a results file into plain numpy arrays and a dict of settings (for notebooks).

Every HDF5 results file latticeread writes (``reconstruct --out x.h5``, ``batch``,
``watch`` and the window's HDF5 export) has one layout, described in
:mod:`latticeread.io.run_file`. :func:`read_results` turns it into two plain Python
objects, with no latticeread classes in them::

    from latticeread.io import read_results
    arrays, settings = read_results("run.h5")
    arrays["occupation"].shape        # (frames, rows, cols), uint8, 255 outside the region
    settings["calibration"]["geometry"]["a1"]

It never blocks the program writing the file and is never blocked by it: call it again
while a ``watch`` runs to see the frames committed since (a frame being written is not
included until it is complete).
"""

from __future__ import annotations

import json
import os
from pathlib import Path

import numpy as np

from latticeread.errors import FrameFileError

from .run_file import RUN_FORMAT, open_run_for_reading, read_run

__all__ = ["read_results"]

#: Root attributes stored as JSON text.
_JSON_ATTRS = ("calibration", "metadata", "units", "inputs", "fidelity", "geometry", "psf", "camera")


def read_results(path, *, matrices: bool = True) -> tuple[dict, dict]:
    """Read a latticeread results file.

    Parameters
    ----------
    path : str or PathLike
        The ``.h5`` file.
    matrices : bool
        Read the per-site matrices (False: only the per-frame columns, fast for long runs).

    Returns
    -------
    arrays : dict of str -> ndarray
        One entry per frame (first axis; a shot of several images has one entry per image)
        unless noted:

        * ``occupation`` (n, rows, cols) uint8: 1 occupied, 0 empty, 255 outside the region;
        * ``amplitude`` (photons), ``p_occupied``, ``x``, ``y`` (pixels): (n, rows, cols)
          float64, NaN outside the region; ``flags`` (n, rows, cols) uint8 quality bits;
        * ``source`` (input file), ``file_hash``: str; ``frame_index`` int64;
        * ``offset``, ``a1``, ``a2`` (n, 2) pixels (x, y); ``origin`` (n, 2) lattice site
          (row, col) of matrix element [0, 0];
        * ``threshold`` (photons), ``false_positive_rate``, ``false_negative_rate``,
          ``filling``, ``peak_to_background``, ``lattice_residual``, ``written_at``
          (Unix time): float64; ``n_sites``, ``n_occupied``: int64;
        * ``warnings``: str, one warning per line ("" when none);
        * ``frame_digest``: str, hex digest of the frame's pixels ("" in files before
          format version 5);
        * ``offset_sigma`` (n, 2) pixels: 1-sigma error of each frame's offset (NaN: not
          estimated, or a file before format version 6); ``offset_method``: str, how it was
          found (``atoms``, ``sites``, ``model``, ``fourier``, ``calibration``; "" before
          format version 6);
        * ``failure_source``, ``failure_file_hash``, ``failure_error``,
          ``failure_reason``: str, ``failure_frame_index`` int64 (-1: whole file),
          ``failure_resolved`` bool: one entry per failed frame or file, not per frame.

        Without ``matrices`` the six matrices are absent.
    settings : dict
        ``calibration`` (dict), ``metadata`` (dict: command, inputs...),
        ``program_version``, ``format_version``, ``created`` (UTC), ``n_frames``,
        ``n_failures`` and any further root attributes (``fidelity``, ``units``...).

    Raises
    ------
    FrameFileError
        The file is missing, not HDF5, or not a latticeread results file.
    """
    path = Path(os.fspath(path))
    with open_run_for_reading(path) as h5:
        if h5.attrs.get("format") != RUN_FORMAT:
            raise FrameFileError(f"{path} is not a latticeread results file (written by an older version? read "
                                 "it with latticeread.io.read_occupation_hdf5)")
        settings = {}
        for key, value in h5.attrs.items():
            if isinstance(value, bytes):
                value = value.decode("utf-8")
            if key in _JSON_ATTRS and isinstance(value, str):
                try:
                    value = json.loads(value)
                except json.JSONDecodeError:
                    pass
            elif isinstance(value, np.generic):
                value = value.item()
            settings[key] = value
    run = read_run(path, matrices=bool(matrices))
    arrays = {
        "source": run.source, "file_hash": run.file_hash, "frame_index": run.frame_index,
        "offset": run.offset, "a1": run.a1, "a2": run.a2, "origin": run.origin, "threshold": run.threshold,
        "false_positive_rate": run.false_positive_rate, "false_negative_rate": run.false_negative_rate,
        "n_sites": run.n_sites, "n_occupied": run.n_occupied, "filling": run.filling,
        "peak_to_background": run.peak_to_background, "lattice_residual": run.lattice_residual,
        "written_at": run.written_at, "warnings": np.array(["\n".join(w) for w in run.warnings], dtype=str),
        "frame_digest": run.frame_digest, "offset_sigma": run.offset_sigma, "offset_method": run.offset_method,
    }
    if matrices:
        for name in ("occupation", "amplitude", "p_occupied", "x", "y", "flags"):
            arrays[name] = getattr(run, name)
    for name in ("source", "file_hash", "frame_index", "error", "reason", "resolved"):
        arrays[f"failure_{name}"] = getattr(run.failures, name)
    settings.update(calibration=run.calibration, metadata=run.metadata, program_version=run.program_version,
                    n_frames=len(run), n_failures=len(run.failures))
    return arrays, settings
