"""Everything needed to reconstruct frames of one experimental setting.

A :class:`Calibration` bundles the lattice geometry (vectors stable from shot to shot; the
offset is re-found per frame), the point-spread function, the camera description, the
occupancy threshold and the frame shape it was made for. It converts to and from plain
dicts; JSON files are written by :mod:`latticeread.io`.
"""

from __future__ import annotations

import dataclasses
from dataclasses import dataclass, field

from latticeread import __version__
from latticeread.core.camera import CameraModel
from latticeread.core.geometry import LatticeGeometry
from latticeread.core.psf import PSFModel
from latticeread.errors import CalibrationError

__all__ = ["Calibration"]

_REQUIRED = ("geometry", "psf", "camera", "frame_shape")


@dataclass(frozen=True)
class Calibration:
    """Geometry, PSF, camera and threshold for one imaging setting.

    Attributes
    ----------
    geometry : LatticeGeometry
        Lattice vectors (pixels) and a reference offset.
    psf : PSFModel
        Image of one atom.
    camera : CameraModel
        Counts-to-photons conversion and noise model.
    frame_shape : (int, int)
        ``(height, width)`` in pixels of the frames this calibration was made from.
    threshold : float or None
        Occupancy threshold on the site amplitude in photons; None = choose per run from
        the histogram.
    threshold_method : str
        How the threshold is chosen when it is not fixed ("mixture", "otsu", "minimum").
    amplitude_method : str
        "linear" (default least-squares projection), "nonlinear", "wiener" or "richardson_lucy".
    pixel_size_nm : float or None
        Camera pixel projected into the atom plane, nanometres (for lengths in nm).
    notes : dict
        Provenance: source files, fit diagnostics, program version.
    """

    geometry: LatticeGeometry
    psf: PSFModel
    camera: CameraModel = field(default_factory=CameraModel)
    frame_shape: tuple[int, int] = (0, 0)
    threshold: float | None = None
    threshold_method: str = "mixture"
    amplitude_method: str = "linear"
    pixel_size_nm: float | None = None
    notes: dict = field(default_factory=dict, compare=False)

    def replace(self, **changes) -> "Calibration":
        return dataclasses.replace(self, **changes)

    def check_frame_shape(self, shape, *, where: str = "the frame") -> None:
        """Raise CalibrationError when ``shape`` differs from the calibrated frame shape."""
        shape = tuple(int(s) for s in shape[-2:])
        if tuple(self.frame_shape) != (0, 0) and shape != tuple(self.frame_shape):
            raise CalibrationError(
                f"{where} is {shape[0]}x{shape[1]} pixels but the calibration was made for "
                f"{self.frame_shape[0]}x{self.frame_shape[1]}; recalibrate or crop the frames")

    def to_dict(self) -> dict:
        return {
            "format": "latticeread-calibration",
            "format_version": 1,
            "program_version": __version__,
            "geometry": self.geometry.to_dict(),
            "psf": self.psf.to_dict(),
            "camera": self.camera.to_dict(),
            "frame_shape": [int(s) for s in self.frame_shape],
            "threshold": None if self.threshold is None else float(self.threshold),
            "threshold_method": self.threshold_method,
            "amplitude_method": self.amplitude_method,
            "pixel_size_nm": self.pixel_size_nm,
            "notes": self.notes,
        }

    @classmethod
    def from_dict(cls, data: dict) -> "Calibration":
        if not isinstance(data, dict):
            raise CalibrationError(f"a calibration must be a JSON object, got {type(data).__name__}")
        missing = [k for k in _REQUIRED if k not in data]
        if missing:
            raise CalibrationError(f"calibration is missing the key(s) {', '.join(missing)}")
        try:
            geometry = LatticeGeometry.from_dict(data["geometry"])
            psf = PSFModel.from_dict(data["psf"])
            camera = CameraModel.from_dict(data["camera"])
            shape = tuple(int(s) for s in data["frame_shape"])
            if len(shape) != 2:
                raise ValueError(f"frame_shape must have two entries, got {shape}")
            threshold = data.get("threshold")
            threshold = None if threshold is None else float(threshold)
            pixel = data.get("pixel_size_nm")
            return cls(
                geometry=geometry, psf=psf, camera=camera, frame_shape=shape, threshold=threshold,
                threshold_method=str(data.get("threshold_method", "mixture")),
                amplitude_method=str(data.get("amplitude_method", "linear")),
                pixel_size_nm=None if pixel is None else float(pixel),
                notes=dict(data.get("notes", {})),
            )
        except CalibrationError:
            raise
        except (KeyError, TypeError, ValueError) as exc:
            raise CalibrationError(f"calibration has a malformed entry: {type(exc).__name__}: {exc}") from exc
