"""Automatic localisation of a body phantom: where the template sits in the image.

Method (phantometry's own; each step is whole-array work on small resampled grids)
---------------------------------------------------------------------------------
1. **Body and background level.** On a coarse copy of the image (block means, about 6 mm),
   an Otsu threshold (scikit-image) separates air from phantom; the background level is the
   median of the phantom voxels; the body is the largest connected component above half of
   it, with holes filled slice by slice.
2. **Axis.** The axis insert (a cold cylinder on the phantom axis, such as the low-density
   insert) is the longest run of in-body holes; a principal-component line fit through its
   voxels gives the axis point and direction (any tilt).
3. **Sphere plane.** The image is resampled on a grid in the axis frame (trilinear). The mean
   absolute deviation from background in an annulus around the template's sphere ring radius
   peaks at the sphere plane (hot and cold spheres both count).
4. **Rotation and handedness.** In that plane, the angular profile along the ring is matched
   (circular cross-correlation by FFT) against the profile the template predicts from the
   sphere sizes and the fill record (hot, cold), for both handednesses: the phantom lying
   either way along the bed mirrors the ring order.
5. **Refinement.** Each sphere centre is refined to sub-voxel precision by an iterated,
   background-subtracted signed centroid in a window of the sphere's size; a weighted
   least-squares rigid fit (Kabsch algorithm: Kabsch, Acta Cryst A 1976;32:922) of the
   template sphere centres to the refined centres gives the final placement. Sphere ROIs sit
   at the rigid-fit positions; each sphere's distance from its own refined centre is its
   fit residual (fit quality).
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field
from typing import Any

import numpy as np
from scipy import ndimage
from skimage.filters import threshold_otsu

from .errors import PhantomNotFound, TemplateError
from .templates import Insert, Template
from .threads import fft_workers
from .volume import Volume


@dataclass
class InsertFit:
    """Fit quality of one insert."""

    name: str
    centre_mm: np.ndarray
    refined_mm: np.ndarray | None
    residual_mm: float | None
    signal_to_noise: float | None
    source: str  # "fit", "override", "template"

    def as_dict(self) -> dict[str, Any]:
        return {
            "name": self.name,
            "centre_mm": [round(float(v), 3) for v in self.centre_mm],
            "refined_mm": None if self.refined_mm is None else [round(float(v), 3) for v in self.refined_mm],
            "residual_mm": None if self.residual_mm is None else round(self.residual_mm, 3),
            "signal_to_noise": None if self.signal_to_noise is None else round(self.signal_to_noise, 2),
            "source": self.source,
        }


@dataclass
class Placement:
    """Rigid placement of a template in a volume's world frame: ``world = R @ p + t``."""

    template: Template
    rotation: np.ndarray
    translation_mm: np.ndarray
    background_estimate_bq_ml: float
    noise_sd_bq_ml: float
    fits: dict[str, InsertFit] = field(default_factory=dict)
    ring_score: float | None = None
    warnings: list[str] = field(default_factory=list)

    def to_world(self, points_template_mm: np.ndarray) -> np.ndarray:
        p = np.asarray(points_template_mm, float)
        return p @ self.rotation.T + self.translation_mm

    def to_template(self, points_world_mm: np.ndarray) -> np.ndarray:
        p = np.asarray(points_world_mm, float)
        return (p - self.translation_mm) @ self.rotation

    def direction_to_world(self, v: np.ndarray) -> np.ndarray:
        return self.rotation @ np.asarray(v, float)

    @property
    def axis_world(self) -> np.ndarray:
        """Unit vector of the template +z axis in the world."""
        return self.rotation[:, 2].copy()

    def insert_centre(self, name: str) -> np.ndarray:
        """World mm of an insert centre: the override or rigid fit where there is one."""
        if name in self.fits:
            return self.fits[name].centre_mm.copy()
        return self.to_world(self.template.insert(name).centre_mm)

    def as_dict(self) -> dict[str, Any]:
        tilt = math.degrees(math.acos(min(1.0, abs(float(self.axis_world[2])))))
        return {
            "rotation": [[round(float(v), 6) for v in row] for row in self.rotation],
            "translation_mm": [round(float(v), 3) for v in self.translation_mm],
            "axis_world": [round(float(v), 5) for v in self.axis_world],
            "axis_tilt_deg": round(tilt, 3),
            "background_estimate_bq_ml": round(self.background_estimate_bq_ml, 3),
            "noise_sd_bq_ml": round(self.noise_sd_bq_ml, 3),
            "ring_score": None if self.ring_score is None else round(self.ring_score, 4),
            "inserts": {k: v.as_dict() for k, v in self.fits.items()},
            "warnings": list(self.warnings),
        }


# =============================================================================== helpers
def _coarse(volume: Volume, target_mm: float = 6.0) -> tuple[np.ndarray, np.ndarray]:
    """Block-mean downsampled data and the factor per axis (array order)."""
    factors = np.maximum(1, np.floor(target_mm / volume.spacing_mm + 1e-6)).astype(int)
    data = volume.data
    shape = np.array(data.shape) // factors
    if np.any(shape < 4):
        factors = np.ones(3, int)
        shape = np.array(data.shape)
    ends = shape * factors
    f0, f1, f2 = (int(f) for f in factors)
    n0, n1, n2 = (int(n) for n in shape)
    acc = np.empty((n0, n1, n2), dtype=np.float32)

    def planes(first: int, stop: int) -> None:
        # one coarse plane at a time (a loop over planes, not voxels): the working memory is
        # a few fine planes, not a fraction of the volume
        for a in range(first, stop):
            block = data[a * f0 : (a + 1) * f0, : ends[1], : ends[2]].sum(axis=0, dtype=np.float32)
            acc[a] = block.reshape(n1, f1, n2, f2).sum(axis=(1, 3), dtype=np.float32)

    n_threads = min(fft_workers(), max(1, n0 // 8))
    if n_threads > 1:  # the reductions release the interpreter lock: split the planes
        from concurrent.futures import ThreadPoolExecutor

        bounds = np.linspace(0, n0, n_threads + 1).astype(int)
        with ThreadPoolExecutor(n_threads) as pool:
            list(pool.map(planes, bounds[:-1], bounds[1:]))
    else:
        planes(0, n0)
    acc /= float(np.prod(factors))
    return acc, factors


def fill_holes_in_planes(mask: np.ndarray) -> np.ndarray:
    """Fill the holes of a 3-D mask plane by plane (axis 0 = planes, 4-connected in a plane).

    A hole is a connected part of the complement that does not reach the edge of its plane;
    the same result as ``scipy.ndimage.binary_fill_holes`` with the in-plane cross as the
    structure (tested against it), by one labelling of the complement instead of a
    dilation iterated to convergence.
    """
    cross = np.zeros((3, 3, 3), bool)
    cross[1] = [[0, 1, 0], [1, 1, 1], [0, 1, 0]]
    lab, n = ndimage.label(~mask, structure=cross)
    outside = np.zeros(n + 1, bool)
    outside[0] = True  # label 0: the mask itself
    for edge in (lab[:, 0, :], lab[:, -1, :], lab[:, :, 0], lab[:, :, -1]):
        outside[edge] = True
    return mask | ~outside[lab]


def _coarse_to_world(volume: Volume, idx_kji: np.ndarray, factors: np.ndarray) -> np.ndarray:
    """World mm of coarse-grid indices (block centres)."""
    fine = np.asarray(idx_kji, float) * factors + (factors - 1) / 2.0
    return volume.index_to_world(fine)


def _orthonormal_basis(d: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    d = d / np.linalg.norm(d)
    helper = np.array([1.0, 0.0, 0.0]) if abs(d[0]) < 0.9 else np.array([0.0, 1.0, 0.0])
    u = np.cross(d, helper)
    u /= np.linalg.norm(u)
    v = np.cross(d, u)
    return u, v


def sample_world(volume: Volume, points_mm: np.ndarray, order: int = 1, cval: float = np.nan) -> np.ndarray:
    """Trilinear samples of the volume at world points (..., 3); ``cval`` outside the grid."""
    idx = volume.world_to_index(points_mm)
    flat = idx.reshape(-1, 3).T
    vals = ndimage.map_coordinates(volume.data, flat, order=order, mode="constant", cval=cval, prefilter=False)
    return vals.reshape(idx.shape[:-1])


def kabsch(template_pts: np.ndarray, world_pts: np.ndarray, weights: np.ndarray | None = None) -> tuple[np.ndarray, np.ndarray]:
    """Weighted least-squares rigid transform (proper rotation) with ``world ~ R @ p + t``.

    Kabsch, Acta Cryst A 1976;32:922-923 (SVD solution with the reflection correction).
    """
    p = np.asarray(template_pts, float)
    q = np.asarray(world_pts, float)
    w = np.ones(len(p)) if weights is None else np.asarray(weights, float)
    w = w / w.sum()
    pc = (w[:, None] * p).sum(axis=0)
    qc = (w[:, None] * q).sum(axis=0)
    h = ((p - pc) * w[:, None]).T @ (q - qc)
    u, _, vt = np.linalg.svd(h)
    dfix = np.sign(np.linalg.det(vt.T @ u.T)) or 1.0
    rot = vt.T @ np.diag([1.0, 1.0, dfix]) @ u.T
    return rot, qc - rot @ pc


# =============================================================================== main steps
@dataclass
class _Body:
    mask: np.ndarray  # coarse
    coarse: np.ndarray  # block-mean image on the coarse grid
    factors: np.ndarray
    background: float
    noise_sd: float
    extent_mm: np.ndarray  # sorted extents of the body (PCA), mm


def find_body(volume: Volume, where: str, target_mm: float = 6.0) -> _Body:
    """Body mask, background level and noise on a coarse grid (step 1)."""
    coarse, factors = _coarse(volume, target_mm)
    finite = np.isfinite(coarse)
    vals = coarse[finite]
    if vals.size == 0 or float(np.max(vals)) <= 0:
        raise PhantomNotFound(f"{where}: the image is empty (no positive voxels); is this the right series?")
    try:
        # air included: the split is air | phantom, not background | hot inserts; Otsu's
        # method on a 256-bin histogram (as scikit-image bins an image), built in chunks
        counts, edges = np.histogram(vals, bins=256)
        otsu = float(threshold_otsu(hist=(counts, 0.5 * (edges[:-1] + edges[1:]))))
    except ValueError:
        raise PhantomNotFound(f"{where}: the image has no contrast between air and phantom") from None
    above = coarse > otsu
    bg = float(np.median(coarse[above]))
    if bg <= 0:
        raise PhantomNotFound(f"{where}: no phantom body found")
    raw = coarse > 0.5 * bg
    lab, n = ndimage.label(raw)
    if n == 0:
        raise PhantomNotFound(f"{where}: no phantom body found above half the background level")
    sizes = ndimage.sum_labels(raw, lab, index=np.arange(1, n + 1))
    body = lab == (1 + int(np.argmax(sizes)))
    filled = fill_holes_in_planes(body)
    core = ndimage.binary_erosion(body, iterations=2) if body.sum() > 1000 else body
    fine_core_vals = coarse[core & (coarse < 1.5 * bg)]
    mad = float(np.median(np.abs(fine_core_vals - np.median(fine_core_vals)))) if fine_core_vals.size else 0.0
    # the coarse grid averages prod(factors) voxels; scale the SD back to one voxel (upper bound)
    noise_sd = 1.4826 * mad * math.sqrt(float(np.prod(factors)))
    extent = _mask_extent_mm(volume, filled, factors)
    return _Body(filled, coarse, factors, bg, noise_sd, extent)


def _mask_extent_mm(volume: Volume, mask: np.ndarray, factors: np.ndarray) -> np.ndarray:
    """Sorted extents (mm) of a coarse mask along its principal axes, plus one coarse voxel.

    The principal axes are the eigenvectors of the covariance of the mask's block centres in
    world mm, computed from first and second moments (sums of the mask along the array axes),
    and the extents from the projections of the mask on them: no list of the mask's
    coordinates is built.
    """
    n = float(mask.sum())
    idx = [np.arange(m, dtype=np.float64) for m in mask.shape]
    marg = [mask.sum(axis=tuple(b for b in range(3) if b != a), dtype=np.float64) for a in range(3)]
    mean = np.array([float(idx[a] @ marg[a]) / n for a in range(3)])
    second = np.zeros((3, 3))
    for a in range(3):
        second[a, a] = float((idx[a] ** 2) @ marg[a]) / n
    for a, b in ((0, 1), (0, 2), (1, 2)):
        pair = mask.sum(axis=3 - a - b, dtype=np.float64)  # the mask summed over the third axis
        second[a, b] = second[b, a] = float(idx[a] @ pair @ idx[b]) / n
    cov_idx = second - np.outer(mean, mean)
    # coarse (k, j, i) -> world: fine index = coarse * factor + (factor - 1) / 2
    B = volume.affine[:3, :3][:, ::-1] * np.asarray(factors, float)[None, :]
    _, evecs = np.linalg.eigh(B @ cov_idx @ B.T)
    extent = []
    for e in evecs.T:
        lo, hi = _projection_range(volume, mask, factors, e)
        extent.append(hi - lo)
    return np.sort(np.array(extent) + np.mean(np.abs(volume.spacing_mm * factors)))


def _projection_range(volume: Volume, mask: np.ndarray, factors: np.ndarray, direction: np.ndarray, origin_mm: np.ndarray | None = None) -> tuple[float, float]:
    """Smallest and largest ``(p - origin) . direction`` (mm) over the block centres ``p`` of a coarse mask.

    The projection is linear in the coarse indices; it is evaluated one coarse plane at a
    time (a loop over planes, not voxels), so no coordinate list of the mask is built.
    """
    B = volume.affine[:3, :3][:, ::-1] * np.asarray(factors, float)[None, :]
    d = np.asarray(direction, float)
    w = B.T @ d  # mm per coarse index step along (k, j, i)
    start = volume.index_to_world((np.asarray(factors, float) - 1) / 2.0)  # block centre of coarse index (0, 0, 0)
    const = float((start - (np.zeros(3) if origin_mm is None else np.asarray(origin_mm, float))) @ d)
    in_plane = w[1] * np.arange(mask.shape[1])[:, None] + w[2] * np.arange(mask.shape[2])[None, :]
    lo, hi = np.inf, -np.inf
    for k in np.flatnonzero(mask.any(axis=(1, 2))):
        vals = in_plane[mask[k]]
        lo = min(lo, float(vals.min()) + w[0] * k)
        hi = max(hi, float(vals.max()) + w[0] * k)
    return const + lo, const + hi


def _template_extent(template: Template) -> np.ndarray:
    body = template.body
    if body.shape == "cylinder":
        xy = (body.diameter_mm, body.diameter_mm)
    else:
        xy = (2 * body.arc_radius_mm, body.arc_radius_mm + body.corner_radius_mm)
    return np.sort([*xy, template.body_length_mm])


def check_body_size(volume: Volume, template: Template, where: str) -> None:
    """Raise :class:`PhantomNotFound` (suggesting a fitting template) when the object in the
    image is not the size of the template's phantom."""
    body = template.body
    body_r = body.diameter_mm / 2 if body.shape == "cylinder" else body.arc_radius_mm
    found = find_body(volume, where, max(float(np.min(np.abs(volume.spacing_mm))), min(6.0, 2 * body_r / 15)))
    rel = found.extent_mm / _template_extent(template)
    if np.any(rel < 0.6) or np.any(rel > 1.6):
        raise PhantomNotFound(size_mismatch_message(where, found.extent_mm, template))


def size_mismatch_message(where: str, extent_mm: np.ndarray, template: Template) -> str:
    """Message for an object whose size does not fit the template, suggesting one that does."""
    from .templates import list_templates, load_template_file

    expected = _template_extent(template)
    suggestion = ""
    best = np.inf  # the closest template (largest |ln(found / nominal)|), not the first that fits
    for name, path in list_templates().items():
        try:
            other = load_template_file(path)
        except Exception:
            continue
        if other.name == template.name:
            continue
        rel = extent_mm / _template_extent(other)
        if np.all((rel > 0.6) & (rel < 1.6)) and float(np.max(np.abs(np.log(rel)))) < best:
            best = float(np.max(np.abs(np.log(rel))))
            suggestion = f"; it looks like the {other.name} phantom: try --template {other.name}"
    return (
        f"{where}: the object found measures {' x '.join(f'{e:.0f}' for e in extent_mm)} mm but template "
        f"{template.name} describes {' x '.join(f'{e:.0f}' for e in expected)} mm{suggestion or '; use the template for this phantom (phantometry templates list)'}"
        ", or check that the whole phantom is in the field of view"
    )


def find_axis(volume: Volume, body: _Body, axis_insert: Insert, where: str) -> tuple[np.ndarray, np.ndarray]:
    """Point on and direction of the axis insert (step 2), world mm."""
    raw = body.mask & (body.coarse <= 0.5 * body.background)
    # remove holes open to the outside of the body in-plane (concavities): they are not holes
    lab, n = ndimage.label(raw)
    if n == 0:
        raise PhantomNotFound(
            f"{where}: no cold axis insert ({axis_insert.name}) found inside the body; is the template right for this phantom?"
        )
    idx = np.arange(1, n + 1)
    # the axis insert: the component with the longest extent along the slice axis
    slices = ndimage.find_objects(lab)
    lengths = np.array([s[0].stop - s[0].start for s in slices])
    sizes = ndimage.sum_labels(np.ones_like(raw), lab, idx)
    best = int(np.argmax(lengths * 1e6 + sizes))
    comp = np.argwhere(lab == best + 1)
    if len(comp) < 5:
        raise PhantomNotFound(f"{where}: the axis insert ({axis_insert.name}) is too small to find the phantom axis")
    pts = _coarse_to_world(volume, comp, body.factors)
    centre = pts.mean(axis=0)
    _, _, vt = np.linalg.svd(pts - centre, full_matrices=False)
    d = vt[0]
    # expected length check (a cold sphere is not an axis insert)
    span = np.ptp((pts - centre) @ d)
    if span < 0.4 * float(axis_insert.length_mm or 0):
        raise PhantomNotFound(
            f"{where}: the longest cold structure is {span:.0f} mm long, the template's {axis_insert.name} is "
            f"{axis_insert.length_mm:g} mm; is the template right for this phantom?"
        )
    if d[2] < 0:
        d = -d
    return centre, d / np.linalg.norm(d)


def _sphere_plane_offset(volume: Volume, template: Template, body: "_Body", a0: np.ndarray, d: np.ndarray, body_bg: float, ring_r: float, where: str) -> tuple[float, np.ndarray, np.ndarray]:
    """Position (mm along d from a0) of the sphere plane (step 3).

    Only planes at least the largest sphere radius plus 10 mm inside both body ends are
    considered: near an end the blurred edge would mimic a sphere ring.
    """
    u, v = _orthonormal_basis(d)
    step = max(1.0, float(np.min(np.abs(volume.spacing_mm))))
    band = max(s_.diameter_mm for s_ in template.spheres) / 2
    along_lo, along_hi = _projection_range(volume, body.mask, body.factors, d, a0)
    lo, hi = along_lo + band + 10.0, along_hi - band - 10.0
    if hi <= lo:
        raise PhantomNotFound(f"{where}: the body is too short along its axis to hold the sphere ring")
    s = np.arange(lo, hi + step / 2, step)
    radii = np.linspace(max(ring_r - band, 1.0), ring_r + band, 7)
    theta = np.deg2rad(np.arange(0, 360, 3.0))
    rr, tt = np.meshgrid(radii, theta, indexing="ij")
    ring = (rr * np.cos(tt))[..., None] * u + (rr * np.sin(tt))[..., None] * v  # (nr, nt, 3)
    pts = a0 + s[:, None, None, None] * d + ring[None]
    vals = sample_world(volume, pts)
    inside = np.isfinite(vals) & (vals > 0.25 * body_bg)
    frac_inside = inside.mean(axis=(1, 2))
    dev = np.where(inside, np.abs(np.nan_to_num(vals) - body_bg), 0.0).sum(axis=(1, 2)) / np.maximum(inside.sum(axis=(1, 2)), 1)
    ok = frac_inside > 0.97
    if not ok.any():
        raise PhantomNotFound(f"{where}: no plane along the axis has the sphere ring inside the body")
    score = np.where(ok, dev, -np.inf)
    score = ndimage.uniform_filter1d(np.where(ok, dev, 0.0), 3) * ok + np.where(ok, 0, -np.inf)
    i = int(np.argmax(score))
    off = float(s[i])
    if 0 < i < len(s) - 1 and np.all(np.isfinite(score[i - 1 : i + 2])):
        y0, y1, y2 = score[i - 1 : i + 2]
        den = y0 - 2 * y1 + y2
        if den < 0:
            off += step * 0.5 * (y0 - y2) / den
    return off, u, v


def _ring_profile_model(template: Template, amplitudes: dict[str, float], n_bins: int, ring_r: float) -> np.ndarray:
    theta = (np.arange(n_bins) + 0.5) * 2 * np.pi / n_bins
    model = np.zeros(n_bins)
    for s in template.spheres:
        cx, cy = s.centre_mm[0], s.centre_mm[1]
        phi = math.atan2(cy, cx)
        rho = math.hypot(cx, cy)
        half = math.asin(min(1.0, (s.diameter_mm / 2) / max(rho, 1e-6)))
        dth = np.angle(np.exp(1j * (theta - phi)))
        chord = np.clip(1 - (dth / half) ** 2, 0, None) ** 0.5
        model += amplitudes[s.name] * chord
    return model


def _match_rotation(profile: np.ndarray, model: np.ndarray, hands: tuple[int, ...] = (1, -1)) -> tuple[float, int, float]:
    """Best circular shift and handedness: returns (theta0_rad, hand, normalised score)."""
    n = len(profile)
    f = profile - profile.mean()
    best = (-np.inf, 0.0, 1)
    for hand in hands:
        m = model if hand == 1 else np.roll(model[::-1], 1)
        m = m - m.mean()
        # corr[k] = sum_j f[j] m[j - k]  -> shift k means theta = theta0 + hand*phi with theta0 = k bins
        corr = np.real(np.fft.ifft(np.fft.fft(f) * np.conj(np.fft.fft(m))))
        k = int(np.argmax(corr))
        norm = np.linalg.norm(f) * np.linalg.norm(m)
        score = float(corr[k] / norm) if norm > 0 else 0.0
        # sub-bin refinement
        y0, y1, y2 = corr[(k - 1) % n], corr[k], corr[(k + 1) % n]
        den = y0 - 2 * y1 + y2
        frac = 0.5 * (y0 - y2) / den if den < 0 else 0.0
        if score > best[0]:
            best = (score, (k + frac) * 2 * np.pi / n, hand)
    return best[1], best[2], best[0]


def _pose_from_axis(a_plane: np.ndarray, d: np.ndarray, u: np.ndarray, v: np.ndarray, theta0: float, hand: int, template: Template, axis_ins: Insert) -> tuple[np.ndarray, np.ndarray]:
    ex = math.cos(theta0) * u + math.sin(theta0) * v
    if hand == 1:
        ey = -math.sin(theta0) * u + math.cos(theta0) * v
        ez = d
    else:
        ey = math.sin(theta0) * u - math.cos(theta0) * v
        ez = -d
    rot = np.column_stack([ex, ey, ez])
    ax = axis_ins
    plane_z = float(np.mean([s.centre_mm[2] for s in template.spheres]))
    origin_on_axis = np.array([ax.centre_mm[0], ax.centre_mm[1], plane_z])
    t = a_plane - rot @ origin_on_axis
    return rot, t


def refine_centre(volume: Volume, start_mm: np.ndarray, radius_mm: float, sign: float, background: float, iterations: int = 6, margin_mm: float | None = None) -> tuple[np.ndarray, float]:
    """Iterated background-subtracted signed centroid in a sphere window (step 5).

    Parameters
    ----------
    radius_mm : float
        Window radius: the sphere radius plus a margin for the blur.
    sign : +1 for a hot insert, -1 for a cold one.

    Returns
    -------
    centre_mm, signal_sum : the refined centre and the windowed signed signal (Bq/mL x voxels).
    """
    c = np.asarray(start_mm, float)
    spacing = volume.spacing_mm
    half = np.ceil((radius_mm + 2 * np.max(spacing)) / spacing).astype(int) + 1
    total = 0.0
    for _ in range(iterations):
        ci = np.round(volume.world_to_index(c)).astype(int)
        lo = np.maximum(ci - half, 0)
        hi = np.minimum(ci + half + 1, volume.shape)
        if np.any(hi <= lo):
            raise PhantomNotFound(f"insert near {np.round(c, 1).tolist()} mm lies outside the image")
        box = tuple(slice(a, b) for a, b in zip(lo, hi))
        xyz = volume.box_coordinates(box, dtype=np.float64)  # broadcast per axis
        rel = [x - ci_ for x, ci_ in zip(xyz, c)]
        r = np.sqrt(rel[0] ** 2 + rel[1] ** 2 + rel[2] ** 2)
        # smooth window edge (1 voxel) to avoid jumps as the window moves
        w_win = np.clip((radius_mm - r) / float(np.mean(spacing)) + 0.5, 0, 1)
        sig = sign * (volume.data[box] - background) * w_win
        total = float(sig.sum())
        if total <= 0:
            break
        new_c = np.array([float(np.sum(sig * x)) for x in xyz]) / total
        step = np.linalg.norm(new_c - c)
        c = new_c
        if step < 0.01:
            break
    return c, total


# =============================================================================== public
def locate(
    volume: Volume,
    template: Template,
    *,
    axis_insert: str,
    hot: dict[str, bool] | None = None,
    activity_ratio: dict[str, float] | None = None,
    overrides: dict[str, np.ndarray] | None = None,
    where: str | None = None,
) -> Placement:
    """Find a body phantom described by ``template`` in ``volume``.

    Parameters
    ----------
    axis_insert : str
        The cold insert on the phantom axis (found first; the template's ``analysis.axis_insert``).
    hot : dict name -> bool
        Which spheres are hot (True) or cold (False), from the fill record; all hot if omitted.
    activity_ratio : dict name -> float
        Expected insert : background concentration ratio (for the ring profile model).
    overrides : dict name -> (3,) world mm
        Manual centres (``--centre NAME=x,y,z``). With three or more spheres given, the
        placement is the rigid fit to them and no search is made.
    where : str
        How to name the image in messages (file or folder).

    Raises
    ------
    PhantomNotFound
        When the phantom cannot be found or the fit is poor; the message says why.
    """
    where = where or (volume.source or "image")
    if template.background is None or not template.spheres:
        raise TemplateError(f"template {template.name}: locate() handles body phantoms (spheres and background ROIs)")
    overrides = {k: np.asarray(v, float) for k, v in (overrides or {}).items()}
    for name in overrides:
        template.insert(name)  # raises for unknown names
    spheres = template.spheres
    hot = {s.name: True for s in spheres} | (hot or {})
    ratio = {s.name: 4.0 for s in spheres} | (activity_ratio or {})
    body = find_body(volume, where)
    expected = _template_extent(template)
    rel = body.extent_mm / expected
    if np.any(rel < 0.6) or np.any(rel > 1.6):
        raise PhantomNotFound(size_mismatch_message(where, body.extent_mm, template))
    bg = body.background
    sphere_overrides = [s for s in spheres if s.name in overrides]
    ring_score = None
    if len(sphere_overrides) >= 3:
        rot, t = kabsch(
            np.array([s.centre_mm for s in sphere_overrides]), np.array([overrides[s.name] for s in sphere_overrides])
        )
    else:
        axis_ins = template.insert(axis_insert)
        a0, d = find_axis(volume, body, axis_ins, where)
        ring_r = float(np.median([math.hypot(s.centre_mm[0] - axis_ins.centre_mm[0], s.centre_mm[1] - axis_ins.centre_mm[1]) for s in spheres]))
        off, u, v = _sphere_plane_offset(volume, template, body, a0, d, bg, ring_r, where)
        a_plane = a0 + off * d
        n_bins = 360
        theta = (np.arange(n_bins) + 0.5) * 2 * np.pi / n_bins
        radii = np.linspace(ring_r - 3, ring_r + 3, 5)
        zs = np.linspace(-2, 2, 3)
        pts = (
            a_plane
            + zs[:, None, None, None] * d
            + (radii[None, :, None, None] * np.cos(theta)[None, None, :, None]) * u
            + (radii[None, :, None, None] * np.sin(theta)[None, None, :, None]) * v
        )
        profile = np.nanmean(sample_world(volume, pts), axis=(0, 1)) - bg
        amps = {s.name: (bg * (ratio[s.name] - 1.0) if hot[s.name] else -bg) for s in spheres}
        model = _ring_profile_model(template, amps, n_bins, ring_r)
        theta0, hand, ring_score = _match_rotation(np.nan_to_num(profile), model)
        if ring_score < 0.3:
            raise PhantomNotFound(
                f"{where}: the sphere ring does not match template {template.name} (match score {ring_score:.2f} < 0.30); "
                "check the fill record (hot/cold spheres) and the template, or give --centre NAME=x,y,z for three spheres"
            )
        rot, t = _pose_from_axis(a_plane, d, u, v, theta0, hand, template, axis_ins)
    fits: dict[str, InsertFit] = {}
    noise = max(body.noise_sd, 1e-6 * bg)
    for _round in range(2):
        refined: dict[str, tuple[np.ndarray, float]] = {}
        pairs: list[tuple[np.ndarray, np.ndarray, float]] = []  # (template, world, weight)
        for s in spheres:
            if s.name in overrides:
                continue
            pred = rot @ np.asarray(s.centre_mm, float) + t
            win = s.diameter_mm / 2 + 0.5 * max(4.0, float(np.max(volume.spacing_mm)))
            try:
                c, signal = refine_centre(volume, pred, win, 1.0 if hot[s.name] else -1.0, bg)
            except PhantomNotFound:
                raise PhantomNotFound(
                    f"{where}: {s.name} would lie outside the image; is the whole phantom in the field of view?"
                ) from None
            n_vox = 4 / 3 * math.pi * win**3 / (volume.voxel_volume_ml * 1000.0)
            snr = signal / (noise * math.sqrt(max(n_vox, 1.0)))
            refined[s.name] = (c, snr)
            if snr > 3 and np.linalg.norm(c - pred) < s.diameter_mm / 2 + 6:
                pairs.append((np.asarray(s.centre_mm, float), c, s.diameter_mm**2 * min(snr, 50.0)))
        top_weight = max([w for *_, w in pairs] or [1.0])
        pairs += [(np.asarray(s.centre_mm, float), overrides[s.name], 10 * top_weight) for s in sphere_overrides]
        if len(pairs) < 3:
            raise PhantomNotFound(
                f"{where}: fewer than three spheres stand out from the background; check the fill record (hot/cold) "
                "and the template, or give --centre NAME=x,y,z for three spheres"
            )
        rot, t = kabsch(np.array([p for p, _, _ in pairs]), np.array([q for _, q, _ in pairs]), np.array([w for *_, w in pairs]))
    warnings: list[str] = []
    resid_big = []
    for s in spheres:
        pred = rot @ np.asarray(s.centre_mm, float) + t
        if s.name in overrides:
            fits[s.name] = InsertFit(s.name, overrides[s.name], None, float(np.linalg.norm(overrides[s.name] - pred)), None, "override")
            continue
        c, snr = refined[s.name]
        res = float(np.linalg.norm(c - pred))
        fits[s.name] = InsertFit(s.name, pred, c, res, snr, "fit")
        if snr > 10 and s.diameter_mm >= 20:
            resid_big.append(res)
        if snr > 5 and res > max(2.0, 0.75 * float(np.max(volume.spacing_mm))):
            warnings.append(f"{s.name}: refined centre is {res:.1f} mm from the rigid fit (sphere off its nominal place?)")
    tol = max(3.0, 1.5 * float(np.max(volume.spacing_mm)))
    if resid_big and max(resid_big) > tol:
        raise PhantomNotFound(
            f"{where}: poor fit of template {template.name}: large spheres are up to {max(resid_big):.1f} mm from the "
            f"rigid placement (tolerance {tol:.1f} mm); give --centre NAME=x,y,z for three spheres"
        )
    for ins in template.inserts:
        if ins.role != "sphere":
            c = overrides.get(ins.name)
            fits[ins.name] = InsertFit(
                ins.name,
                c if c is not None else rot @ np.asarray(ins.centre_mm, float) + t,
                None,
                None,
                None,
                "override" if c is not None else "template",
            )
    return Placement(template, rot, t, bg, body.noise_sd, fits, ring_score, warnings)


# =============================================================================== small animal
def locate_small_animal(
    volume: Volume,
    template: Template,
    *,
    solid_section: str,
    rod_profile_z_mm: tuple[float, float],
    overrides: dict[str, np.ndarray] | None = None,
    where: str | None = None,
) -> Placement:
    """Find a small-animal image-quality phantom (rods, uniform region, cold chambers).

    Method (phantometry's own):

    1. Body on a coarse copy (about 1/15 of the phantom diameter), Otsu threshold as for the
       body phantom; size checked against the template.
    2. Axis: the phantom lies roughly along the bed (tilt up to ~10 degrees); in slices
       perpendicular to the slice axis the centroid of the filled body cross-section is taken
       and a line fitted through the centroids (principal component).
    3. Direction and axial position: along the axis, the mean in a disc of 0.8 x the body radius
       drops at both ends of the uniform region; the end followed by hot rods is the solid
       section. The interface is where the profile crosses halfway between the uniform and the
       solid-section levels.
    4. Rotation: the slices over the rod profile range are averaged and the angular profile on
       the rod circle is matched (circular cross-correlation) against the rods' widths.
    """
    where = where or (volume.source or "image")
    overrides = {k: np.asarray(v, float) for k, v in (overrides or {}).items()}
    for name in overrides:
        template.insert(name)
    body_r = template.body.diameter_mm / 2 if template.body.shape == "cylinder" else template.body.arc_radius_mm
    target = max(float(np.min(np.abs(volume.spacing_mm))), min(6.0, 2 * body_r / 15))
    body = find_body(volume, where, target)
    expected = _template_extent(template)
    rel = body.extent_mm / expected
    if np.any(rel < 0.6) or np.any(rel > 1.6):
        raise PhantomNotFound(size_mismatch_message(where, body.extent_mm, template))
    bg = body.background
    # ---- first axis from slice centroids of the filled body (coarse)
    k_idx = np.arange(body.mask.shape[0])
    counts = body.mask.sum(axis=(1, 2))
    use = counts >= max(3, 0.8 * counts.max())
    if use.sum() < 3:
        raise PhantomNotFound(f"{where}: the phantom spans too few slices to find its axis")
    jj, ii = np.meshgrid(np.arange(body.mask.shape[1]), np.arange(body.mask.shape[2]), indexing="ij")
    cj = (body.mask * jj).sum(axis=(1, 2))[use] / counts[use]
    ci = (body.mask * ii).sum(axis=(1, 2))[use] / counts[use]
    pts = _coarse_to_world(volume, np.c_[k_idx[use], cj, ci], body.factors)
    centre = pts.mean(axis=0)
    _, _, vt = np.linalg.svd(pts - centre, full_matrices=False)
    d = vt[0] / np.linalg.norm(vt[0])
    u, v = _orthonormal_basis(d)
    rods = template.rods
    ring_r = float(np.median([math.hypot(r.centre_mm[0], r.centre_mm[1]) for r in rods]))
    solid_len = float(template.insert(solid_section).length_mm)
    uniform_len = template.body_length_mm - solid_len
    step = max(0.25, float(np.min(np.abs(volume.spacing_mm))) / 2)
    s = np.arange(-template.body_length_mm, template.body_length_mm + step / 2, step)
    prof = _axial_profile(volume, centre, d, s, 0.8 * body_r)
    high = prof > 0.5 * bg
    if not high.any():
        raise PhantomNotFound(f"{where}: no uniform region found along the phantom axis")
    i0, i1 = int(np.argmax(high)), len(high) - 1 - int(np.argmax(high[::-1]))
    u, v = _orthonormal_basis(d)
    th = np.deg2rad(np.arange(0, 360, 10.0))
    ring = ring_r * (np.cos(th)[:, None] * u + np.sin(th)[:, None] * v)

    def rod_signal(s_edge: float, sign: int) -> float:
        ss = s_edge + sign * np.linspace(2, solid_len - 2, 9)
        vals = np.nan_to_num(sample_world(volume, centre + ss[:, None, None] * d + ring[None]), nan=0.0)
        return float(vals.max())

    if rod_signal(s[i0], -1) >= rod_signal(s[i1], +1):
        s_face_rough = float(s[i0])  # the solid section comes before the uniform region along d
    else:
        d, s_face_rough = -d, -float(s[i1])  # make +d run from the solid section into the uniform region
    # refine the axis on the full-resolution image: centroids of the filled cross-section of the
    # uniform region (rods excluded, chambers filled as holes), fitted by a line
    for _ in range(2):
        centre, d = _refine_cylinder_axis(volume, centre + s_face_rough * d, d, 2.0, uniform_len - 2.0, body_r, bg, where)
        s_face_rough = 0.0
        s = np.arange(-10.0, 10.0 + step / 2, step)
        prof_face = _axial_profile(volume, centre, d, s, 0.8 * body_r)
        # the face: halfway between the uniform level and the solid-section level
        uniform_level = float(np.median(_axial_profile(volume, centre, d, np.linspace(3, uniform_len / 2, 9), 0.8 * body_r)))
        solid_level = float(np.median(_axial_profile(volume, centre, d, -np.linspace(5, min(15.0, solid_len - 2), 9), 0.8 * body_r)))
        level = 0.5 * (uniform_level + solid_level)
        cross = np.nonzero((prof_face[:-1] < level) & (prof_face[1:] >= level))[0]
        if len(cross) == 0:
            raise PhantomNotFound(f"{where}: the face between the solid section and the uniform region was not found")
        c0 = cross[np.argmin(np.abs(s[cross]))]
        s_face = float(s[c0] + (level - prof_face[c0]) / (prof_face[c0 + 1] - prof_face[c0]) * step)
        centre = centre + s_face * d
    face = centre
    u, v = _orthonormal_basis(d)
    # ---- rotation from the rods
    z0, z1 = rod_profile_z_mm
    zs = np.arange(z0, z1 + 1e-9, max(step, 0.5))
    n_bins = 360
    theta = (np.arange(n_bins) + 0.5) * 2 * np.pi / n_bins
    radii = ring_r + np.linspace(-0.5, 0.5, 3)
    ring_pts = (radii[:, None, None] * np.cos(theta)[None, :, None]) * u + (radii[:, None, None] * np.sin(theta)[None, :, None]) * v
    vals = sample_world(volume, face + zs[:, None, None, None] * d + ring_pts[None])
    if np.isnan(vals).mean() > 0.2:
        raise PhantomNotFound(f"{where}: the rods lie outside the field of view; centre the phantom in the image")
    profile = np.nanmean(vals, axis=(0, 1)) - solid_level
    model = np.zeros(n_bins)
    for r in rods:
        phi = math.atan2(r.centre_mm[1], r.centre_mm[0])
        hw = math.asin(min(1.0, (r.diameter_mm / 2 + 0.5) / ring_r))
        dth = np.angle(np.exp(1j * (theta - phi)))
        model += r.diameter_mm * np.clip(1 - (dth / hw) ** 2, 0, None) ** 0.5
    theta0, _, score = _match_rotation(np.nan_to_num(profile), model, hands=(1,))
    if score < 0.3:
        raise PhantomNotFound(
            f"{where}: the rods do not match template {template.name} (match score {score:.2f} < 0.30); is this the right phantom?"
        )
    ex = math.cos(theta0) * u + math.sin(theta0) * v
    ey = -math.sin(theta0) * u + math.cos(theta0) * v
    rot = np.column_stack([ex, ey, d])
    t = face  # template origin: on the axis at the solid/uniform face
    fits: dict[str, InsertFit] = {}
    warnings: list[str] = []
    for ins in template.inserts:
        pred = rot @ np.asarray(ins.centre_mm, float) + t
        c = overrides.get(ins.name)
        fits[ins.name] = InsertFit(ins.name, c if c is not None else pred, None, None, None, "override" if c is not None else "template")
    smallest = min(r.diameter_mm for r in rods)
    if float(np.max(np.abs(volume.spacing_mm))) > smallest / 2:
        warnings.append(
            f"voxel size {float(np.max(np.abs(volume.spacing_mm))):.2f} mm is coarse for the {smallest:g} mm rod "
            f"(more than half its diameter); its recovery is measured but poorly sampled"
        )
    return Placement(template, rot, t, bg, body.noise_sd, fits, score, warnings)


def _axial_profile(volume: Volume, point: np.ndarray, d: np.ndarray, s: np.ndarray, radius: float) -> np.ndarray:
    """Mean over a disc of ``radius`` perpendicular to ``d`` at each position ``point + s d``."""
    u, v = _orthonormal_basis(d)
    rr = np.linspace(0, radius, 6)
    th = np.deg2rad(np.arange(0, 360, 20.0))
    R, T = np.meshgrid(rr, th, indexing="ij")
    disc = (R * np.cos(T))[..., None] * u + (R * np.sin(T))[..., None] * v
    vals = sample_world(volume, point + np.asarray(s, float)[:, None, None, None] * d + disc[None])
    return np.nan_to_num(vals, nan=0.0).mean(axis=(1, 2))


def _refine_cylinder_axis(volume: Volume, face: np.ndarray, d: np.ndarray, z_from: float, z_to: float, body_r: float, bg: float, where: str) -> tuple[np.ndarray, np.ndarray]:
    """Line through the centroids of the filled body cross-sections between ``z_from`` and
    ``z_to`` mm along ``d`` from ``face``; returns (a point on the axis at the face, direction)."""
    from .rois import sample_plane

    u, v = _orthonormal_basis(d)
    pix = float(np.min(np.abs(volume.spacing_mm)))
    pts = []
    for z in np.arange(z_from, z_to + 1e-9, max(1.0, pix)):
        plane = sample_plane(volume, face + z * d, u, v, body_r + 4 * pix, pixel_mm=pix)
        mask = ndimage.binary_fill_holes(np.nan_to_num(plane.values) > 0.5 * bg)
        if mask.sum() < 10:
            continue
        r_idx, c_idx = np.nonzero(mask)
        pts.append(plane.uv_to_world(np.array([c_idx.mean() * plane.pixel_mm, r_idx.mean() * plane.pixel_mm])))
    if len(pts) < 3:
        raise PhantomNotFound(f"{where}: the uniform region is too short to find the phantom axis")
    pts = np.array(pts)
    c = pts.mean(axis=0)
    _, _, vt = np.linalg.svd(pts - c, full_matrices=False)
    new_d = vt[0] if vt[0] @ d > 0 else -vt[0]
    # back to a point on the new axis level with the old face
    c_face = c + ((face - c) @ new_d) * new_d
    return c_face, new_d / np.linalg.norm(new_d)


# =============================================================================== generic
def _template_value_at(template: Template, pts: np.ndarray, conc: dict[str, float], background: float) -> np.ndarray:
    """Point samples of the expected concentration of a template at template-frame points."""
    val = np.where(template.body_inside(pts), background, 0.0)
    for ins in template.painting_order():  # the synthesizer's order
        rel = pts - np.asarray(ins.centre_mm, float)
        r_out = ins.outer_diameter_mm / 2
        if ins.shape == "sphere":
            dist = np.linalg.norm(rel, axis=-1)
            in_outer, in_inner = dist <= r_out, dist <= ins.diameter_mm / 2
        else:
            ax = ins.axis_unit
            t_ax = rel @ ax
            radial = np.linalg.norm(rel - t_ax[..., None] * ax, axis=-1)
            half = float(ins.length_mm) / 2
            in_outer = (radial <= r_out) & (np.abs(t_ax) <= half + ins.wall_mm)
            in_inner = (radial <= ins.diameter_mm / 2) & (np.abs(t_ax) <= half)
        val = np.where(in_outer, 0.0, val)
        val = np.where(in_inner, conc.get(ins.name, 0.0), val)
    return val


def locate_generic(
    volume: Volume,
    template: Template,
    *,
    concentrations: dict[str, float],
    overrides: dict[str, np.ndarray] | None = None,
    where: str | None = None,
) -> Placement:
    """Find a user-defined phantom (cylindrical or body-shaped, inserts anywhere).

    Method (phantometry's own): body and axis as for the small-animal phantom (coarse slice
    centroids, then a line through the centroids of the filled cross-sections on the full
    image); the body centre along the axis from the two ends of the axial profile; then the
    rotation about the axis and the lying direction by correlating the image with the
    template's expected concentrations on a cylindrical grid (z, r, theta), by FFT along theta,
    for both directions; finally each insert with enough signal is refined by a signed centroid
    and a weighted Kabsch fit when at least three inserts qualify.

    Parameters
    ----------
    concentrations : dict insert name -> expected Bq/mL (from the fill record).
    """
    where = where or (volume.source or "image")
    overrides = {k: np.asarray(v, float) for k, v in (overrides or {}).items()}
    for name in overrides:
        template.insert(name)
    body_t = template.body
    body_r = body_t.diameter_mm / 2 if body_t.shape == "cylinder" else body_t.arc_radius_mm
    target = max(float(np.min(np.abs(volume.spacing_mm))), min(6.0, 2 * body_r / 15))
    body = find_body(volume, where, target)
    rel = body.extent_mm / _template_extent(template)
    if np.any(rel < 0.6) or np.any(rel > 1.6):
        raise PhantomNotFound(size_mismatch_message(where, body.extent_mm, template))
    bg = body.background
    counts = body.mask.sum(axis=(1, 2))
    use = counts >= max(3, 0.8 * counts.max())
    jj, ii = np.meshgrid(np.arange(body.mask.shape[1]), np.arange(body.mask.shape[2]), indexing="ij")
    cj = (body.mask * jj).sum(axis=(1, 2))[use] / counts[use]
    ci = (body.mask * ii).sum(axis=(1, 2))[use] / counts[use]
    pts = _coarse_to_world(volume, np.c_[np.nonzero(use)[0], cj, ci], body.factors)
    centre = pts.mean(axis=0)
    if len(pts) >= 3:
        _, _, vt = np.linalg.svd(pts - centre, full_matrices=False)
        d = vt[0] / np.linalg.norm(vt[0])
    else:
        d = volume.axes_world[0]
    if d @ volume.axes_world[0] < 0:
        d = -d
    half_len = template.body_length_mm / 2
    centre, d = _refine_cylinder_axis(volume, centre, d, -half_len + 5, half_len - 5, body_r, bg, where)
    # body ends along the axis: centre the template there
    step = max(0.25, float(np.min(np.abs(volume.spacing_mm))) / 2)
    s = np.arange(-template.body_length_mm, template.body_length_mm + step / 2, step)
    prof = _axial_profile(volume, centre, d, s, 0.5 * body_r)
    high = np.nonzero(prof > 0.5 * bg)[0]
    if len(high) == 0:
        raise PhantomNotFound(f"{where}: no phantom body found along its axis")
    centre = centre + 0.5 * (s[high[0]] + s[high[-1]]) * d
    body_centre_t = template.body_centre_mm
    # rotation and direction: correlation on a cylindrical grid
    n_t = 180
    theta = np.arange(n_t) * 2 * np.pi / n_t
    radii = np.linspace(0.1 * body_r, 0.95 * body_r, 12)
    zs = np.linspace(-half_len * 0.95, half_len * 0.95, 24)
    u, v = _orthonormal_basis(d)
    Z, R, T = np.meshgrid(zs, radii, theta, indexing="ij")
    world = centre + Z[..., None] * d + (R * np.cos(T))[..., None] * u + (R * np.sin(T))[..., None] * v
    img = np.nan_to_num(sample_world(volume, world), nan=0.0)
    img = img - img.mean()
    best = (-np.inf, 0.0, 1)
    for hand in (1, -1):
        # template point for grid (z, r, theta) with theta0 = 0: x = r cos(hand*theta), y = r sin(hand*theta), z = hand*z
        tp = np.stack([R * np.cos(hand * T), R * np.sin(hand * T), hand * Z], axis=-1) + body_centre_t
        model = _template_value_at(template, tp, concentrations, bg)
        model = ndimage.gaussian_filter1d(model, 1.5, axis=2, mode="wrap")
        model = model - model.mean()
        corr = np.real(np.fft.ifft(np.fft.fft(img, axis=2) * np.conj(np.fft.fft(model, axis=2)), axis=2))
        corr = (corr * R[..., :1]).sum(axis=(0, 1))
        k = int(np.argmax(corr))
        norm = np.linalg.norm(img * np.sqrt(R)) * np.linalg.norm(model * np.sqrt(R))
        score = float(corr[k] / norm) if norm > 0 else 0.0
        if score > best[0]:
            y0, y1, y2 = corr[(k - 1) % n_t], corr[k], corr[(k + 1) % n_t]
            den = y0 - 2 * y1 + y2
            frac = 0.5 * (y0 - y2) / den if den < 0 else 0.0
            best = (score, (k + frac) * 2 * np.pi / n_t, hand)
    score, theta0, hand = best
    if score < 0.3:
        raise PhantomNotFound(f"{where}: the image does not match template {template.name} (match score {score:.2f} < 0.30)")
    # image angle theta = theta0 + hand * template angle; z_world = hand * z_template
    ex = math.cos(theta0) * u + math.sin(theta0) * v
    ey = hand * (-math.sin(theta0) * u + math.cos(theta0) * v)
    ez = hand * d
    rot = np.column_stack([ex, ey, ez])
    t = centre - rot @ body_centre_t
    # refinement of insert centres, then a Kabsch fit when three or more inserts qualify
    noise = max(body.noise_sd, 1e-6 * bg)
    fits: dict[str, InsertFit] = {}
    pairs = []
    refined: dict[str, tuple[np.ndarray, float]] = {}
    for ins in template.inserts:
        contrast = concentrations.get(ins.name, 0.0) - bg
        if ins.name in overrides or abs(contrast) < 0.2 * bg or ins.fill == "solid":
            continue
        pred = rot @ np.asarray(ins.centre_mm, float) + t
        win = ins.diameter_mm / 2 + 0.5 * max(4.0, float(np.max(volume.spacing_mm)))
        try:
            c, signal = refine_centre(volume, pred, win, 1.0 if contrast > 0 else -1.0, bg)
        except PhantomNotFound:
            raise PhantomNotFound(f"{where}: {ins.name} would lie outside the image; is the phantom in the field of view?") from None
        if ins.shape == "cylinder":  # only the position across the cylinder's axis is determined
            ax_w = rot @ ins.axis_unit
            c = pred + (c - pred) - ((c - pred) @ ax_w) * ax_w
        n_vox = 4 / 3 * math.pi * win**3 / (volume.voxel_volume_ml * 1000.0)
        snr = signal / (noise * math.sqrt(max(n_vox, 1.0)))
        refined[ins.name] = (c, snr)
        if snr > 5 and np.linalg.norm(c - pred) < ins.diameter_mm / 2 + 6:
            pairs.append((np.asarray(ins.centre_mm, float), c, ins.diameter_mm**2 * min(snr, 50.0)))
    if len(pairs) >= 3:
        rot_k, t_k = kabsch(np.array([p for p, _, _ in pairs]), np.array([q for _, q, _ in pairs]), np.array([w for *_, w in pairs]))
        # accept the fit only if it keeps the axis (cylinder inserts constrain no axial shift)
        if abs(float(rot_k[:, 2] @ rot[:, 2])) > 0.995:
            shift_along = ((t_k - t) @ rot[:, 2]) * rot[:, 2]
            rot, t = rot_k, t_k - shift_along
    for ins in template.inserts:
        pred = rot @ np.asarray(ins.centre_mm, float) + t
        if ins.name in overrides:
            fits[ins.name] = InsertFit(ins.name, overrides[ins.name], None, None, None, "override")
        elif ins.name in refined:
            c, snr = refined[ins.name]
            fits[ins.name] = InsertFit(ins.name, pred, c, float(np.linalg.norm(c - pred)), snr, "fit")
        else:
            fits[ins.name] = InsertFit(ins.name, pred, None, None, None, "template")
    return Placement(template, rot, t, bg, body.noise_sd, fits, score, [])
