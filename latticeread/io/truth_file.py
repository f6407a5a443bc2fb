"""Ground-truth files written beside simulated frames (HDF5).

Layout of ``*.truth.h5``:

================================  ==============================================
dataset                           meaning
================================  ==============================================
``initial_occupation``            (frames, rows, cols) uint8, 255 outside region
``final_occupation``              (frames, rows, cols) uint8, 255 outside region
``photons``                       (frames, rows, cols) float, mean detected photons
``lost``                          (frames, rows, cols) uint8, 1 = atom lost
``site_row``, ``site_col``        (N,) int, indices of the region sites
``site_x``, ``site_y``            (N,) float, site centres at the reference offset (pixels)
``frame_offset``                  (frames, 2) float, lattice offset (x, y) of each frame
``site_xy_frames``                (frames, N, 2) float, true (x, y) of every site per frame
``site_illumination``             (N,) float, relative brightness in the imaging beam (optional)
``background_maps``               (frames, H, W) float32, stray light, photons/pixel (optional)
``artefacts/...``                 hot pixels and cosmic-ray charge (optional; see
                                  :class:`SimulationTruth`)
================================  ==============================================

The attribute ``truth_json`` holds :meth:`SimulationTruth.to_dict` (geometry, PSF, camera,
settings); ``program_version`` the writer's version.
"""

from __future__ import annotations

import json
from pathlib import Path

import h5py
import numpy as np

from latticeread import __version__
from latticeread.core.simulate import SimulationTruth
from latticeread.errors import FrameFileError
from latticeread.io.atomic import atomic_path

__all__ = ["write_truth", "read_truth"]


def write_truth(path, truth: SimulationTruth) -> Path:
    """Write the ground truth of a simulation to an HDF5 file (atomically)."""
    path = Path(path)
    with atomic_path(path) as tmp, h5py.File(tmp, "w") as h5:
        for name, arr in (("initial_occupation", truth.initial_occupation),
                          ("final_occupation", truth.final_occupation),
                          ("lost", truth.lost.astype(np.uint8))):
            mats = np.stack([truth.sites.to_matrix(a, fill=255, dtype=np.uint8) for a in arr])
            h5.create_dataset(name, data=mats, compression="gzip", fillvalue=255)
        photons = np.stack([truth.sites.to_matrix(p, fill=np.nan, dtype=float) for p in truth.photons])
        h5.create_dataset("photons", data=photons, compression="gzip")
        h5.create_dataset("site_row", data=truth.sites.rows)
        h5.create_dataset("site_col", data=truth.sites.cols)
        h5.create_dataset("site_x", data=truth.sites.x)
        h5.create_dataset("site_y", data=truth.sites.y)
        h5.create_dataset("frame_offset", data=np.array([g.offset for g in truth.geometries]))
        for name, arr in truth.artefacts.items():  # hot pixels and cosmic-ray charge
            h5.create_dataset(f"artefacts/{name}", data=np.asarray(arr), compression="gzip")
        if truth.frame_positions is not None:
            h5.create_dataset("site_xy_frames", data=truth.frame_positions, compression="gzip", shuffle=True)
        if truth.illumination is not None:
            h5.create_dataset("site_illumination", data=truth.illumination)
        if truth.background_maps is not None:
            # stray light to 1e-3 photons per pixel (lossy scale-offset filter): a smooth map stored exactly
            # would take most of the file
            h5.create_dataset("background_maps", data=truth.background_maps, compression="gzip", shuffle=True,
                              scaleoffset=3)
        h5.attrs["truth_json"] = json.dumps(truth.to_dict())
        h5.attrs["program_version"] = __version__
        h5.attrs["row_min"] = truth.sites.row_min
        h5.attrs["col_min"] = truth.sites.col_min
    return path


def read_truth(path) -> dict:
    """Read a truth file into a dict of numpy arrays plus ``"info"`` (the JSON attributes)."""
    path = Path(path)
    try:
        with h5py.File(path, "r") as h5:
            out = {name: (h5[name][()] if isinstance(h5[name], h5py.Dataset)
                          else {k: v[()] for k, v in h5[name].items()}) for name in h5.keys()}
            out["info"] = json.loads(h5.attrs["truth_json"])
            out["row_min"] = int(h5.attrs["row_min"])
            out["col_min"] = int(h5.attrs["col_min"])
    except (OSError, KeyError) as exc:
        raise FrameFileError(f"cannot read truth file {path}: {exc}") from exc
    return out
