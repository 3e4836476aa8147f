"""Digital phantom synthesizer: known truth for tests, demos and benchmarks.

Model (documented in the README, "Synthetic scans")
---------------------------------------------------
1. **Geometry.** The phantom is taken from an ROI template (its published dimensions) and
   placed in the world by a rigid transform ``world = R @ p_template + t``. Every element is
   rasterised with sub-voxel partial-volume weights (:mod:`phantometry.rois`) and painted in
   order: body with the background concentration, then each insert (its inactive wall first,
   then its fill) replacing what holds it: ``v <- v + (c - c_holder) w``. This is exact for
   nested shapes (the template checks forbid other overlaps), so the voxel value is the mean
   true concentration over the voxel cell, even where a 1 mm wall is thinner than a voxel.
2. **Point-response function.** A linear, shift-invariant convolution with an isotropic 3-D
   Gaussian of the given FWHM (sigma = FWHM / (2 sqrt(2 ln 2))), applied separably with the
   sampled, normalised kernel truncated at 4 sigma (identical to
   ``scipy.ndimage.gaussian_filter(..., mode="constant")``; tested). Because step 1 gives
   voxel-cell means, the image equals the true object convolved with the Gaussian *and* the
   voxel cell: the effective PSF variance is ``sigma^2 + d^2 / 12`` along an axis of spacing
   ``d`` (the box's variance), as for a real scanner whose voxels integrate.
3. **Noise.** Reconstructed PET noise is roughly Poisson-driven (variance grows with the local
   mean) and spatially correlated by the reconstruction. We add
   ``cv * sqrt(b * m) * n`` where ``m`` is the blurred image, ``b`` the background
   concentration, ``cv`` the requested coefficient of variation of a background voxel, and
   ``n`` white Gaussian noise smoothed by a Gaussian of ``noise_fwhm_mm`` and rescaled to unit
   variance. A background voxel then has SD ``cv * b``; air stays noise-free.
4. **Known imperfections** (optional; :func:`imperfection_gains`): the noisy image is
   multiplied voxel by voxel by a gain, as a calibration or normalisation error scales the
   reconstructed image, noise included:
   ``g = k (1 + s z / 100 mm) (1 + a [slice k*]) (1 + c (r / R)^2)`` with ``k`` the
   calibration factor, ``s`` an axial slope (fraction per 100 mm; ``z`` the voxel centre's
   offset from the phantom centre along the image's slice axis), ``a`` the gain error of one
   image slice ``k*`` (a slice artefact, e.g. one detector ring's normalisation), and ``c``
   a radial term about the phantom axis (``r`` the voxel centre's distance from it, ``R``
   the body radius): ``c > 0`` raises the rim (cupping, a low centre), ``c < 0`` lowers it
   (capping). Closed forms of what they do to the uniform-cylinder metrics are in
   :mod:`phantometry.phantoms.uniform_cylinder`.

Everything about the scenario (site, scanner, dates) is invented.
"""

from __future__ import annotations

import json
import math
import os
from dataclasses import asdict, dataclass, field
from datetime import datetime, timedelta, timezone
from pathlib import Path
from typing import Any, Sequence

import numpy as np
from scipy import ndimage

from .errors import InputError, PhantomNotFound
from .nuclides import decay_factor, get_nuclide
from .rois import cylinder_weights, fractional_occupancy, sphere_weights
from .templates import Insert, Template, load_template
from .volume import Reconstruction, Scanner, Volume

FWHM_PER_SIGMA = 2.0 * math.sqrt(2.0 * math.log(2.0))

#: The invented scenario every demo and synthetic scan is set in.
DEMO_SITE = "Larkspur Valley Hospital (invented)"
DEMO_SCANNER = Scanner(
    manufacturer="phantometry synthetic", model="Virtual PET VX-1", station="LVH-PET1", serial="SYN-0001"
)
DEMO_SCAN_TIME = datetime.fromisoformat("2026-11-03T10:30:00+01:00")


@dataclass
class SynthSpec:
    """What to synthesise. Lengths in mm, concentrations in kBq/mL, angles in degrees.

    Attributes
    ----------
    phantom : str
        Template name or path (``iec-body``, ``small-animal``, or a user template).
    voxel_mm : (dx, dy, dz)
        Voxel spacing, mm.
    matrix : (nx, ny, nz) or None
        Grid size; by default just large enough for the rotated phantom plus a margin.
    psf_fwhm_mm : float
        FWHM of the isotropic Gaussian point-response function, mm (0 = no blur).
    sphere_ratio : float
        Hot insert : background concentration ratio.
    background_kbq_ml : float
        Background concentration at the scan reference time, kBq/mL.
    noise_cv : float
        Coefficient of variation of a background voxel (0 = noise-free).
    noise_fwhm_mm : float or None
        FWHM of the noise correlation kernel; defaults to ``psf_fwhm_mm``.
    cold : list of str
        Inserts with ``fill: fill_record`` that are filled with non-radioactive water.
    shift_mm : (x, y, z)
        Translation of the phantom centre from the grid centre, world mm.
    rotation_deg : (rx, ry, rz)
        Rotation about the world x, y, z axes (applied in that order) after the standard pose.
    flip : bool
        Lie the phantom the other way along the bed (lid towards the head): the sphere order
        around the ring appears mirrored in transverse slices.
    seed : int
        Random seed of the noise.
    diameter_mm, length_mm : float or None
        A cylindrical body of this diameter / length instead of the template's (about the
        same centre; e.g. the ``uniform-cylinder`` template, whose phantoms come in many sizes).
    calibration_factor : float
        Gain ``k`` of the whole image (1: a calibrated scanner).
    axial_slope_pct_per_100mm : float
        Axial gain slope ``100 s``: per cent per 100 mm along the image's slice axis.
    slice_artefact : (z_mm, gain_pct) or None
        One image slice, the one whose centre is nearest ``z_mm`` from the phantom centre
        along the slice axis, scaled by ``1 + gain_pct / 100``.
    radial_gain_pct : float
        ``100 c``: the gain at the body's wall relative to the axis, minus one, in per cent
        (positive: cupping; negative: capping).
    """

    phantom: str = "iec-body"
    voxel_mm: tuple[float, float, float] = (2.0, 2.0, 2.0)
    matrix: tuple[int, int, int] | None = None
    psf_fwhm_mm: float = 6.0
    sphere_ratio: float = 4.0
    background_kbq_ml: float = 5.3
    noise_cv: float = 0.0
    noise_fwhm_mm: float | None = None
    cold: list[str] = field(default_factory=list)
    shift_mm: tuple[float, float, float] = (0.0, 0.0, 0.0)
    rotation_deg: tuple[float, float, float] = (0.0, 0.0, 0.0)
    flip: bool = False
    seed: int = 0
    nuclide: str = "F-18"
    acquired_at: datetime = DEMO_SCAN_TIME
    series_description: str = "QC phantom (synthetic)"
    reconstruction_method: str = "OSEM (synthetic)"
    templates_dirs: list[str] = field(default_factory=list)
    diameter_mm: float | None = None
    length_mm: float | None = None
    calibration_factor: float = 1.0
    axial_slope_pct_per_100mm: float = 0.0
    slice_artefact: tuple[float, float] | None = None
    radial_gain_pct: float = 0.0
    #: how long before the scan the fill record's background was measured (s); a sealed
    #: Ge-68 phantom's calibration may be many months old
    fill_measured_before_s: float = 3000.0

    @property
    def has_imperfections(self) -> bool:
        return (self.calibration_factor != 1.0 or self.axial_slope_pct_per_100mm != 0.0 or self.slice_artefact is not None
                or self.radial_gain_pct != 0.0)

    def validate(self) -> None:
        if any(v <= 0 for v in self.voxel_mm):
            raise InputError(f"voxel size must be positive, got {self.voxel_mm}")
        if self.psf_fwhm_mm < 0 or self.noise_cv < 0:
            raise InputError("psf_fwhm_mm and noise_cv must not be negative")
        if self.sphere_ratio < 0 or self.background_kbq_ml <= 0:
            raise InputError("sphere ratio must be >= 0 and background concentration > 0")
        if self.acquired_at.tzinfo is None:
            raise InputError("acquired_at must be timezone-aware")
        for what, v in (("--diameter", self.diameter_mm), ("--length", self.length_mm)):
            if v is not None and not (math.isfinite(v) and v > 0):
                raise InputError(f"{what} must be a positive number of mm, got {v:g}")
        if not (math.isfinite(self.calibration_factor) and self.calibration_factor > 0):
            raise InputError(f"--calibration-factor must be positive, got {self.calibration_factor:g}")
        if not math.isfinite(self.axial_slope_pct_per_100mm) or not math.isfinite(self.radial_gain_pct) or self.radial_gain_pct <= -100:
            raise InputError("--axial-slope and --radial must be finite numbers (--radial above -100 %)")
        if self.slice_artefact is not None and (len(self.slice_artefact) != 2 or not all(math.isfinite(v) for v in self.slice_artefact)
                                                or self.slice_artefact[1] <= -100):
            raise InputError("--slice-artefact needs Z_MM,GAIN_PCT: two finite numbers, a gain above -100 %")


def synth_template_source(phantom: str, template_file: str | os.PathLike | None, *, phantom_given: bool = False) -> str:
    """The template a synthetic scan is built from: ``template_file`` (a template YAML, e.g. a
    variant of a shipped phantom) when given, else the ``phantom`` name.

    The file is loaded and validated here (schema only: a variant's background ROIs need not
    keep their clearances, the synthesizer does not paint them), so a bad file stops with a
    one-line error naming it.

    Raises
    ------
    InputError
        Both a phantom name and a template file given, or the file does not exist.
    TemplateError
        The file is not a valid template.
    """
    if template_file is None:
        return phantom
    if phantom_given:
        raise InputError("give either --phantom NAME or --template-file FILE, not both")
    path = Path(template_file)
    if not path.is_file():
        raise InputError(f"{path}: no such template file")
    load_template(path, check=False)  # validates the schema (raises TemplateError naming the file)
    return str(path)


def default_scan_settings(phantom: str, templates_dirs: list[str] | None = None) -> dict[str, float]:
    """Typical voxel size (mm), PSF FWHM (mm) and background (kBq/mL) for a phantom kind:
    clinical scanners for body phantoms, preclinical ones for the small-animal phantom
    (common practice; about 3.7 MBq in the ~20 mL small-animal phantom, recalled)."""
    kind = load_template(phantom, templates_dirs, check=False).analysis.kind
    if kind == "small_animal_image_quality":
        return {"voxel_mm": 0.5, "psf_fwhm_mm": 1.8, "background_kbq_ml": 150.0}
    return {"voxel_mm": 2.0, "psf_fwhm_mm": 6.0, "background_kbq_ml": 5.3}


@dataclass
class SynthResult:
    """A synthetic scan with its truth."""

    volume: Volume
    template: Template
    rotation: np.ndarray
    translation_mm: np.ndarray
    truth: dict[str, Any]
    fill_record: dict[str, Any]


# ------------------------------------------------------------------------------- geometry
def rotation_matrix_xyz(rx_deg: float, ry_deg: float, rz_deg: float) -> np.ndarray:
    """``Rz @ Ry @ Rx``: rotation about world x, then y, then z (degrees, right-handed)."""
    ax, ay, az = np.deg2rad([rx_deg, ry_deg, rz_deg])
    rx = np.array([[1, 0, 0], [0, math.cos(ax), -math.sin(ax)], [0, math.sin(ax), math.cos(ax)]])
    ry = np.array([[math.cos(ay), 0, math.sin(ay)], [0, 1, 0], [-math.sin(ay), 0, math.cos(ay)]])
    rz = np.array([[math.cos(az), -math.sin(az), 0], [math.sin(az), math.cos(az), 0], [0, 0, 1]])
    return rz @ ry @ rx


#: Standard pose in DICOM LPS: template +y (anterior) -> world -y, axis along the bed
#: (template +z, towards the lid -> world -z, feet), x unchanged. A proper rotation.
STANDARD_POSE_LPS = np.diag([1.0, -1.0, -1.0])
#: Rotation of 180 degrees about the template y axis: the phantom turned end for end.
FLIP = np.diag([-1.0, 1.0, -1.0])


def phantom_pose(spec: SynthSpec, template: Template) -> tuple[np.ndarray, np.ndarray]:
    """Rotation R and translation t (mm) of ``world = R @ p_template + t``."""
    r0 = STANDARD_POSE_LPS @ (FLIP if spec.flip else np.eye(3))
    rot = rotation_matrix_xyz(*spec.rotation_deg) @ r0
    t = np.asarray(spec.shift_mm, float) - rot @ template.body_centre_mm
    return rot, t


def _grid_affine(shape_zyx: tuple[int, int, int], voxel_mm: tuple[float, float, float]) -> np.ndarray:
    """Axis-aligned LPS affine whose grid centre is at world (0, 0, 0)."""
    nz, ny, nx = shape_zyx
    a = np.diag([voxel_mm[0], voxel_mm[1], voxel_mm[2], 1.0])
    a[:3, 3] = -np.array([(nx - 1) / 2 * voxel_mm[0], (ny - 1) / 2 * voxel_mm[1], (nz - 1) / 2 * voxel_mm[2]])
    return a


def auto_matrix(spec: SynthSpec, template: Template, rot: np.ndarray, t: np.ndarray) -> tuple[int, int, int]:
    corners = _body_corners(template) @ rot.T + t
    extent = np.max(np.abs(corners), axis=0) * 2 + 2 * (spec.psf_fwhm_mm * 2 + 8.0)
    return tuple(int(math.ceil(e / v)) for e, v in zip(extent, spec.voxel_mm))  # type: ignore[return-value]


def _body_corners(template: Template) -> np.ndarray:
    h = template.body.half_extent_xy_mm
    cx, cy = template.body.centre_xy_mm
    z0, z1 = template.body.z_range_mm
    return np.array([[cx + sx * h, cy + sy * h, z] for sx in (-1, 1) for sy in (-1, 1) for z in (z0, z1)])


# ------------------------------------------------------------------------------- painting
def insert_concentrations_bq_ml(template: Template, spec: SynthSpec) -> dict[str, float]:
    """True concentration (Bq/mL, at the scan time) of every insert's fill."""
    bg = spec.background_kbq_ml * 1000.0
    unknown = sorted(set(spec.cold) - {i.name for i in template.inserts if i.fill in ("fill_record", "cold")})
    if unknown:
        raise InputError(
            f"--cold names inserts the fill record does not fill: {', '.join(unknown)}; fillable inserts: "
            f"{', '.join(template.fillable_names)}"
        )
    out = {}
    for ins in template.inserts:
        if ins.fill == "fill_record":
            out[ins.name] = 0.0 if ins.name in spec.cold else bg * spec.sphere_ratio
        elif ins.fill == "background":
            out[ins.name] = bg
        else:
            out[ins.name] = 0.0
    return out


def _paint(data: np.ndarray, roi, delta: float) -> None:
    """Add ``delta x weight``: an element replaces the value of the element that holds it."""
    data[roi.box] += delta * roi.weights


def _insert_weights(volume: Volume, ins: Insert, rot: np.ndarray, t: np.ndarray, diameter: float, extra_length: float = 0.0):
    centre = rot @ np.asarray(ins.centre_mm, float) + t
    if ins.shape == "sphere":
        return sphere_weights(volume, centre, diameter)
    return cylinder_weights(volume, centre, rot @ ins.axis_unit, diameter, float(ins.length_mm) + extra_length)


def rasterise(template: Template, volume: Volume, rot: np.ndarray, t: np.ndarray, concentrations: dict[str, float], background_bq_ml: float) -> np.ndarray:
    """Noise-free, unblurred truth on the volume grid (Bq/mL, voxel-cell means)."""
    data = np.zeros(volume.shape, dtype=np.float64)

    def inside_body(p: np.ndarray) -> np.ndarray:
        q = p - t
        # template coordinates R^T q, written out: much faster than a (n, 3) @ (3, 3) matmul
        pt = np.stack([q[:, 0] * rot[0, c] + q[:, 1] * rot[1, c] + q[:, 2] * rot[2, c] for c in range(3)], axis=-1)
        return template.body_inside(pt)

    body = template.body
    if body.shape == "cylinder":  # exact chord weights of rois.cylinder_weights
        z0, z1 = body.z_range_mm
        centre = rot @ np.array([*body.centre_xy_mm, (z0 + z1) / 2]) + t
        roi = cylinder_weights(volume, centre, rot[:, 2], body.diameter_mm, z1 - z0)
        data[roi.box] += background_bq_ml * roi.weights
    else:
        corners = _body_corners(template) @ rot.T + t
        lo, hi = corners.min(axis=0), corners.max(axis=0)
        # slab by slab along the slice axis, to bound memory on large grids
        z_world = volume.index_to_world(np.c_[np.arange(volume.shape[0]), np.zeros((volume.shape[0], 2))])[:, 2]
        dz = abs(volume.spacing_mm[0])
        step = max(1, int(4_000_000 // max(1, volume.shape[1] * volume.shape[2])))
        for k0 in range(0, volume.shape[0], step):
            k1 = min(volume.shape[0], k0 + step)
            zlo, zhi = sorted((z_world[k0], z_world[k1 - 1]))
            zlo, zhi = max(zlo - dz * 0.49, lo[2]), min(zhi + dz * 0.49, hi[2])
            if zlo > zhi:
                continue
            roi = fractional_occupancy(volume, inside_body, [lo[0], lo[1], zlo], [hi[0], hi[1], zhi])
            sub = data[roi.box]
            np.maximum(sub, background_bq_ml * roi.weights, out=sub)
    for ins in template.painting_order():
        # value of what holds this insert: the body's background, or its container insert
        holder = background_bq_ml if ins.inside is None else concentrations[ins.inside]
        try:
            if ins.wall_mm > 0:
                _paint(data, _insert_weights(volume, ins, rot, t, ins.outer_diameter_mm, 2 * ins.wall_mm), -holder)
                holder = 0.0
            _paint(data, _insert_weights(volume, ins, rot, t, ins.diameter_mm), concentrations[ins.name] - holder)
        except PhantomNotFound:  # the insert lies wholly outside this grid (partial field of view)
            continue
    return data


def gaussian_kernel_1d(sigma_vox: float, truncate: float = 4.0) -> np.ndarray:
    """Sampled, normalised Gaussian kernel (radius ``int(truncate * sigma + 0.5)`` samples)."""
    radius = int(truncate * sigma_vox + 0.5)
    x = np.arange(-radius, radius + 1, dtype=float)
    k = np.exp(-0.5 * (x / sigma_vox) ** 2)
    return k / k.sum()


def gaussian_blur(data: np.ndarray, fwhm_mm: float, spacing_zyx_mm: np.ndarray) -> np.ndarray:
    """Convolve with an isotropic 3-D Gaussian PSF of ``fwhm_mm`` on a grid of given spacing.

    Separable convolution with the sampled kernel of :func:`gaussian_kernel_1d`, zero outside
    the grid (the phantom sits in air). Equal to ``scipy.ndimage.gaussian_filter(data,
    sigma_vox, mode="constant")``.
    """
    out = np.asarray(data, dtype=np.float64)
    if fwhm_mm <= 0:
        return out.copy()
    sigma_mm = fwhm_mm / FWHM_PER_SIGMA
    for axis, spacing in enumerate(spacing_zyx_mm):
        out = ndimage.convolve1d(out, gaussian_kernel_1d(sigma_mm / float(spacing)), axis=axis, mode="constant")
    return out


def correlated_unit_noise(shape: tuple[int, ...], fwhm_mm: float, spacing_zyx_mm: np.ndarray, rng: np.random.Generator) -> np.ndarray:
    """White Gaussian noise smoothed by a Gaussian of ``fwhm_mm`` and rescaled to unit variance."""
    white = rng.standard_normal(shape)
    if fwhm_mm <= 0:
        return white
    sigma_mm = fwhm_mm / FWHM_PER_SIGMA
    out = white
    var = 1.0
    for axis, spacing in enumerate(spacing_zyx_mm):
        k = gaussian_kernel_1d(sigma_mm / float(spacing))
        out = ndimage.convolve1d(out, k, axis=axis, mode="wrap")
        var *= float(np.sum(k * k))
    return out / math.sqrt(var)


# ------------------------------------------------------------------------------- imperfections
def resized_template(template: Template, diameter_mm: float | None = None, length_mm: float | None = None) -> Template:
    """A copy of a template with a cylindrical body of another diameter and/or length (about
    the same centre).

    Raises
    ------
    InputError
        The body is not a cylinder, or the inserts no longer fit (each problem named).
    """
    if diameter_mm is None and length_mm is None:
        return template
    body = template.body
    if body.shape != "cylinder":
        raise InputError(f"--diameter and --length apply to cylindrical phantoms; template {template.name} has a {body.shape} body")
    z0, z1 = body.z_range_mm
    zc = 0.5 * (z0 + z1)
    length = float(length_mm) if length_mm is not None else z1 - z0
    new_body = body.model_copy(update={"diameter_mm": float(diameter_mm) if diameter_mm is not None else body.diameter_mm,
                                       "z_range_mm": (zc - length / 2, zc + length / 2)})
    out = template.model_copy(update={"body": new_body})
    from .templates import check_template

    problems = check_template(out)
    if problems:
        raise InputError(f"template {template.name} resized to {new_body.diameter_mm:g} x {length:g} mm does not hold its inserts: "
                         + "; ".join(problems))
    return out


def imperfection_gains(spec: SynthSpec, template: Template, volume: Volume, rot: np.ndarray, t: np.ndarray) -> np.ndarray | None:
    """The gain of every voxel for the spec's imperfections (module notes, step 4), or None.

    Built slab by slab along the slice axis (the radial term needs every voxel's distance
    from the phantom axis), in float32.
    """
    if not spec.has_imperfections:
        return None
    nz = volume.shape[0]
    centre = rot @ template.body_centre_mm + t
    slice_dir = volume.axes_world[0]
    z_slice = (volume.index_to_world(np.c_[np.arange(nz), np.zeros((nz, 2))]) - centre) @ slice_dir  # mm, per slice
    per_slice = spec.calibration_factor * (1.0 + spec.axial_slope_pct_per_100mm / 100.0 * z_slice / 100.0)
    if spec.slice_artefact is not None:
        z_a, gain_pct = spec.slice_artefact
        k_star = int(np.argmin(np.abs(z_slice - z_a)))
        per_slice[k_star] *= 1.0 + gain_pct / 100.0
    gains = np.empty(volume.shape, np.float32)
    gains[...] = per_slice.astype(np.float32)[:, None, None]
    if spec.radial_gain_pct != 0.0:
        body = template.body
        radius = body.diameter_mm / 2 if body.shape == "cylinder" else body.arc_radius_mm
        c = np.float32(spec.radial_gain_pct / 100.0)
        origin = rot @ np.array([*body.centre_xy_mm, 0.0]) + t  # a point on the phantom axis
        step = max(1, int(2_000_000 // max(1, volume.shape[1] * volume.shape[2])))
        for k0 in range(0, nz, step):
            box = (slice(k0, min(nz, k0 + step)), slice(0, volume.shape[1]), slice(0, volume.shape[2]))
            x, y, _ = volume.box_coordinates(box, rot, origin)
            gains[box] *= np.float32(1.0) + c * (x * x + y * y) / np.float32(radius * radius)
    return gains


# ------------------------------------------------------------------------------- main entry
def synthesize(spec: SynthSpec) -> SynthResult:
    """Make a synthetic phantom scan (noise-free truth, blurred, with noise) and its truth."""
    spec.validate()
    template = resized_template(load_template(spec.phantom, spec.templates_dirs, check=False), spec.diameter_mm, spec.length_mm)
    rot, t = phantom_pose(spec, template)
    matrix = spec.matrix or auto_matrix(spec, template, rot, t)
    shape = (int(matrix[2]), int(matrix[1]), int(matrix[0]))
    affine = _grid_affine(shape, spec.voxel_mm)
    grid = Volume(np.zeros(shape, np.float32), affine)  # the grid's geometry; voxels come below
    bg = spec.background_kbq_ml * 1000.0
    conc = insert_concentrations_bq_ml(template, spec)
    truth_img = rasterise(template, grid, rot, t, conc, bg)
    spacing = np.array([spec.voxel_mm[2], spec.voxel_mm[1], spec.voxel_mm[0]])
    img = gaussian_blur(truth_img, spec.psf_fwhm_mm, spacing)
    del truth_img
    if spec.noise_cv > 0:
        rng = np.random.default_rng(spec.seed)
        noise_fwhm = spec.psf_fwhm_mm if spec.noise_fwhm_mm is None else spec.noise_fwhm_mm
        noise = correlated_unit_noise(shape, noise_fwhm, spacing, rng)
        img += spec.noise_cv * np.sqrt(np.clip(img, 0, None) * bg) * noise
        del noise
    gains = imperfection_gains(spec, template, grid, rot, t)
    if gains is not None:
        img *= gains
        del gains
    recon = Reconstruction(
        method=spec.reconstruction_method,
        iterations=3,
        subsets=21,
        filter=f"Gauss {spec.psf_fwhm_mm:.1f}mm",
        matrix=(shape[1], shape[2], shape[0]),
        voxel_size_mm=tuple(float(v) for v in spec.voxel_mm),  # type: ignore[arg-type]
    )
    volume = Volume(
        data=img.astype(np.float32),
        affine=affine,
        frame="LPS",
        acquired_at=spec.acquired_at,
        nuclide=get_nuclide(spec.nuclide).name,
        original_units="BQML",
        decay_correction="START",
        series_description=spec.series_description,
        series_number=1,
        scanner=DEMO_SCANNER,
        reconstruction=recon,
        source="synthetic",
    )
    truth = _truth(spec, template, rot, t, conc, bg)
    return SynthResult(volume, template, rot, t, truth, fill_record_for(spec, template, spec.fill_measured_before_s))


def _truth(spec: SynthSpec, template: Template, rot: np.ndarray, t: np.ndarray, conc: dict[str, float], bg: float) -> dict[str, Any]:
    spec_d = asdict(spec)
    spec_d["acquired_at"] = spec.acquired_at.isoformat()
    return {
        "generator": "phantometry.synth",
        "template": template.name,
        "template_source": template.source_path,
        "arrangement": _arrangement(template),
        "frame": "LPS",
        "acquired_at": spec.acquired_at.isoformat(),
        "background_bq_ml": bg,
        "psf_fwhm_mm": spec.psf_fwhm_mm,
        "noise_cv": spec.noise_cv,
        "rotation": rot.tolist(),
        "translation_mm": t.tolist(),
        "body": {"centre_mm": (rot @ template.body_centre_mm + t).tolist(), "axis": rot[:, 2].tolist(),
                 "length_mm": template.body_length_mm,
                 **({"diameter_mm": template.body.diameter_mm} if template.body.shape == "cylinder" else {})},
        "inserts": {
            ins.name: {
                "centre_mm": (rot @ np.asarray(ins.centre_mm, float) + t).tolist(),
                "axis": (rot @ ins.axis_unit).tolist(),
                "diameter_mm": ins.diameter_mm,
                "concentration_bq_ml": conc[ins.name],
            }
            for ins in template.inserts
        },
        "spec": spec_d,
    }


def _arrangement(template: Template) -> dict[str, Any] | None:
    """Where the sphere ring sits relative to the body in this template (body phantoms with a
    flat side): the largest sphere's direction from the anterior (+y) direction, degrees
    counterclockwise seen from +z, and the ring order (:func:`phantometry.locate.ring_arrangement`)."""
    from .locate import template_ring_arrangement

    axis_insert = template.analysis.raw().get("axis_insert")
    if not isinstance(axis_insert, str) or axis_insert not in {i.name for i in template.inserts}:
        return None
    arr = template_ring_arrangement(template, axis_insert)
    if arr is None:
        return None
    return {"ring_to_body_deg": round(arr[0], 3), "ring_order": arr[1], "body_z_range_mm": list(template.body.z_range_mm)}


def fill_record_for(spec: SynthSpec, template: Template, measured_before_s: float = 3000.0) -> dict[str, Any]:
    """The fill record a physicist would have written for this synthetic scan.

    The background is stated as measured ``measured_before_s`` before the scan, so reading it
    back exercises the decay correction. For a nuclide imaged through its daughter (Ge-68) the
    record states the parent's activity, the imaged one divided by
    :attr:`~phantometry.nuclides.Nuclide.imaged_activity_ratio`.
    """
    nuclide = get_nuclide(spec.nuclide)
    measured_at = _earlier(spec.acquired_at, measured_before_s)
    # concentration at the measurement time decays to spec.background_kbq_ml at the scan
    kbq_at_measure = spec.background_kbq_ml / decay_factor(nuclide, measured_at, spec.acquired_at) / nuclide.imaged_activity_ratio
    record: dict[str, Any] = {
        "nuclide": get_nuclide(spec.nuclide).name,
        "site": DEMO_SITE,
        "phantom": template.name,
        "background": {"concentration_kbq_ml": round(kbq_at_measure, 6), "measured_at": measured_at.isoformat()},
    }
    if any(i.fill == "fill_record" for i in template.inserts):
        record["spheres"] = {"ratio_to_background": float(spec.sphere_ratio)}
    if spec.cold:
        record["cold"] = list(spec.cold)
    return record


def _earlier(moment: datetime, seconds: float) -> datetime:
    """``seconds`` of elapsed time before ``moment``, on ``moment``'s clock (a ZoneInfo zone
    keeps its own offset at that instant: across a daylight-saving change the wall clock moves
    by more or less than ``seconds``)."""
    tz = moment.tzinfo
    return (moment.astimezone(timezone.utc) - timedelta(seconds=seconds)).astimezone(tz)


def write_synthetic(
    result: SynthResult,
    out_dir: str | os.PathLike,
    fmt: str = "dicom",
    *,
    overwrite: bool = False,
    inputs: Sequence[str | os.PathLike] = (),
    local_times: bool = False,
) -> dict[str, Any]:
    """Write a synthetic scan: image (DICOM series or NIfTI + sidecar), ``fill.yaml``, ``truth.json``.

    The folder is written by :func:`phantometry.outputs.output_folder` (kind ``synthetic-scan``):
    it must not exist, be empty, or (with ``overwrite=True``) hold an earlier phantometry
    folder; ``inputs`` (e.g. a user template file) may not lie in it.

    ``local_times`` writes the scanner's times as a local wall clock without a UTC offset
    (no Timezone Offset From UTC; a sidecar ``AcquisitionDateTime`` without offset), as most
    scanners do; the fill record keeps its offsets.

    Returns the paths written, keyed ``image``, ``fill``, ``truth``, and ``written`` (the
    :class:`phantometry.outputs.WrittenFolder`, which says whether an earlier folder was replaced).
    """
    import yaml

    from .outputs import KIND_SCAN, output_folder

    if fmt not in ("dicom", "nifti"):
        raise InputError(f"unknown image format {fmt!r}; use dicom or nifti")
    out = Path(out_dir)
    with output_folder(out, KIND_SCAN, inputs=inputs, overwrite=overwrite) as staging:
        tmp = staging.path
        if fmt == "dicom":
            from .io.dicom_write import write_dicom_series

            write_dicom_series(
                result.volume,
                tmp / "dicom",
                patient_name="PHANTOM^QC",
                patient_weight_kg=10.0,
                injected_dose_bq=_nominal_dose_bq(result),
                injection_time=_earlier(result.volume.acquired_at, 3600.0),
                series_description=result.volume.series_description,
                timezone_offset=not local_times,
            )
            image = out / "dicom"
        else:
            from .io.nifti import write_nifti

            image = out / write_nifti(result.volume, tmp / "phantom.nii.gz", local_times=local_times).name
        (tmp / "fill.yaml").write_text(yaml.safe_dump(result.fill_record, sort_keys=False), encoding="utf-8")
        (tmp / "truth.json").write_text(json.dumps(result.truth, indent=2), encoding="utf-8")
    return {"image": image, "fill": out / "fill.yaml", "truth": out / "truth.json", "written": staging.written}



def write_synthetic_family(
    out_dir: str | os.PathLike,
    settings: Sequence[dict[str, Any]],
    *,
    voxel_mm: float = 3.0,
    matrix: tuple[int, int, int] | None = None,
    rotation_deg: tuple[float, float, float] = (1.0, -1.0, 20.0),
    shift_mm: tuple[float, float, float] = (3.0, -2.0, 1.0),
    sphere_ratio: float = 4.0,
    cold: Sequence[str] = (),
    seed: int = 0,
) -> dict[str, Any]:
    """Write one invented phantom acquisition "reconstructed" several ways, one DICOM series each.

    For tests and benchmarks of ``compare``. The phantom is rasterised once (:func:`synthesize`
    without blur or noise); every setting blurs it with its own Gaussian PSF and adds correlated
    noise (the model of this module). By default every setting filters the *same* white-noise realisation (``seed``), as
    reconstructions of one acquisition share its counts. All series share the Study and Frame
    of Reference UIDs, as reconstructions of one acquisition do.

    Parameters
    ----------
    out_dir : path
        Folder (created; written directly, not as a phantometry results folder); series go to
        ``out_dir/recon_NN/``, the fill record to ``out_dir/fill.yaml``.
    settings : list of dict
        Each with ``fwhm_mm`` (PSF FWHM, mm) and ``noise_cv`` (background voxel CV); optional
        ``seed`` (default: the common ``seed``), ``method`` (Reconstruction Method, e.g. ``"OSEM 3i21s"``), ``filter``
        (Convolution Kernel) and ``description``.
    voxel_mm, matrix, rotation_deg, shift_mm, sphere_ratio, cold
        As in :class:`SynthSpec`.
    seed : int
        Seed of the white noise shared by the settings.

    Returns
    -------
    dict
        ``fill`` (path), ``series`` (list of folders), ``truth`` (the synthesizer's truth).
    """
    import dataclasses

    import yaml
    from pydicom.uid import generate_uid

    from .io.dicom import parse_iterations_subsets
    from .io.dicom_write import write_dicom_series

    spec = SynthSpec(voxel_mm=(voxel_mm,) * 3, matrix=matrix, psf_fwhm_mm=0.0, noise_cv=0.0, rotation_deg=rotation_deg,
                     shift_mm=shift_mm, sphere_ratio=sphere_ratio, cold=list(cold))
    if matrix is None:  # leave room for the widest PSF of the family
        widest = SynthSpec(**{**spec.__dict__, "psf_fwhm_mm": max(float(s["fwhm_mm"]) for s in settings)})
        tpl = load_template(spec.phantom, check=False)
        spec.matrix = auto_matrix(widest, tpl, *phantom_pose(widest, tpl))
    base = synthesize(spec)
    out = Path(out_dir)
    out.mkdir(parents=True, exist_ok=True)
    truth_img = base.volume.data.astype(np.float64)
    bg = base.truth["background_bq_ml"]
    spacing = base.volume.spacing_mm
    study_uid, frame_uid = generate_uid(), generate_uid()
    folders = []
    for n, s in enumerate(settings, start=1):
        fwhm, cv = float(s["fwhm_mm"]), float(s["noise_cv"])
        img = gaussian_blur(truth_img, fwhm, spacing)
        if cv > 0:
            rng = np.random.default_rng(int(s.get("seed", seed)))
            img += cv * np.sqrt(np.clip(img, 0, None) * bg) * correlated_unit_noise(img.shape, fwhm, spacing, rng)
        method_text = s.get("method", "OSEM 3i21s")
        method, iters, subsets = parse_iterations_subsets(method_text)
        recon = Reconstruction(method=method, iterations=iters, subsets=subsets, filter=s.get("filter", f"Gauss {fwhm:g}mm"),
                               matrix=base.volume.reconstruction.matrix, voxel_size_mm=base.volume.reconstruction.voxel_size_mm)
        vol = dataclasses.replace(base.volume, data=img.astype(np.float32), reconstruction=recon)
        folder = out / f"recon_{n:02d}"
        write_dicom_series(vol, folder, series_number=n, study_uid=study_uid, frame_of_reference_uid=frame_uid,
                           series_description=s.get("description", f"QC phantom recon {n} (synthetic)"),
                           patient_weight_kg=10.0)
        folders.append(folder)
        del img
    fill_path = out / "fill.yaml"
    fill_path.write_text(yaml.safe_dump(base.fill_record, sort_keys=False), encoding="utf-8")
    return {"fill": fill_path, "series": folders, "truth": base.truth}


def _nominal_dose_bq(result: SynthResult) -> float:
    """An injected activity consistent with the background (about 9.7 L of water), Bq at injection."""
    bg = result.truth["background_bq_ml"]
    return float(bg * 9700.0 / decay_factor(result.volume.nuclide, _earlier(result.volume.acquired_at, 3600.0), result.volume.acquired_at))
