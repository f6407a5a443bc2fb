"""Forward model of a site-resolved fluorescence image: the ground truth for tests and demos.

The model, step by step (every step documented with its units):

1. **Lattice**: a Bravais lattice with vectors ``a1``, ``a2`` and an offset in pixels
   (:class:`~latticeread.core.geometry.LatticeGeometry`), and a *region* of sites inside the
   frame (disk, rectangle, an index mask, or every site that fits).
2. **Occupation**: random filling, a Mott-like plateau with a thermal edge, a checkerboard, or a
   given vector/matrix.
3. **Dynamics during each exposure**: every atom present at the start is lost with probability
   ``loss_probability`` (it shines for a uniformly random fraction of the exposure), otherwise
   hops with probability ``hop_probability`` to a random nearest neighbour (index offsets
   (+-1, 0), (0, +-1)) at a uniformly random time, its photons split between the two sites.
   A hop onto an occupied site loses both atoms at that moment (light-assisted pair loss).
   A hop that would leave the region is not made. Consecutive images of one shot start from
   the previous image's final occupation.
4. **Photons**: each atom emits, into the detection path, a mean of ``photons_per_atom``
   detected photons over a full exposure, times a per-atom brightness factor (gamma
   distributed, relative spread ``brightness_spread``), times the fraction of the exposure it
   spent on the site; plus a uniform ``background`` in photons per pixel. The photon image is
   the PSF-weighted sum (pixel-integrated PSF stamps), so per-pixel Poisson statistics equal
   per-atom Poisson statistics split over pixels.
5. **Camera** (:class:`~latticeread.core.camera.CameraModel`): photoelectrons are Poisson with
   mean QE x photons (+ clock-induced charge for EMCCD); an EMCCD gain register outputs a
   gamma-distributed charge with shape n and scale ``em_gain`` (Robbins & Hadwen 2003);
   sCMOS multiplies by a per-pixel gain map. Then Gaussian read noise (counts), the bias or
   per-pixel offset, rounding and clipping to ``[0, saturation]`` as ``uint16``.
"""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np

from latticeread.core.camera import CameraModel
from latticeread.core.geometry import LatticeGeometry, SiteGrid, lattice_sites
from latticeread.core.psf import PSFModel, airy_psf, render_sites

__all__ = [
    "SimulationTruth",
    "simulate_frames",
    "make_region",
    "make_occupation",
    "apply_camera",
    "demo_scenario",
    "DEMO_SCENARIOS",
]

_NEIGHBOUR_OFFSETS = np.array([(1, 0), (-1, 0), (0, 1), (0, -1)])


@dataclass(frozen=True)
class SimulationTruth:
    """What the forward model put into the frames.

    Attributes
    ----------
    geometry : LatticeGeometry
        Reference geometry (offset of frame 0 before jitter).
    geometries : tuple of LatticeGeometry
        Geometry of every frame (offsets differ when ``phase_jitter`` or ``phase_drift`` > 0).
    sites : SiteGrid
        The sites of the region, at the reference geometry.
    psf : PSFModel
    camera : CameraModel
    frame_shape : (int, int)
    n_shots, images_per_shot : int
        Frames are ordered shot-major: frame ``f`` is image ``f % images_per_shot`` of shot
        ``f // images_per_shot``.
    initial_occupation, final_occupation : (n_frames, N) ndarray of uint8
        Occupation of every region site at the start and end of each exposure.
    photons : (n_frames, N) ndarray of float
        Mean detected photons collected from each site during each exposure (before Poisson
        and camera noise; the frames carry the noisy realisation).
    lost : (n_frames, N) ndarray of bool
        An atom starting on this site was lost during the exposure (alone or in a pair).
    hop_target : (n_frames, N) ndarray of int
        Index (into the site list) the atom starting here hopped to, or -1.
    background : float
        Background photons per pixel.
    photons_per_atom : float
        Mean detected photons of an atom present for the whole exposure.
    settings : dict
        The simulation's options.
    artefacts : dict of ndarray
        Charge that did not come through the objective (empty when none was simulated):
        ``hot_pixel_index`` (flat pixel index ``row * width + col``) and
        ``hot_pixel_electrons`` (mean dark electrons per exposure, Poisson in every frame);
        ``cosmic_frame``, ``cosmic_index``, ``cosmic_electrons`` (electrons deposited in
        each pixel of each hit) and ``cosmic_hit`` (hit number, one per track or blob).
    frame_positions : (n_frames, N, 2) ndarray or None
        True ``(x, y)`` of every site in every frame (drift and distortion included), pixels.
    illumination : (N,) ndarray or None
        Relative brightness of each site in the imaging beam (None: uniform).
    background_maps : (n_frames, H, W) float32 ndarray or None
        Structured background added to the uniform one, photons per pixel (None: none).
    zone_psfs : tuple of PSFModel
        PSFs of the field tiles when the PSF varies across the field (empty: ``psf`` everywhere).
    zone_centres : (Z, 2) ndarray or None
        Tile centres ``(x, y)``, pixels; a site uses the PSF of the nearest centre.
    """

    def positions(self, frame: int) -> tuple[np.ndarray, np.ndarray]:
        """True site centres ``(x, y)`` in ``frame``, pixels."""
        if self.frame_positions is not None:
            return self.frame_positions[frame, :, 0], self.frame_positions[frame, :, 1]
        dx, dy = np.subtract(self.geometries[frame].offset, self.geometry.offset)
        return self.sites.x + dx, self.sites.y + dy

    def site_brightness(self, frame: int = 0) -> np.ndarray:
        """Relative brightness of each site from the illumination profile (1 = beam centre)."""
        return np.ones(len(self.sites)) if self.illumination is None else self.illumination

    def background_map(self, frame: int) -> np.ndarray:
        """Expected background photons per pixel in ``frame`` (uniform plus structured)."""
        out = np.full(self.frame_shape, self.background)
        return out if self.background_maps is None else out + self.background_maps[frame]

    def site_psfs(self, frame: int = 0) -> list:
        """The PSF of every site in ``frame`` (the zone PSF of the nearest tile centre)."""
        if not self.zone_psfs:
            return [self.psf] * len(self.sites)
        x, y = self.positions(frame)
        zone = np.argmin((x[:, None] - self.zone_centres[None, :, 0]) ** 2 +
                         (y[:, None] - self.zone_centres[None, :, 1]) ** 2, axis=1)
        return [self.zone_psfs[z] for z in zone]

    def artefact_mask(self, frame: int) -> np.ndarray:
        """Pixels holding cosmic-ray charge (over half an electron) in ``frame`` or a hot pixel."""
        mask = np.zeros(self.frame_shape, bool)
        a = self.artefacts
        if "hot_pixel_index" in a:
            mask.ravel()[a["hot_pixel_index"]] = True
        if "cosmic_frame" in a:
            sel = (a["cosmic_frame"] == frame) & (a["cosmic_electrons"] > 0.5)
            mask.ravel()[a["cosmic_index"][sel]] = True
        return mask

    geometry: LatticeGeometry
    geometries: tuple
    sites: SiteGrid
    psf: PSFModel
    camera: CameraModel
    frame_shape: tuple[int, int]
    n_shots: int
    images_per_shot: int
    initial_occupation: np.ndarray = field(repr=False)
    final_occupation: np.ndarray = field(repr=False)
    photons: np.ndarray = field(repr=False)
    lost: np.ndarray = field(repr=False)
    hop_target: np.ndarray = field(repr=False)
    background: float = 0.0
    photons_per_atom: float = 0.0
    settings: dict = field(default_factory=dict)
    artefacts: dict = field(default_factory=dict, repr=False)
    frame_positions: np.ndarray | None = field(default=None, repr=False)
    illumination: np.ndarray | None = field(default=None, repr=False)
    background_maps: np.ndarray | None = field(default=None, repr=False)
    zone_psfs: tuple = ()
    zone_centres: np.ndarray | None = field(default=None, repr=False)

    @property
    def n_frames(self) -> int:
        return self.n_shots * self.images_per_shot

    def occupation_matrices(self, *, final: bool = False, fill: int = 255) -> np.ndarray:
        """(n_frames, n_rows, n_cols) uint8 occupation matrices (``fill`` outside the region)."""
        occ = self.final_occupation if final else self.initial_occupation
        return np.stack([self.sites.to_matrix(o, fill=fill, dtype=np.uint8) for o in occ])

    def to_dict(self) -> dict:
        """JSON-ready summary (arrays excluded; they go to the truth file's datasets)."""
        return {
            "geometry": self.geometry.to_dict(),
            "frame_offsets": [list(g.offset) for g in self.geometries],
            "psf": self.psf.to_dict(),
            "camera": self.camera.to_dict(),
            "frame_shape": list(self.frame_shape),
            "n_shots": self.n_shots,
            "images_per_shot": self.images_per_shot,
            "background_photons_per_pixel": self.background,
            "photons_per_atom": self.photons_per_atom,
            "settings": self.settings,
        }


def make_region(geometry: LatticeGeometry, frame_shape, *, region=None, margin: float | None = None,
                psf: PSFModel | None = None) -> SiteGrid:
    """Sites of a region centred on the frame.

    Parameters
    ----------
    geometry : LatticeGeometry
    frame_shape : (int, int)
        ``(height, width)`` in pixels.
    region : None, ("disk", radius_sites), ("rectangle", n_rows, n_cols) or (R, C) bool array
        ``None``: every site at least ``margin`` pixels inside the frame. A disk has its radius
        in units of the mean lattice spacing; a rectangle or a bool index mask is centred on the
        site nearest the frame centre (mask element ``[R // 2, C // 2]`` is that site).
    margin : float, optional
        Pixels kept free at the frame border (default: the PSF radius, or 2 pixels).

    Returns
    -------
    SiteGrid
    """
    if margin is None:
        margin = float(psf.radius) if psf is not None else 2.0
    grid = lattice_sites(geometry, frame_shape, margin=margin)
    if region is None or len(grid) == 0:
        return grid
    height, width = frame_shape
    cx, cy = (width - 1) / 2.0, (height - 1) / 2.0
    fr, fc = geometry.fractional_indices(cx, cy)
    r0, c0 = int(np.rint(fr)), int(np.rint(fc))
    if isinstance(region, np.ndarray) or (isinstance(region, (list, tuple)) and len(region) and
                                          not isinstance(region[0], str)):
        mask = np.asarray(region, dtype=bool)
        if mask.ndim != 2:
            raise ValueError(f"a region mask must be a 2-D bool array over site indices, got shape {mask.shape}")
        ri = grid.rows - r0 + mask.shape[0] // 2
        ci = grid.cols - c0 + mask.shape[1] // 2
        inside = (ri >= 0) & (ri < mask.shape[0]) & (ci >= 0) & (ci < mask.shape[1])
        keep = np.zeros(len(grid), bool)
        keep[inside] = mask[ri[inside], ci[inside]]
    elif region[0] == "disk":
        radius_px = float(region[1]) * float(np.mean(geometry.spacings))
        keep = np.hypot(grid.x - cx, grid.y - cy) <= radius_px
    elif region[0] == "rectangle":
        n_rows, n_cols = int(region[1]), int(region[2])
        keep = ((grid.rows - r0 >= -(n_rows // 2)) & (grid.rows - r0 < n_rows - n_rows // 2) &
                (grid.cols - c0 >= -(n_cols // 2)) & (grid.cols - c0 < n_cols - n_cols // 2))
    else:
        raise ValueError(f"unknown region {region!r}; use ('disk', r), ('rectangle', rows, cols) or a bool mask")
    return _subset(grid, keep)


def _subset(grid: SiteGrid, keep: np.ndarray) -> SiteGrid:
    rows, cols = grid.rows[keep], grid.cols[keep]
    if rows.size == 0:
        return SiteGrid(rows, cols, grid.x[keep], grid.y[keep], 0, 0, 0, 0)
    return SiteGrid(rows, cols, grid.x[keep], grid.y[keep], int(rows.min()), int(cols.min()),
                    int(rows.max() - rows.min() + 1), int(cols.max() - cols.min() + 1))


def make_occupation(sites: SiteGrid, *, pattern: str = "random", filling: float = 0.3,
                    occupation=None, edge_radius: float | None = None, edge_width: float = 1.5,
                    rng=None) -> np.ndarray:
    """Initial occupation (N,) uint8 of the region sites.

    Parameters
    ----------
    sites : SiteGrid
    pattern : {"random", "mott", "checkerboard"}
        ``random``: each site filled with probability ``filling``. ``mott``: a plateau of
        filling ``filling`` inside ``edge_radius`` sites from the region centre, falling off
        as a Fermi function of width ``edge_width`` sites (a thermal edge). ``checkerboard``:
        sites with even ``row + col`` filled with probability ``filling``, odd ones empty.
    occupation : (N,) or (n_rows, n_cols) array, optional
        Use this occupation instead (a matrix is read at the site indices).
    """
    rng = np.random.default_rng(rng)
    n = len(sites)
    if occupation is not None:
        occ = np.asarray(occupation)
        if occ.ndim == 2:
            if occ.shape != sites.matrix_shape:
                raise ValueError(f"occupation matrix shape {occ.shape} does not match the region {sites.matrix_shape}")
            occ = sites.from_matrix(occ)
        if occ.shape != (n,):
            raise ValueError(f"occupation must have one entry per site ({n}), got shape {occ.shape}")
        return (occ != 0).astype(np.uint8)
    if not 0 <= filling <= 1:
        raise ValueError(f"filling must be between 0 and 1, got {filling}")
    if pattern == "random":
        p = np.full(n, filling)
    elif pattern == "mott":
        rc = (sites.rows.min() + sites.rows.max()) / 2 if n else 0
        cc = (sites.cols.min() + sites.cols.max()) / 2 if n else 0
        r = np.hypot(sites.rows - rc, sites.cols - cc)
        radius = edge_radius if edge_radius is not None else 0.35 * max(sites.n_rows, sites.n_cols)
        p = filling / (1.0 + np.exp((r - radius) / max(edge_width, 1e-6)))
    elif pattern == "checkerboard":
        p = np.where((sites.rows + sites.cols) % 2 == 0, filling, 0.0)
    else:
        raise ValueError(f"unknown occupation pattern {pattern!r}; use 'random', 'mott' or 'checkerboard'")
    return (rng.random(n) < p).astype(np.uint8)


def _neighbour_table(sites: SiteGrid) -> np.ndarray:
    """(N, 4) indices of the nearest neighbours of each site in the list, -1 if absent."""
    lookup = {(int(r), int(c)): i for i, (r, c) in enumerate(zip(sites.rows, sites.cols))}
    table = np.full((len(sites), 4), -1, dtype=np.int64)
    for i, (r, c) in enumerate(zip(sites.rows, sites.cols)):
        for k, (dr, dc) in enumerate(_NEIGHBOUR_OFFSETS):
            table[i, k] = lookup.get((int(r) + dr, int(c) + dc), -1)
    return table


def _expose(occupied: np.ndarray, brightness: np.ndarray, neighbours: np.ndarray, *,
            loss_probability: float, hop_probability: float, rng: np.random.Generator):
    """One exposure, events processed in time order.

    Each atom (identified by its starting site) has at most one event: loss or a hop.

    Returns
    -------
    final : (N,) uint8 occupation at the end of the exposure.
    shine : (N,) float, brightness x time spent on each site (exposure = 1).
    lost : (N,) bool, the atom starting here was lost (alone or in a pair).
    target : (N,) int, site the atom starting here hopped to, or -1.
    carried : (N,) float, brightness of the atom on each site at the end (atoms keep theirs).
    """
    n = occupied.size
    atoms = np.flatnonzero(occupied)
    u = rng.random(atoms.size)
    when = rng.random(atoms.size)
    kind = np.where(u < loss_probability, 1, np.where(u < loss_probability + hop_probability, 2, 0))
    shine = np.zeros(n)
    lost = np.zeros(n, bool)
    target = np.full(n, -1, dtype=np.int64)
    site_of = {int(a): int(a) for a in atoms}
    resident = {int(a): int(a) for a in atoms}  # site -> atom (its starting site)
    since = dict.fromkeys(site_of, 0.0)
    alive = set(site_of)
    carried = brightness.copy()
    for k in np.argsort(when):
        if kind[k] == 0:
            continue
        a, t = int(atoms[k]), float(when[k])
        if a not in alive:  # removed earlier by a pair loss
            continue
        s = site_of[a]
        if kind[k] == 1:
            shine[s] += brightness[a] * (t - since[a])
            alive.discard(a)
            del resident[s]
            lost[a] = True
            continue
        choices = neighbours[s][neighbours[s] >= 0]
        if choices.size == 0:  # no neighbour inside the region: the hop is not made
            continue
        j = int(rng.choice(choices))
        shine[s] += brightness[a] * (t - since[a])
        del resident[s]
        target[a] = j
        if j in resident:  # light-assisted pair loss
            b = resident.pop(j)
            shine[j] += brightness[b] * (t - since[b])
            alive.discard(a)
            alive.discard(b)
            lost[a] = lost[b] = True
        else:
            resident[j] = a
            carried[j] = brightness[a]
            site_of[a] = j
            since[a] = t
    for a in alive:
        shine[site_of[a]] += brightness[a] * (1.0 - since[a])
    final = np.zeros(n, np.uint8)
    final[list(resident)] = 1
    return final, shine, lost, target, carried


def apply_camera(photon_image: np.ndarray, camera: CameraModel, *, rng=None, dark_electrons=None,
                 deposited_electrons=None) -> np.ndarray:
    """Turn a mean photon image (photons per pixel) into a uint16 camera frame (counts).

    Parameters
    ----------
    photon_image : (H, W) ndarray
        Mean photons per pixel reaching the sensor.
    camera : CameraModel
    rng : int or numpy.random.Generator
    dark_electrons : (H, W) ndarray, optional
        Mean dark charge per pixel, electrons (hot pixels); Poisson like the photoelectrons.
    deposited_electrons : (H, W) ndarray, optional
        Charge deposited directly in the pixels, electrons (cosmic-ray hits); added as is.
    """
    rng = np.random.default_rng(rng)
    mean_e = np.clip(photon_image, 0, None) * camera.quantum_efficiency
    if dark_electrons is not None:
        mean_e = mean_e + np.clip(dark_electrons, 0, None)
    if camera.kind == "emccd":
        electrons = rng.poisson(mean_e + camera.clock_induced_charge)
        if deposited_electrons is not None:
            electrons = electrons + np.rint(np.clip(deposited_electrons, 0, None)).astype(electrons.dtype)
        amplified = np.zeros(electrons.shape)
        hit = electrons > 0
        if camera.em_gain > 1:
            amplified[hit] = rng.gamma(shape=electrons[hit], scale=camera.em_gain)
        else:
            amplified[hit] = electrons[hit]
        signal = amplified * camera.counts_per_electron
        offset = camera.bias
    else:
        electrons = rng.poisson(mean_e).astype(float)
        if deposited_electrons is not None:
            electrons = electrons + np.clip(deposited_electrons, 0, None)
        gain = camera.counts_per_electron if camera.gain_map is None else camera.counts_per_electron * camera.gain_map
        signal = electrons * gain
        offset = camera.bias if camera.offset_map is None else camera.offset_map
    counts = signal + offset + rng.normal(0.0, camera.read_noise, size=photon_image.shape) if camera.read_noise > 0 \
        else signal + offset
    return np.clip(np.rint(counts), 0, camera.saturation).astype(np.uint16)


def simulate_frames(*, geometry: LatticeGeometry, frame_shape=(256, 256), psf: PSFModel | None = None,
                    camera: CameraModel | None = None, region=None, filling: float = 0.3,
                    pattern: str = "random", occupation=None, photons_per_atom: float = 1000.0,
                    brightness_spread: float = 0.0, background: float = 0.0, n_shots: int = 1,
                    images_per_shot: int = 1, loss_probability: float = 0.0, hop_probability: float = 0.0,
                    phase_jitter: float = 0.0, phase_drift=(0.0, 0.0), edge_radius: float | None = None,
                    margin: float | None = None, hot_pixels: int = 0, hot_pixel_electrons=(50.0, 3000.0),
                    cosmic_rays: float = 0.0, cosmic_electrons=(500.0, 3000.0),
                    illumination_waist: float | None = None, illumination_centre=(0.0, 0.0),
                    background_structure: float = 0.0, distortion_k1: float = 0.0, distortion_centre=(0.0, 0.0),
                    psf_field: float = 0.0, psf_zones: int = 4, rng=None):
    """Simulate camera frames of atoms in a lattice, and record the truth.

    Parameters
    ----------
    geometry : LatticeGeometry
        Lattice vectors and offset of site (0, 0), pixels.
    frame_shape : (int, int)
        ``(height, width)`` in pixels.
    psf : PSFModel, optional
        Default: Airy pattern for 589 nm light, NA 0.7, 160 nm pixels (FWHM 2.7 pixels).
    camera : CameraModel, optional
        Default: an ideal photon counter (EMCCD kind, gain 1, no noise, no bias).
    region, pattern, filling, occupation, edge_radius :
        See :func:`make_region` and :func:`make_occupation`.
    photons_per_atom : float
        Mean detected photons of an atom shining for the whole exposure.
    brightness_spread : float
        Relative RMS spread of the per-atom brightness (gamma distributed).
    background : float
        Uniform background, photons per pixel per exposure.
    n_shots, images_per_shot : int
        Independent shots (new occupation each) and consecutive images per shot.
    loss_probability, hop_probability : float
        Per atom and exposure.
    phase_jitter : float
        RMS random displacement of the lattice per frame, pixels (each axis).
    phase_drift : (float, float)
        Linear displacement of the lattice per frame, pixels ``(dx, dy)``.
    hot_pixels : int
        Number of hot pixels: a dark charge (electrons, log-uniform over
        ``hot_pixel_electrons``) at the same pixels in every frame, Poisson per frame
        (:func:`latticeread.core.simulate_features.hot_pixels`).
    cosmic_rays : float
        Mean number of cosmic-ray hits per frame (streaks and blobs, total charge log-uniform
        over ``cosmic_electrons`` electrons; :func:`latticeread.core.simulate_features.cosmic_rays`).
    illumination_waist : float, optional
        1/e^2 radius (pixels) of a Gaussian imaging beam centred ``illumination_centre``
        pixels from the frame centre: atoms shine ``exp(-2 r^2 / waist^2)`` as bright.
    background_structure : float
        Photons per pixel of a stray-light pattern that changes from frame to frame (a
        gradient and two broad humps; :func:`latticeread.core.simulate_features.structured_background`).
    distortion_k1 : float
        Radial lens distortion (1 / pixels^2; negative = barrel) about ``distortion_centre``
        pixels from the frame centre, applied to the site positions.
    psf_field : float
        Aberrations at the corner of the frame, waves rms (defocus and astigmatism growing as
        the squared field height, coma linearly), in ``psf_zones x psf_zones`` tiles each
        with its own PSF computed from the pupil (needs an Airy ``psf``).
    rng : int or numpy.random.Generator

    Returns
    -------
    frames : (n_shots * images_per_shot, H, W) ndarray of uint16
        Camera counts, shot-major.
    truth : SimulationTruth
    """
    rng = np.random.default_rng(rng)
    if psf is None:
        psf = airy_psf(wavelength_nm=589.0, numerical_aperture=0.7, pixel_size_nm=160.0)
    camera = camera or CameraModel()
    frame_shape = (int(frame_shape[0]), int(frame_shape[1]))
    if min(frame_shape) < 8:
        raise ValueError(f"frame shape {frame_shape} is too small to hold a lattice")
    for name, p in (("loss_probability", loss_probability), ("hop_probability", hop_probability)):
        if not 0 <= p <= 1:
            raise ValueError(f"{name} must be between 0 and 1, got {p}")
    if loss_probability + hop_probability > 1:
        raise ValueError("loss_probability + hop_probability must not exceed 1")
    if n_shots < 1 or images_per_shot < 1:
        raise ValueError("n_shots and images_per_shot must be at least 1")
    sites = make_region(geometry, frame_shape, region=region, margin=margin, psf=psf)
    if len(sites) == 0:
        raise ValueError("the region holds no lattice site inside the frame")
    neighbours = _neighbour_table(sites)
    n_frames = n_shots * images_per_shot
    n = len(sites)
    initial = np.zeros((n_frames, n), np.uint8)
    final = np.zeros((n_frames, n), np.uint8)
    photons = np.zeros((n_frames, n))
    lost = np.zeros((n_frames, n), bool)
    hop_target = np.full((n_frames, n), -1, np.int64)
    frames = np.empty((n_frames, *frame_shape), np.uint16)
    geometries = []
    drift = np.asarray(phase_drift, float)
    shape_k = 1.0 / brightness_spread**2 if brightness_spread > 0 else None
    artefacts: dict = {}
    dark = None
    if hot_pixels:
        from latticeread.core.simulate_features import hot_pixels as draw_hot_pixels

        index, mean = draw_hot_pixels(frame_shape, n=hot_pixels, electrons=hot_pixel_electrons, rng=rng)
        artefacts.update(hot_pixel_index=index, hot_pixel_electrons=mean)
        dark = np.zeros(frame_shape)
        dark.ravel()[index] = mean
    cosmic_parts: list = []
    from latticeread.core import simulate_features as features

    illum = None
    if illumination_waist is not None:
        illum = features.illumination(sites.x, sites.y, frame_shape=frame_shape, waist=illumination_waist,
                                      centre=illumination_centre)
    zone_psfs, zone_centres = (), None
    if psf_field:
        if psf.kind != "airy":
            raise ValueError("a PSF that varies across the field is computed from the pupil: give an Airy PSF")
        zone_psfs, zone_centres = features.field_psfs(frame_shape=frame_shape,
                                                      lambda_over_na=float(psf.params["lambda_over_na"]),
                                                      strength=psf_field, zones=psf_zones)
        zone_psfs = tuple(zone_psfs)
    positions = np.zeros((n_frames, n, 2))
    bg_maps = np.zeros((n_frames, *frame_shape), np.float32) if background_structure else None
    bg_params = []
    for shot in range(n_shots):
        occ = make_occupation(sites, pattern=pattern, filling=filling, occupation=occupation,
                              edge_radius=edge_radius, rng=rng)
        brightness = rng.gamma(shape_k, 1.0 / shape_k, size=n) if shape_k else np.ones(n)
        for image in range(images_per_shot):
            f = shot * images_per_shot + image
            shift = drift * f + (rng.normal(0.0, phase_jitter, 2) if phase_jitter > 0 else 0.0)
            geo = geometry.with_offset(np.asarray(geometry.offset) + shift)
            geometries.append(geo)
            initial[f] = occ
            fin, shine, lost[f], hop_target[f], brightness = _expose(
                occ, brightness, neighbours, loss_probability=loss_probability,
                hop_probability=hop_probability, rng=rng)
            photons[f] = photons_per_atom * shine * (1.0 if illum is None else illum)
            x = sites.x + shift[0] if np.ndim(shift) else sites.x
            y = sites.y + shift[1] if np.ndim(shift) else sites.y
            if distortion_k1:
                x, y = features.distort(x, y, frame_shape=frame_shape, k1=distortion_k1, centre=distortion_centre)
            positions[f, :, 0], positions[f, :, 1] = x, y
            if zone_psfs:
                zone = np.argmin((x[:, None] - zone_centres[None, :, 0]) ** 2 +
                                 (y[:, None] - zone_centres[None, :, 1]) ** 2, axis=1)
                photon_image = np.full(frame_shape, float(background))
                for z, zpsf in enumerate(zone_psfs):
                    sel = zone == z
                    if sel.any():
                        photon_image += render_sites(frame_shape, x[sel], y[sel], photons[f][sel], zpsf)
            else:
                photon_image = render_sites(frame_shape, x, y, photons[f], psf) + background
            if bg_maps is not None:
                extra, params = features.structured_background(frame_shape, amplitude=background_structure, rng=rng)
                bg_maps[f] = extra
                bg_params.append(params)
                photon_image = photon_image + extra
            deposited = None
            if cosmic_rays:
                from latticeread.core.simulate_features import cosmic_rays as draw_cosmic_rays

                index, charge, hit = draw_cosmic_rays(frame_shape, rate=cosmic_rays, electrons=cosmic_electrons,
                                                      rng=rng)
                cosmic_parts.append((np.full(index.size, f, np.int64), index, charge, hit))
                deposited = np.zeros(frame_shape)
                np.add.at(deposited.ravel(), index, charge)
            frames[f] = apply_camera(photon_image, camera, rng=rng, dark_electrons=dark,
                                     deposited_electrons=deposited)
            final[f] = fin
            occ = fin
    if cosmic_rays:
        for key, part in zip(("cosmic_frame", "cosmic_index", "cosmic_electrons", "cosmic_hit"),
                             zip(*cosmic_parts)):
            artefacts[key] = np.concatenate(part)
    truth = SimulationTruth(
        geometry=geometry, geometries=tuple(geometries), sites=sites, psf=psf, camera=camera,
        frame_shape=frame_shape, n_shots=n_shots, images_per_shot=images_per_shot,
        initial_occupation=initial, final_occupation=final, photons=photons, lost=lost,
        hop_target=hop_target, background=float(background), photons_per_atom=float(photons_per_atom),
        settings={"filling": filling, "pattern": pattern, "brightness_spread": brightness_spread,
                  "loss_probability": loss_probability, "hop_probability": hop_probability,
                  "phase_jitter": phase_jitter, "phase_drift": list(map(float, drift)),
                  "region": None if region is None else (list(region) if isinstance(region, tuple) else "mask"),
                  "hot_pixels": int(hot_pixels), "hot_pixel_electrons": list(map(float, hot_pixel_electrons)),
                  "cosmic_rays": float(cosmic_rays), "cosmic_electrons": list(map(float, cosmic_electrons)),
                  "illumination_waist": None if illumination_waist is None else float(illumination_waist),
                  "illumination_centre": list(map(float, illumination_centre)),
                  "background_structure": float(background_structure), "background_patterns": bg_params,
                  "distortion_k1": float(distortion_k1), "distortion_centre": list(map(float, distortion_centre)),
                  "psf_field": float(psf_field), "psf_zones": int(psf_zones),
                  "zone_fwhm": [float(p.fwhm) for p in zone_psfs]},
        artefacts=artefacts, frame_positions=positions, illumination=illum, background_maps=bg_maps,
        zone_psfs=zone_psfs, zone_centres=zone_centres,
    )
    return frames, truth


# --- demo scenarios -----------------------------------------------------------------------
# An invented setting used for the bundled sample data and the documentation: sodium-23 atoms
# imaged on their 589 nm line through an NA 0.70 objective onto a camera whose pixels are
# 160 nm in the atom plane (Airy FWHM 0.514 * 589 / 0.70 = 432 nm = 2.70 pixels).
_DEMO_PIXEL_NM = 160.0
_DEMO_PSF = dict(wavelength_nm=589.0, numerical_aperture=0.70, pixel_size_nm=_DEMO_PIXEL_NM)


def _rotated(length_px: float, angle_deg: float) -> tuple[float, float]:
    a = np.deg2rad(angle_deg)
    return (length_px * np.cos(a), length_px * np.sin(a))


DEMO_SCENARIOS = {
    # retro-reflected 1064 nm standing waves: square lattice, spacing 532 nm (lambda/2)
    "square": dict(spacing_nm=1064.0 / 2, angle_deg=8.0, angle_between_deg=90.0, camera="emccd"),
    # folded four-beam interfering 1064 nm lattice: spacing 1064/sqrt(2) = 752 nm, at 45 deg to the beams
    "folded": dict(spacing_nm=1064.0 / np.sqrt(2), angle_deg=45.0 + 3.0, angle_between_deg=90.0, camera="emccd"),
    # three 1064 nm beams at 120 deg: triangular lattice, spacing 2/3 lambda = 709 nm
    "triangular": dict(spacing_nm=1064.0 * 2 / 3, angle_deg=-5.0, angle_between_deg=60.0, camera="scmos"),
}


def demo_camera(kind: str = "emccd") -> CameraModel:
    """Invented demo cameras: an EMCCD at gain 150 or an sCMOS, both read into uint16."""
    if kind == "emccd":
        return CameraModel(kind="emccd", em_gain=150.0, counts_per_electron=0.05, bias=200.0, read_noise=3.0,
                           quantum_efficiency=0.9, clock_induced_charge=0.005)
    if kind == "scmos":
        return CameraModel(kind="scmos", em_gain=1.0, counts_per_electron=0.5, bias=100.0, read_noise=0.8,
                           quantum_efficiency=0.8)
    raise ValueError(f"unknown demo camera {kind!r}; use 'emccd' or 'scmos'")


def demo_scenario(name: str = "square", *, frame_shape=(256, 256)) -> dict:
    """Keyword arguments of :func:`simulate_frames` for one invented demo setting.

    Parameters
    ----------
    name : {"square", "folded", "triangular"}
        ``square``: 532 nm spacing from retro-reflected 1064 nm beams, EMCCD;
        ``folded``: 752 nm spacing (1064 nm / sqrt 2) at 45 degrees to the beams, EMCCD;
        ``triangular``: 709 nm spacing, 60 degrees between the vectors, sCMOS.
    frame_shape : (int, int)
        Frame size in pixels; the lattice offset sits at the frame centre.

    Returns
    -------
    dict with ``geometry``, ``psf``, ``camera``, ``frame_shape``, ``photons_per_atom``,
    ``background``, ``filling``, ``region``, ``loss_probability``, ``hop_probability`` and
    ``pixel_size_nm`` (remove the last before calling :func:`simulate_frames`).
    """
    if name not in DEMO_SCENARIOS:
        raise ValueError(f"unknown demo scenario {name!r}; choose from {', '.join(DEMO_SCENARIOS)}")
    sc = DEMO_SCENARIOS[name]
    length = sc["spacing_nm"] / _DEMO_PIXEL_NM
    a1 = _rotated(length, sc["angle_deg"])
    a2 = _rotated(length, sc["angle_deg"] + sc["angle_between_deg"])
    height, width = frame_shape
    geometry = LatticeGeometry(a1, a2, offset=((width - 1) / 2 + 0.23, (height - 1) / 2 - 0.31))
    radius_sites = 0.42 * min(frame_shape) / length
    return dict(
        geometry=geometry,
        psf=airy_psf(**_DEMO_PSF),
        camera=demo_camera(sc["camera"]),
        frame_shape=tuple(frame_shape),
        photons_per_atom=900.0,
        brightness_spread=0.15,
        background=0.4,
        filling=0.45,
        region=("disk", radius_sites),
        loss_probability=0.012,
        hop_probability=0.005,
        pixel_size_nm=_DEMO_PIXEL_NM,
    )
