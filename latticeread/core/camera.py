"""Camera description and the conversion between counts and photons.

EMCCD: photoelectrons (Poisson) plus clock-induced charge pass a gain register whose output
for ``n`` electrons is gamma-distributed with shape ``n`` and scale ``em_gain``; this doubles
the variance at high gain (excess noise factor sqrt(2); Robbins & Hadwen, IEEE Trans.
Electron Devices 50, 1227 (2003)). Then Gaussian read noise, a bias offset and digitisation.

sCMOS: Poisson photoelectrons times a per-pixel gain, plus Gaussian read noise and a
per-pixel offset.
"""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np

__all__ = ["CameraModel"]


@dataclass(frozen=True)
class CameraModel:
    """A small camera description.

    Attributes
    ----------
    kind : {"emccd", "scmos"}
    em_gain : float
        Electron-multiplying gain (1 for sCMOS).
    counts_per_electron : float
        Conversion gain of the read-out, counts (ADU) per electron after multiplication.
    bias : float
        Offset added to every pixel, counts.
    read_noise : float
        RMS read noise, counts.
    quantum_efficiency : float
        Probability that a photon reaching the sensor gives a photoelectron.
    clock_induced_charge : float
        Spurious electrons per pixel per frame before the gain register (EMCCD).
    saturation : int
        Largest value the digitiser can output, counts.
    """

    kind: str = "emccd"
    em_gain: float = 1.0
    counts_per_electron: float = 1.0
    bias: float = 0.0
    read_noise: float = 0.0
    quantum_efficiency: float = 1.0
    clock_induced_charge: float = 0.0
    saturation: int = 65535
    offset_map: np.ndarray | None = field(default=None, repr=False, compare=False)
    gain_map: np.ndarray | None = field(default=None, repr=False, compare=False)

    def __post_init__(self):
        if self.kind not in ("emccd", "scmos"):
            raise ValueError(f"unknown camera kind {self.kind!r}; use 'emccd' or 'scmos'")
        for name in ("em_gain", "counts_per_electron", "quantum_efficiency"):
            v = getattr(self, name)
            if not (np.isfinite(v) and v > 0):
                raise ValueError(f"camera {name} must be positive, got {v}")
        if not (0 < self.quantum_efficiency <= 1):
            raise ValueError(f"quantum efficiency must be in (0, 1], got {self.quantum_efficiency}")
        for name in ("bias", "read_noise", "clock_induced_charge"):
            v = getattr(self, name)
            if not (np.isfinite(v) and v >= 0):
                raise ValueError(f"camera {name} must be >= 0, got {v}")

    @property
    def counts_per_photon(self) -> float:
        """Mean counts per photon reaching the sensor (QE x EM gain x conversion gain)."""
        return self.quantum_efficiency * self.em_gain * self.counts_per_electron

    @property
    def excess_noise_factor_squared(self) -> float:
        """F^2: 2 for an EMCCD at high gain (Robbins & Hadwen 2003), 1 for sCMOS."""
        if self.kind == "emccd" and self.em_gain > 1:
            return 2.0 - 1.0 / self.em_gain
        return 1.0

    def counts_to_photons(self, counts) -> np.ndarray:
        """Convert raw counts (bias included) to photons at the sensor."""
        counts = np.asarray(counts, dtype=float)
        offset = self.offset_map if self.offset_map is not None else self.bias
        return (counts - offset) / self.counts_per_photon

    def photon_variance(self, photons) -> np.ndarray:
        """Variance in photons^2 of a pixel holding ``photons`` mean photons (noise model)."""
        photons = np.clip(np.asarray(photons, float), 0, None)
        ne = photons * self.quantum_efficiency + (self.clock_induced_charge if self.kind == "emccd" else 0.0)
        var_e = self.excess_noise_factor_squared * ne
        read_e = self.read_noise / (self.counts_per_electron * self.em_gain)
        return (var_e + read_e**2) / self.quantum_efficiency**2

    def to_dict(self) -> dict:
        d = {k: getattr(self, k) for k in ("kind", "em_gain", "counts_per_electron", "bias", "read_noise",
                                            "quantum_efficiency", "clock_induced_charge", "saturation")}
        return {k: (v if isinstance(v, str) else float(v) if k != "saturation" else int(v)) for k, v in d.items()}

    @classmethod
    def from_dict(cls, data: dict) -> "CameraModel":
        known = {"kind", "em_gain", "counts_per_electron", "bias", "read_noise", "quantum_efficiency",
                 "clock_induced_charge", "saturation"}
        return cls(**{k: v for k, v in data.items() if k in known})
