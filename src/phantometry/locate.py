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
from typing import Any, Sequence

import numpy as np
from scipy import ndimage
from skimage.filters import threshold_otsu

from .errors import PhantomNotFound, PhantomNotPlaced, TemplateError
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
    #: the body's own frame found from its outline (body phantoms; :func:`find_body_frame`)
    body_frame: Any = None

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
            **(self.body_frame.as_dict() if self.body_frame is not None else {}),
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
        raise PhantomNotFound(size_mismatch_message(where, found.extent_mm, template, edges=image_edges_reached(found)))


def size_mismatch_message(where: str, extent_mm: np.ndarray, template: Template, edges: Sequence[str] = ()) -> str:
    """Message for an object whose size does not fit the template, suggesting one that does.

    ``edges``: the edges of the image the object reaches (:func:`image_edges_reached`). An
    object that reaches an edge, with some of its sizes the template's and the others too short,
    is most likely the template's phantom cut by the field of view, and the message says so first.
    """
    from .templates import list_templates, load_template_file

    expected = _template_extent(template)
    suggestion, other_name = "", ""
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
            suggestion = f"it looks like the {other.name} phantom: try --template {other.name}"
            other_name = other.name
    found = (f"{where}: the object found measures {' x '.join(f'{e:.0f}' for e in extent_mm)} mm but template "
             f"{template.name} describes {' x '.join(f'{e:.0f}' for e in expected)} mm")
    rel = np.asarray(extent_mm, float) / expected
    fits = (rel > 0.6) & (rel < 1.6)
    if edges and np.any(fits) and np.all(fits | (rel <= 0.6)):  # some sizes fit, the others are short: cut off
        return (f"{found}; it reaches {_join_words(list(edges))} of the image: likely cause: phantom partly outside the field "
                f"of view; centre the phantom in the field of view and scan it whole; "
                + (f"or, if this is the {other_name} phantom, use --template {other_name}" if other_name
                   else "or check --template (phantometry templates list)"))
    return (f"{found}; {suggestion or 'use the template for this phantom (phantometry templates list)'}"
            ", or check that the whole phantom is in the field of view")


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


# =============================================================================== why not found
#: Contrast-to-noise ratio of the hottest spot inside the phantom (image averaged over about
#: 18 mm, the core of the largest sphere) below which the spheres cannot be told from the image
#: noise: noise alone reaches about 4 on a phantom's worth of such spots (the maximum of some
#: 10^4 normal deviates), and the ring search needs clearly more (measured on synthetic scans).
LOW_CONTRAST_CNR = 8.0
#: The hottest spot seen below this fraction of the contrast the fill record's ratio gives
#: means the inserts are not as hot as recorded (wrong record, or units).
WEAK_CONTRAST_FRACTION = 0.5


@dataclass(frozen=True)
class ContrastSeen:
    """The strongest insert signal in the phantom, as the image shows it.

    Attributes
    ----------
    percent : float
        The hottest (or, for cold inserts, coldest) spot's difference from the background, in
        per cent of the background (positive for hot, negative for cold).
    cnr : float
        That difference in standard deviations of the background at the same smoothing.
    """

    percent: float
    cnr: float


def contrast_seen(body: "_Body", sign: float = 1.0) -> ContrastSeen | None:
    """The hottest (``sign`` +1) or coldest (-1) spot inside the phantom body.

    The coarse block-mean image of :func:`find_body` (about 6 mm blocks) is averaged again over
    3 blocks along each axis (about 18 mm, inside any sphere of 30 mm or more), kept away from
    the body's edge, and compared with its own median (the background) and robust spread (the
    noise at that smoothing, 1.4826 median absolute deviation). None when the body is too
    small for that.
    """
    smooth = ndimage.uniform_filter(np.nan_to_num(body.coarse), 3)
    core = ndimage.binary_erosion(body.mask, iterations=2)
    if int(core.sum()) < 27:
        return None
    vals = smooth[core]
    bg = float(np.median(vals))
    if not bg > 0:
        return None
    spread = 1.4826 * float(np.median(np.abs(vals - bg)))
    peak = float(vals[int(np.argmax(sign * vals))])
    cnr = abs(peak - bg) / spread if spread > 0 else math.inf
    return ContrastSeen(100.0 * (peak - bg) / bg, cnr)


def image_edges_reached(body: "_Body") -> list[str]:
    """The edges of the image the phantom's body touches (it continues beyond them): a few
    words each (``the first slice``, ``the last column``); empty when it lies wholly inside."""
    names = (("the first slice", "the last slice"), ("the first row", "the last row"), ("the first column", "the last column"))
    out = []
    for axis in range(3):
        for end, name in zip((0, -1), names[axis]):
            if int(np.count_nonzero(np.take(body.mask, end, axis=axis))) >= 3:
                out.append(name)
    return out


def likely_cause(volume: Volume, template: Template, *, hot: dict[str, bool] | None = None,
                 activity_ratio: dict[str, float] | None = None) -> str | None:
    """Why a phantom whose body is in the image could not be placed, from what the image shows.

    In this order: the body reaches an edge of the image (phantom partly outside the field of
    view); the hottest spot is far weaker than the fill record's ratio would make it, or too
    close to the noise (contrast too low for the fill record's ratio); otherwise the image shows
    clear inserts and the whole phantom, so the template (or the fill record's hot and cold
    inserts) does not describe it. None when no body of the template's size is found (the
    error then says so itself).
    """
    try:
        body = find_body(volume, "image")
    except PhantomNotFound:
        return None
    rel = body.extent_mm / _template_extent(template)
    if np.any(rel < 0.6) or np.any(rel > 1.6):
        return None
    edges = image_edges_reached(body)
    if edges:
        return (f"phantom partly outside the field of view: its body reaches {_join_words(edges)} of the image; "
                "centre the phantom in the field of view and scan it whole")
    names = [i.name for i in template.inserts if i.role == "sphere"] or [i.name for i in template.inserts]
    hot = {n: True for n in names} | (hot or {})
    ratios = [float((activity_ratio or {}).get(n, 4.0)) for n in names if hot.get(n, True)]
    ratio = max(ratios) if ratios else None
    seen = contrast_seen(body, 1.0 if ratio is not None else -1.0)
    if seen is None:
        return None
    if ratio is not None:
        expected = 100.0 * (ratio - 1.0)
        if seen.percent < WEAK_CONTRAST_FRACTION * expected:
            return (f"contrast too low for the fill record's {ratio:g}:1 ratio: the hottest spot inside the phantom is "
                    f"{seen.percent:.0f} % above the background where that ratio gives about {expected:.0f} %; "
                    "check the fill record (which inserts are hot, their activity and times)")
        if seen.cnr < LOW_CONTRAST_CNR:
            return (f"contrast too low for the fill record's {ratio:g}:1 ratio: at that ratio the spheres are {expected:.0f} % above "
                    f"the background, close to the image noise (the hottest spot inside the phantom is {seen.cnr:.1f} noise SDs "
                    "above the background, where noise alone reaches about 4); scan longer or fill at a higher ratio")
        what = f"the hottest spot inside the phantom is {seen.percent:.0f} % above the background, {seen.cnr:.0f} noise SDs"
    else:
        if seen.cnr < LOW_CONTRAST_CNR:
            return (f"contrast too low: the cold inserts stand only {seen.cnr:.1f} noise SDs below the background "
                    "(noise alone reaches about 4); scan longer")
        what = f"the coldest spot inside the phantom is {-seen.percent:.0f} % below the background, {seen.cnr:.0f} noise SDs"
    return (f"wrong template: the image shows clear inserts ({what}) and the whole phantom, but not where template "
            f"{template.name} puts them; check --template, and the fill record's hot and cold inserts")


def _join_words(words: list[str]) -> str:
    return words[0] if len(words) == 1 else ", ".join(words[:-1]) + " and " + words[-1]


def explain_not_found(exc: PhantomNotFound, volume: Volume, template: Template, *, hot: dict[str, bool] | None = None,
                      activity_ratio: dict[str, float] | None = None,
                      overrides: dict[str, Any] | None = None) -> PhantomNotFound:
    """``exc`` with the likely cause (:func:`likely_cause`) and what to do, as a
    :class:`PhantomNotPlaced`; ``exc`` itself when its message already says all (no body of
    the template's size in the image)."""
    cause = likely_cause(volume, template, hot=hot, activity_ratio=activity_ratio)
    if cause is None:
        return exc
    if overrides:
        advice = "or check the --centre positions (world mm of this image)"
    else:
        spheres = [i for i in template.inserts if i.role == "sphere"] or list(template.inserts)
        names = ", ".join(i.name for i in sorted(spheres, key=lambda i: -i.diameter_mm)[:3])
        advice = (f"or place the phantom by hand: --centre NAME=x,y,z (world mm, read in a viewer) for three spheres, "
                  f"e.g. {names}")
    text = str(exc).rstrip(". ")
    if text.endswith("?"):  # a question the cause answers
        text = text[: text.rfind(";")] if ";" in text else text.rstrip("?")
    return PhantomNotPlaced(f"{text}; likely cause: {cause}; {advice}")


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
    PhantomNotPlaced
        When the phantom's body is found but its inserts cannot be placed: the message adds
        the likely cause from what the image shows (:func:`likely_cause`: part of the phantom
        outside the field of view, contrast too low for the fill record's ratio, or another
        template) and how to place it by hand (``--centre``).
    """
    try:
        return _locate(volume, template, axis_insert=axis_insert, hot=hot, activity_ratio=activity_ratio, overrides=overrides, where=where)
    except PhantomNotPlaced:
        raise
    except PhantomNotFound as exc:
        raise explain_not_found(exc, volume, template, hot=hot, activity_ratio=activity_ratio, overrides=overrides) from None


def _locate(
    volume: Volume,
    template: Template,
    *,
    axis_insert: str,
    hot: dict[str, bool] | None = None,
    activity_ratio: dict[str, float] | None = None,
    overrides: dict[str, np.ndarray] | None = None,
    where: str | None = None,
) -> Placement:
    """:func:`locate` without the explanation of a failure."""
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
        raise PhantomNotFound(size_mismatch_message(where, body.extent_mm, template, edges=image_edges_reached(body)))
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
                f"{where}: the sphere ring does not match template {template.name} (match score {ring_score:.2f} < 0.30)"
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
                raise PhantomNotFound(f"{where}: {s.name} would lie outside the image") from None
            n_vox = 4 / 3 * math.pi * win**3 / (volume.voxel_volume_ml * 1000.0)
            snr = signal / (noise * math.sqrt(max(n_vox, 1.0)))
            refined[s.name] = (c, snr)
            if snr > 3 and np.linalg.norm(c - pred) < s.diameter_mm / 2 + 6:
                pairs.append((np.asarray(s.centre_mm, float), c, s.diameter_mm**2 * min(snr, 50.0)))
        top_weight = max([w for *_, w in pairs] or [1.0])
        pairs += [(np.asarray(s.centre_mm, float), overrides[s.name], 10 * top_weight) for s in sphere_overrides]
        if len(pairs) < 3:
            raise PhantomNotFound(
                f"{where}: fewer than three spheres stand out from the background"
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
            f"rigid placement (tolerance {tol:.1f} mm)"
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
    placement = Placement(template, rot, t, bg, body.noise_sd, fits, ring_score, warnings)
    try:
        placement.body_frame = find_body_frame(volume, placement, template, axis_insert, where)
    except PhantomNotFound as exc:
        placement.warnings.append(f"WARNING: {exc}; the background ROIs follow the ring fit and the template")
    else:
        placement.warnings.extend(placement.body_frame.warnings)
    return placement


# =============================================================================== body outline
#: Ring-to-body difference (degrees) beyond which the arrangement differs from the template
#: (the outline angle is found to a few tenths of a degree; "a few degrees" of slack).
RING_TO_BODY_TOLERANCE_DEG = 3.0
#: Difference (mm) between the two body ends' distances from the sphere plane needed to tell
#: the ends apart (the template's 70 and 110 mm differ by 40 mm).
END_ASYMMETRY_MIN_MM = 20.0
#: RMS difference (mm) between the found and the template's body outline beyond which a
#: warning says the body is not the template's shape.
OUTLINE_RMS_WARN_MM = 3.0


def _angle_from_anterior_deg(xy: np.ndarray) -> np.ndarray:
    """Direction of in-plane vectors as degrees from +y (anterior), counterclockwise seen from +z, in (-180, 180]."""
    xy = np.asarray(xy, float)
    return np.degrees(np.arctan2(-xy[..., 0], xy[..., 1]))


def _wrap_deg(a: float) -> float:
    return float((a + 180.0) % 360.0 - 180.0)


def ring_arrangement(sphere_xy: list[tuple[float, np.ndarray]], centre_xy: np.ndarray) -> tuple[float, str]:
    """Where a sphere ring sits in a body frame: the direction of the largest sphere (degrees
    from +y, counterclockwise seen from +z) and the ring order from the largest sphere down
    (``counterclockwise`` or ``clockwise`` seen from +z).

    ``sphere_xy``: (diameter, (x, y)) of each sphere, in the body frame (mm).
    """
    ordered = sorted(sphere_xy, key=lambda item: -item[0])
    ang = _angle_from_anterior_deg(np.array([np.asarray(xy, float) - centre_xy for _, xy in ordered]))
    steps = [_wrap_deg(b - a) for a, b in zip(ang[:-1], ang[1:])]
    return float(ang[0]), ("counterclockwise" if sum(steps) > 0 else "clockwise")


def template_ring_arrangement(template: Template, axis_insert: str) -> tuple[float, str] | None:
    """:func:`ring_arrangement` of a template as written (None for a round body: no flat side)."""
    if template.body.shape != "d_shape" or len(template.spheres) < 2:
        return None
    ax = template.insert(axis_insert)
    return ring_arrangement([(s.diameter_mm, np.asarray(s.centre_mm[:2], float)) for s in template.spheres], np.asarray(ax.centre_mm[:2], float))


@dataclass
class BodyFrame:
    """The body phantom's own frame, found from its outline: ``world = R @ p + t`` with ``p`` in
    the template frame as the *body* sees it (+y away from the flat side, z = 0 the sphere
    plane, +z towards the body end nearer the sphere plane when the ends tell).

    Attributes
    ----------
    rotation, translation_mm : the rigid transform.
    rotation_from_ring_deg : the body's rotation about the axis relative to the ring's fit
        (None for a round body: no orientation).
    flipped : the ends found say +z runs the other way than the ring's fit implies.
    outline_rms_mm : RMS radial difference between the found outline and the template's.
    ends_mm : body-frame z of the two body ends found (sphere plane at 0).
    ring_to_body_deg, template_ring_to_body_deg : direction of the largest sphere from the
        body's anterior direction, found and in the template (degrees, counterclockwise seen
        from +z).
    ring_order, template_ring_order : ``counterclockwise`` / ``clockwise`` (seen from +z).
    end_rule : how +z was chosen (``body ends`` or ``ring fit``).
    outlines : the outlines found (world), one per plane offset.
    """

    rotation: np.ndarray
    translation_mm: np.ndarray
    rotation_from_ring_deg: float | None
    flipped: bool
    outline_rms_mm: float | None
    ends_mm: tuple[float, float]
    ring_to_body_deg: float | None
    template_ring_to_body_deg: float | None
    ring_order: str | None
    template_ring_order: str | None
    end_rule: str
    outlines: dict[float, Any] = field(default_factory=dict)
    warnings: list[str] = field(default_factory=list)

    def to_world(self, points_template_mm: np.ndarray) -> np.ndarray:
        return np.asarray(points_template_mm, float) @ self.rotation.T + self.translation_mm

    def to_body(self, points_world_mm: np.ndarray) -> np.ndarray:
        return (np.asarray(points_world_mm, float) - self.translation_mm) @ self.rotation

    @property
    def difference_deg(self) -> float | None:
        if self.ring_to_body_deg is None or self.template_ring_to_body_deg is None:
            return None
        return _wrap_deg(self.ring_to_body_deg - self.template_ring_to_body_deg)

    @property
    def as_template(self) -> bool | None:
        """The ring sits relative to the body as the template says (None: not determined)."""
        if self.difference_deg is None:
            return None
        return abs(self.difference_deg) <= RING_TO_BODY_TOLERANCE_DEG and self.ring_order == self.template_ring_order

    def as_dict(self) -> dict[str, Any]:
        r = (lambda v, n=2: None if v is None else round(float(v), n))
        return {
            "ring_to_body_deg": r(self.ring_to_body_deg),
            "ring_to_body_template_deg": r(self.template_ring_to_body_deg),
            "ring_to_body_difference_deg": r(self.difference_deg),
            "ring_order": self.ring_order,
            "ring_order_template": self.template_ring_order,
            "arrangement_as_template": self.as_template,
            "body_frame": {
                "rotation": [[round(float(v), 6) for v in row] for row in self.rotation],
                "translation_mm": [round(float(v), 3) for v in self.translation_mm],
                "rotation_from_ring_fit_deg": r(self.rotation_from_ring_deg, 3),
                "outline_rms_mm": r(self.outline_rms_mm),
                "ends_mm": [round(float(v), 2) for v in self.ends_mm],
                "end_rule": self.end_rule,
            },
        }


def _rot_z(phi: float) -> np.ndarray:
    c, s = math.cos(phi), math.sin(phi)
    return np.array([[c, -s, 0.0], [s, c, 0.0], [0.0, 0.0, 1.0]])


def _axial_ends(volume: Volume, centre: np.ndarray, d: np.ndarray, r_in: float, r_out: float, length: float, level: float) -> tuple[float, float] | None:
    """Outermost positions (mm along ``d`` from ``centre``) where the median over an annulus
    (radii ``r_in``..``r_out`` about the axis) crosses ``level``; None when not found."""
    u, v = _orthonormal_basis(d)
    step = 0.5
    s = np.arange(-length, length + step / 2, step)
    rr = np.linspace(r_in, r_out, 4)
    th = np.deg2rad(np.arange(0, 360, 15.0))
    R, T = np.meshgrid(rr, th, indexing="ij")
    ring = (R * np.cos(T))[..., None] * u + (R * np.sin(T))[..., None] * v
    vals = np.nan_to_num(sample_world(volume, centre + s[:, None, None, None] * d + ring[None]), nan=0.0)
    prof = np.median(vals.reshape(len(s), -1), axis=1)
    above = np.flatnonzero(prof >= level)
    if above.size == 0 or above[0] == 0 or above[-1] == len(s) - 1:
        return None
    i0, i1 = int(above[0]), int(above[-1])
    lo = s[i0 - 1] + step * (level - prof[i0 - 1]) / max(prof[i0] - prof[i0 - 1], 1e-12)
    hi = s[i1] + step * (prof[i1] - level) / max(prof[i1] - prof[i1 + 1], 1e-12)
    return float(lo), float(hi)


def find_body_frame(volume: Volume, placement: Placement, template: Template, axis_insert: str, where: str) -> BodyFrame:
    """The body's own frame from its outline, independently of the sphere ring.

    Method (phantometry's own; README "How the numbers are made"):

    1. On the planes of the background ROIs (perpendicular to the ring's axis), the body
       outline is found by rays from the axis (:func:`phantometry.outline.find_outline`,
       50 % of the background level).
    2. The outlines' radius profile about their area centroid is matched against the
       template's outline by circular cross-correlation: the rotation of the body about the
       axis relative to the ring's fit; the centroids give the body's position.
    3. Along the axis, the two body ends (50 % crossings of the median over an annulus) tell
       which end is nearer the sphere plane; when the template's ends differ enough
       (:data:`END_ASYMMETRY_MIN_MM`), +z is taken towards the nearer end, so a ring mounted
       the other way round (mirrored) is recognised.
    4. The largest sphere's direction from the body's anterior direction, and the ring order,
       are compared with the template's.

    Raises
    ------
    PhantomNotFound
        When no complete outline is found on any plane.
    """
    from .outline import find_outline, match_profiles, polygon_area_centroid, radius_profile
    from .rois import sample_plane

    R, t = placement.rotation, placement.translation_mm
    ax_ins = template.insert(axis_insert)
    c0 = np.array([ax_ins.centre_mm[0], ax_ins.centre_mm[1], 0.0])
    level = 0.5 * placement.background_estimate_bq_ml
    body_t = template.body
    max_r = body_t.half_extent_xy_mm + 30.0
    offsets = list(template.background.slice_offsets_mm) if template.background is not None else [0.0]
    u, v = R[:, 0], R[:, 1]
    outlines: dict[float, Any] = {}
    profiles, centroids = [], []
    for off in offsets:
        o = R @ (c0 + [0.0, 0.0, off]) + t
        ol = find_outline(sample_plane(volume, o, u, v, max_r), o, level, max_r)
        if not ol.valid:
            continue
        outlines[float(off)] = ol
        xy = ol.points_local() + c0[:2]  # ring-template xy
        _, cen = polygon_area_centroid(xy)
        centroids.append(cen)
        profiles.append(xy)
    if not outlines:
        raise PhantomNotFound(f"{where}: the body outline was not found around the phantom axis; is the whole phantom in the field of view?")
    c_img = np.mean(centroids, axis=0)
    found = np.median([radius_profile(xy, c_img) for xy in profiles], axis=0)
    tpl_xy = body_t.outline_xy()
    _, c_tpl = polygon_area_centroid(tpl_xy)
    model = radius_profile(tpl_xy, c_tpl)
    warnings: list[str] = []
    if body_t.shape == "d_shape":
        phi, rms = match_profiles(found, model)
        phi = (phi + math.pi) % (2 * math.pi) - math.pi
        phi_deg: float | None = math.degrees(phi)
    else:
        phi, rms, phi_deg = 0.0, float(np.sqrt(np.mean((found - model) ** 2))), None
    Rz = _rot_z(phi)
    shift = c_img - Rz[:2, :2] @ c_tpl
    R_b = R @ Rz
    t_b = R @ np.array([shift[0], shift[1], 0.0]) + t
    # ---- the ends along the axis (ring-fit z, sphere plane at 0)
    z0, z1 = body_t.z_range_mm
    r_in = 0.5 * ax_ins.outer_diameter_mm + 8.0
    reach = float(template.distance_to_body_edge_xy(c0[:2][None])[0])
    r_out = max(r_in + 5.0, 0.8 * reach)
    ends = _axial_ends(volume, R @ c0 + t, R[:, 2], r_in, r_out, 1.5 * template.body_length_mm, level)
    flipped = False
    end_rule = "ring fit"
    if ends is None:
        ends = (float(z0), float(z1))
        warnings.append("the body ends were not found along the axis (phantom cut by the field of view?); the template's are assumed")
    else:
        a_t, a_m = z0 + z1, ends[0] + ends[1]
        if abs(a_t) >= END_ASYMMETRY_MIN_MM and abs(a_m) >= 0.5 * abs(a_t):
            end_rule = "body ends"
            flipped = a_m * a_t < 0
    if flipped:
        F = np.diag([-1.0, 1.0, -1.0])
        pivot = np.array([body_t.centre_xy_mm[0], 0.0, 0.0])
        t_b = t_b + R_b @ (pivot - F @ pivot)
        R_b = R_b @ F
        ends = (-ends[1], -ends[0])
    frame = BodyFrame(R_b, t_b, phi_deg, flipped, rms, (float(ends[0]), float(ends[1])), None, None, None, None, end_rule,
                      outlines, warnings)
    # ---- the ring as found, in the body frame
    arr_t = template_ring_arrangement(template, axis_insert)
    if arr_t is not None:
        centre_b = frame.to_body(R @ c0 + t)[:2]
        spheres = [(s.diameter_mm, frame.to_body(placement.insert_centre(s.name))[:2]) for s in template.spheres]
        frame.ring_to_body_deg, frame.ring_order = ring_arrangement(spheres, centre_b)
        frame.template_ring_to_body_deg, frame.template_ring_order = arr_t
        if not frame.as_template:
            mirrored = frame.ring_order != frame.template_ring_order
            warnings.append(
                f"WARNING: the sphere ring sits differently relative to the body than template {template.name} says: the "
                f"{max(s.diameter_mm for s in template.spheres):g} mm sphere is at {frame.ring_to_body_deg:.1f} deg from the body's "
                f"anterior direction (template {frame.template_ring_to_body_deg:.1f} deg)"
                + (f", and the ring runs {frame.ring_order} (template {frame.template_ring_order}; mirrored)" if mirrored else "")
                + "; the background ROIs were placed and checked on the body as found in the image (see placement_quality)"
            )
    if rms > OUTLINE_RMS_WARN_MM:
        warnings.append(
            f"WARNING: the body outline found differs from template {template.name}'s by {rms:.1f} mm RMS; the body may not be "
            "this template's shape (the background ROIs are checked against the outline found)"
        )
    return frame


def as_found_template(template: Template, placement: Placement, frame: BodyFrame) -> Template:
    """The template rewritten in the body frame found in the image: the inserts where the
    placement put them, the body ends where they were found. With ``frame`` as the placement,
    it describes the phantom as it is (e.g. for the noise estimate's background mask)."""
    inserts = []
    for ins in template.inserts:
        c = frame.to_body(placement.insert_centre(ins.name))
        axis = frame.rotation.T @ placement.direction_to_world(ins.axis_unit)
        inserts.append(ins.model_copy(update={"centre_mm": tuple(float(x) for x in c), "axis": tuple(float(x) for x in axis)}))
    body = template.body.model_copy(update={"z_range_mm": tuple(float(x) for x in frame.ends_mm)})
    return template.model_copy(update={"inserts": inserts, "body": body})


def body_frame_placement(placement: Placement, frame: BodyFrame) -> Placement:
    """A placement in the body frame (same fits, warnings and levels); pairs with :func:`as_found_template`."""
    return Placement(placement.template, frame.rotation, frame.translation_mm, placement.background_estimate_bq_ml, placement.noise_sd_bq_ml,
                     dict(placement.fits), placement.ring_score, list(placement.warnings))


# =============================================================================== small animal
#: Largest angle (degrees) between the phantom axis and the slice axis at which the NU 4 rod
#: analysis reads the original slices and voxel columns; beyond it, planes are interpolated.
ORIGINAL_SLICES_MAX_TILT_DEG = 1.0


@dataclass
class ChamberFinding:
    """One cold chamber of the small-animal phantom as found in the image.

    Attributes
    ----------
    name : the template chamber it was identified as.
    found : the image shows a cold cylinder of about the template's size there.
    centre_mm : world mm of the centre of the chamber's spill-over VOI (found axis, found end).
    xy_template_mm : found (x, y) of its axis in the template frame (relative to the rods).
    offset_mm : distance of the found axis from where the template places it.
    radius_mm : radius of the cold disc found (wall included), from its deficit integral.
    depth : deficit at its centre over the uniform level (1: fully cold, blur-free).
    end_z_mm : template-frame z of the cold region's end towards the rods (outer wall face).
    inner_z_mm : template-frame z range of the chamber's interior as found.
    mean_bq_ml : mean in a VOI of spill-over size (the level rule of the identification).
    """

    name: str
    found: bool
    centre_mm: np.ndarray
    xy_template_mm: np.ndarray
    offset_mm: float
    radius_mm: float | None = None
    depth: float | None = None
    end_z_mm: float | None = None
    inner_z_mm: tuple[float, float] | None = None
    mean_bq_ml: float | None = None

    def as_dict(self) -> dict[str, Any]:
        def r(v: float | None, n: int = 3) -> float | None:
            return None if v is None else round(float(v), n)

        return {
            "name": self.name,
            "found": self.found,
            "voi_centre_mm": [round(float(v), 3) for v in self.centre_mm],
            "axis_xy_template_mm": [round(float(v), 3) for v in self.xy_template_mm],
            "offset_from_template_mm": r(self.offset_mm),
            "cold_radius_mm": r(self.radius_mm),
            "depth": r(self.depth, 4),
            "end_z_mm": r(self.end_z_mm),
            "interior_z_mm": None if self.inner_z_mm is None else [r(v) for v in self.inner_z_mm],
            "mean_bq_ml": r(self.mean_bq_ml, 2),
        }


@dataclass
class SmallAnimalPlacement(Placement):
    """Placement of the small-animal phantom with what the image showed beyond the rigid fit.

    The template frame's origin is on the phantom axis at the face between the solid section
    and the uniform region (found in the image); +z runs into the uniform region.

    Attributes
    ----------
    body_radius_mm : inner radius of the phantom found from its edge profile.
    psf_fwhm_mm : FWHM of the image's point response found from the same edge profile (the
        blurred-disc model), or a fallback (see ``psf_source``).
    psf_source : ``body edge`` or ``fallback (...)``.
    uniform_level_bq_ml : level of the uniform region used to find the cold chambers.
    chambers : the cold chambers as found, in template order.
    chamber_identity : how water and air were told apart: ``arrangement`` (the chambers sit
        where the template has them relative to the rods), ``level`` (the colder one is air),
        ``undetermined`` (neither: labels follow the nearest template position), ``override``
        or ``template`` (chambers not searched).
    rod_section_z_mm : template-frame z range of the rod section found (far end of the rods
        to the face); None when the rods' far end was not seen.
    """

    body_radius_mm: float | None = None
    psf_fwhm_mm: float | None = None
    psf_source: str = "fallback"
    uniform_level_bq_ml: float | None = None
    chambers: list[ChamberFinding] = field(default_factory=list)
    chamber_identity: str = "template"
    rod_section_z_mm: tuple[float, float] | None = None

    def chamber(self, name: str) -> ChamberFinding | None:
        return next((c for c in self.chambers if c.name == name), None)

    def as_dict(self) -> dict[str, Any]:
        out = super().as_dict()
        out["small_animal"] = {
            "body_radius_mm": None if self.body_radius_mm is None else round(self.body_radius_mm, 3),
            "psf_fwhm_mm": None if self.psf_fwhm_mm is None else round(self.psf_fwhm_mm, 3),
            "psf_source": self.psf_source,
            "uniform_level_bq_ml": None if self.uniform_level_bq_ml is None else round(self.uniform_level_bq_ml, 2),
            "chamber_identity": self.chamber_identity,
            "chambers": [c.as_dict() for c in self.chambers],
            "rod_section_z_mm": None if self.rod_section_z_mm is None else [round(float(v), 3) for v in self.rod_section_z_mm],
        }
        return out


def locate_small_animal(
    volume: Volume,
    template: Template,
    *,
    solid_section: str,
    rod_profile_z_mm: tuple[float, float],
    spillover_voi_mm: tuple[float, float] | None = None,
    overrides: dict[str, np.ndarray] | None = None,
    where: str | None = None,
) -> SmallAnimalPlacement:
    """Find a small-animal image-quality phantom (rods, uniform region, cold chambers).

    Method (phantometry's own):

    1. Body on a coarse copy (about 1/15 of the phantom diameter), Otsu threshold as for the
       body phantom; size checked against the template.
    2. Axis: the phantom lies roughly along the bed (tilt up to ~10 degrees); in slices
       perpendicular to the slice axis the centroid of the filled body cross-section is taken
       and a line fitted through the centroids (principal component).
    3. Direction and axial position: along the axis, the mean in a disc of 0.8 x the body radius
       drops at both ends of the uniform region; the end followed by hot rods is the solid
       section (either lying direction). The interface is where the profile crosses halfway
       between the uniform and the solid-section levels.
    4. Rotation: the slices over the rod profile range are averaged and the angular profile on
       the rod circle is matched (circular cross-correlation) against the rods' widths.
    5. Point response and body radius: the radial profile of the free part of the uniform
       region (averaged over angles) is fitted by a uniform disc blurred by a Gaussian
       (``level * ncx2.cdf(R^2/s^2, 2, r^2/s^2)``, the closed form of the blurred disc).
    6. Cold chambers, from the image: in the slices through the middle of the chambers, the
       deficit ``D = blurred body disc - image`` holds only the chambers; its maxima (after a
       light smoothing) are the chamber axes, refined by an iterated centroid of ``D`` in a
       window of the chamber's size. A found chamber is a deficit of at least half the level
       at its centre over a disc of 0.6-1.5 x the template's cold radius. Its end towards the
       rods is where the deficit along its axis falls to half. Water and air: by the
       template's arrangement when every chamber lies within its inner radius of its template
       place; otherwise by level (the colder one is air), with a warning.
    7. Rod section: the far end of the rods is where the largest rod's axial profile falls to
       half its plateau.
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
        raise PhantomNotFound(size_mismatch_message(where, body.extent_mm, template, edges=image_edges_reached(body)))
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
        centre, d = _refine_cylinder_axis(volume, centre + s_face_rough * d, d, 2.0, uniform_len - 2.0, body_r, bg, where, fraction=0.25)
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
    warnings: list[str] = []
    pix = float(np.min(np.abs(volume.spacing_mm)))
    # ---- point response and body radius from the edge of the free part of the uniform region
    free_z = _template_free_span(template)
    mid = 0.5 * free_z
    edge = _fit_disc_edge(volume, face, rot, np.linspace(mid - 1.5, mid + 1.5, 5), body_r, uniform_level, pix)
    if edge is not None:
        level_fit, radius_fit, sigma_fit = edge
        psf_fwhm, psf_source = _FWHM_PER_SIGMA * sigma_fit, "body edge"
    else:
        level_fit, radius_fit = uniform_level, body_r
        sigma_fit = max(2.0 * float(np.max(np.abs(volume.spacing_mm))), 1.0) / _FWHM_PER_SIGMA
        psf_fwhm, psf_source = _FWHM_PER_SIGMA * sigma_fit, "fallback (two voxels): the body edge profile could not be fitted"
    # ---- cold chambers from the image
    noise_sd = _uniform_noise_sd(volume, face, rot, free_z, radius_fit, psf_fwhm)
    chambers, identity, ch_warn = _find_chambers(
        volume, template, face, rot, level_fit, radius_fit, sigma_fit, pix, spillover_voi_mm, noise_sd, overrides
    )
    warnings += ch_warn
    # ---- rod section: the far end of the rods
    rod_end = _rod_far_end(volume, template, face, rot, solid_len, pix)
    fits: dict[str, InsertFit] = {}
    for ins in template.inserts:
        pred = rot @ np.asarray(ins.centre_mm, float) + t
        c = overrides.get(ins.name)
        ch = next((x for x in chambers if x.name == ins.name), None)
        if c is not None:
            fits[ins.name] = InsertFit(ins.name, c, None, None, None, "override")
        elif ch is not None and ch.found:
            fits[ins.name] = InsertFit(ins.name, ch.centre_mm.copy(), ch.centre_mm.copy(), float(np.linalg.norm(ch.centre_mm - pred)), None, "image")
        else:
            fits[ins.name] = InsertFit(ins.name, pred, None, None, None, "template")
    smallest = min(r.diameter_mm for r in rods)
    if float(np.max(np.abs(volume.spacing_mm))) > smallest / 2:
        warnings.append(
            f"voxel size {float(np.max(np.abs(volume.spacing_mm))):.2f} mm is coarse for the {smallest:g} mm rod "
            f"(more than half its diameter); its recovery is measured but poorly sampled"
        )
    return SmallAnimalPlacement(
        template, rot, t, bg, body.noise_sd, fits, score, warnings,
        body_radius_mm=radius_fit, psf_fwhm_mm=psf_fwhm, psf_source=psf_source, uniform_level_bq_ml=level_fit,
        chambers=chambers, chamber_identity=identity,
        rod_section_z_mm=None if rod_end is None else (rod_end, 0.0),
    )


_FWHM_PER_SIGMA = 2.0 * math.sqrt(2.0 * math.log(2.0))


def _template_free_span(template: Template) -> float:
    """Template-frame z (from the face at z = 0) of the nearest cold-chamber end: the free part
    of the uniform region runs from 0 to here."""
    ends = [float(c.centre_mm[2]) - float(c.length_mm) / 2 - c.wall_mm for c in template.chambers]
    z_hi = template.body.z_range_mm[1]
    return float(min(ends)) if ends else float(z_hi)


def blurred_disc(rho_mm: np.ndarray, level: float, radius_mm: float, sigma_mm: float) -> np.ndarray:
    """A uniform disc of ``radius_mm`` and value ``level`` blurred by an isotropic 2-D Gaussian
    of ``sigma_mm``, at distance ``rho_mm`` from its centre: ``level * P(|X| <= R)`` with
    ``X ~ N(rho, sigma^2 I)``, i.e. ``ncx2.cdf(R^2/s^2, 2, rho^2/s^2)`` (the non-central
    chi-square distribution of scipy.stats)."""
    from scipy.special import chndtr  # the non-central chi-square CDF (as scipy.stats.ncx2.cdf)

    s = max(float(sigma_mm), 1e-6)
    return level * chndtr((radius_mm / s) ** 2, 2, (np.asarray(rho_mm, float) / s) ** 2)


def _slab_mean(volume: Volume, origin: np.ndarray, rot: np.ndarray, zs: np.ndarray, X: np.ndarray, Y: np.ndarray) -> np.ndarray:
    """Mean over template-frame planes ``zs`` of the image at template (X, Y); NaN where no plane
    has a sample inside the image."""
    ex, ey, ez = rot[:, 0], rot[:, 1], rot[:, 2]
    acc = np.zeros(X.shape)
    n = np.zeros(X.shape)
    plane = origin + X[..., None] * ex + Y[..., None] * ey
    for z in np.atleast_1d(zs):  # a loop over planes, not voxels
        vals = sample_world(volume, plane + float(z) * ez)
        ok = np.isfinite(vals)
        acc += np.where(ok, vals, 0.0)
        n += ok
    with np.errstate(invalid="ignore", divide="ignore"):
        return np.where(n > 0, acc / np.maximum(n, 1), np.nan)


def _fit_disc_edge(volume: Volume, origin: np.ndarray, rot: np.ndarray, zs: np.ndarray, r_guess: float, level_guess: float,
                   pix: float) -> tuple[float, float, float] | None:
    """(level, radius, sigma) of the blurred uniform disc that best fits the angle-averaged radial
    profile of the planes ``zs`` (template frame) around the axis; None when it cannot be fitted."""
    from scipy.optimize import least_squares

    dr = min(0.25, pix / 2)
    r = np.arange(max(0.0, r_guess - 8.0), r_guess + 8.0 + dr / 2, dr)
    th = np.deg2rad(np.arange(0.0, 360.0, 2.0))
    R, T = np.meshgrid(r, th, indexing="ij")
    prof_planes = _slab_mean(volume, origin, rot, zs, R * np.cos(T), R * np.sin(T))
    ok = np.isfinite(prof_planes)
    keep = ok.mean(axis=1) > 0.5
    if keep.sum() < 10:
        return None
    prof = np.where(ok, prof_planes, 0.0).sum(axis=1)[keep] / ok.sum(axis=1)[keep]
    rr = r[keep]

    def resid(p: np.ndarray) -> np.ndarray:
        return (blurred_disc(rr, p[0], p[1], p[2]) - prof) / max(level_guess, 1e-12)

    try:
        fit = least_squares(resid, x0=[level_guess, r_guess, max(1.0, pix)],
                            bounds=([0.0, 0.5 * r_guess, 0.05], [np.inf, 1.5 * r_guess, r_guess / 2]))
    except (ValueError, np.linalg.LinAlgError):  # pragma: no cover - degenerate profile
        return None
    level, radius, sigma = (float(x) for x in fit.x)
    rms = float(np.sqrt(np.mean(fit.fun**2)))
    if not fit.success or rms > 0.1 or sigma >= 0.49 * r_guess or abs(radius / r_guess - 1) > 0.3 or level <= 0:
        return None
    return level, radius, sigma


def _uniform_noise_sd(volume: Volume, face: np.ndarray, rot: np.ndarray, free_z: float, body_r: float, fwhm: float) -> float:
    """Voxel SD in a cylinder in the middle of the free part of the uniform region (0 when it
    holds fewer than two voxels)."""
    from .rois import cylinder_weights

    length = max(free_z - 2 * fwhm, min(free_z / 2, 2.0))
    try:
        roi = cylinder_weights(volume, face + rot[:, 2] * (free_z / 2), rot[:, 2], 1.5 * max(body_r - fwhm, body_r / 2), length)
    except PhantomNotFound:
        return 0.0
    vals = volume.data[roi.box][roi.weights >= 0.5]
    return float(vals.std(ddof=1)) if vals.size > 1 else 0.0


def _is_air(ins: Insert) -> bool:
    """A chamber the template says holds air (its name or note has the word ``air``)."""
    words = f"{ins.name} {ins.note or ''}".lower().replace("_", " ").replace("-", " ").split()
    return "air" in words


@dataclass
class _DeficitMap:
    """The cold chambers alone: the blurred body disc minus the image, averaged over the planes
    through the chambers' middle, on a template-frame grid (X, Y) of ``pixel_mm``."""

    X: np.ndarray
    Y: np.ndarray
    D: np.ndarray
    pixel_mm: float
    z_range_mm: tuple[float, float]

    def own_cell(self, cands: list[np.ndarray], i: int) -> np.ndarray:
        """Grid points nearer candidate ``i`` than any other candidate."""
        dist = np.hypot(self.X - cands[i][0], self.Y - cands[i][1])
        own = np.ones(self.X.shape, bool)
        for j, o in enumerate(cands):
            if j != i:
                own &= dist < np.hypot(self.X - o[0], self.Y - o[1])
        return own


def _deficit_map(volume: Volume, chambers: list[Insert], face: np.ndarray, rot: np.ndarray, level: float, body_r: float,
                 sigma: float, pix: float) -> _DeficitMap:
    """:class:`_DeficitMap` over the central half of the chambers' length (template z)."""
    fwhm = _FWHM_PER_SIGMA * sigma
    z_lo = max(float(c.centre_mm[2]) - float(c.length_mm) / 4 for c in chambers)
    z_hi = min(float(c.centre_mm[2]) + float(c.length_mm) / 4 for c in chambers)
    if z_hi < z_lo:
        z_lo = z_hi = float(np.mean([c.centre_mm[2] for c in chambers]))
    p = min(0.25, pix / 2)
    half = body_r + 2 * fwhm + 2.0
    xs = np.arange(-half, half + p / 2, p)
    X, Y = np.meshgrid(xs, xs)
    A = _slab_mean(volume, face, rot, np.arange(z_lo, z_hi + 1e-9, max(0.5, pix)), X, Y)
    D = np.where(np.isfinite(A), blurred_disc(np.hypot(X, Y), level, body_r, sigma) - A, 0.0)
    return _DeficitMap(X, Y, D, p, (z_lo, z_hi))


def _chamber_candidates(dm: _DeficitMap, n: int, r_out: float, fwhm: float, level: float, body_r: float) -> list[np.ndarray]:
    """Up to ``n`` chamber axes (template x, y): maxima of the smoothed deficit inside the body,
    at least two cold radii apart, each refined by an iterated deficit centroid in a window of
    the chamber's size (within its own cell)."""
    X, Y, p = dm.X, dm.Y, dm.pixel_mm
    Ds = ndimage.gaussian_filter(dm.D, max(r_out / 2, fwhm / 2) / p, mode="constant")
    avail = np.hypot(X, Y) <= body_r
    cands: list[np.ndarray] = []
    for _ in range(n):
        m = np.where(avail, Ds, -np.inf)
        k = np.unravel_index(int(np.argmax(m)), m.shape)
        if not m[k] > 0.1 * level:
            break
        cands.append(np.array([X[k], Y[k]]))
        avail &= np.hypot(X - X[k], Y - Y[k]) > 2 * r_out
    win = r_out + 0.5 * fwhm
    for _ in range(30):
        moved = 0.0
        for i, c in enumerate(cands):
            dist = np.hypot(X - c[0], Y - c[1])
            w = np.clip((win - dist) / p + 0.5, 0.0, 1.0) * dm.own_cell(cands, i) * dm.D
            tot = float(w.sum())
            if tot <= 0:
                continue
            new = np.array([float((w * X).sum()) / tot, float((w * Y).sum()) / tot])
            moved = max(moved, float(np.linalg.norm(new - c)))
            cands[i] = new
        if moved < 0.002:
            break
    return cands


def _chamber_voi_centre(face: np.ndarray, rot: np.ndarray, ch: Insert, xy: np.ndarray, end: float | None) -> tuple[np.ndarray, tuple[float, float] | None]:
    """World centre of a chamber's spill-over VOI (half-way along its interior from the end
    found, or at the template's depth) and the interior's template z range (None: end not seen)."""
    if end is None:
        z_mid, inner = float(ch.centre_mm[2]), None
    else:
        z0 = end + ch.wall_mm
        inner = (z0, z0 + float(ch.length_mm))
        z_mid = z0 + float(ch.length_mm) / 2
    return face + rot @ np.array([xy[0], xy[1], z_mid]), inner


def _identify_chambers(template: Template, found: list[dict[str, Any]], level: float) -> tuple[tuple[int, ...], str, list[str]]:
    """Which template chamber each found one is: (found i -> chamber index, rule, warnings).

    By the template's arrangement when every found chamber lies within its inner radius of its
    template place (the nearest assignment); otherwise, for one air and one water chamber, by
    level (the colder is air) when the levels differ by at least
    :data:`CHAMBER_LEVEL_DIFFERENCE` of the uniform level and 3 standard errors; otherwise
    undetermined (the nearest assignment, flagged).
    """
    import itertools

    chambers = template.chambers
    tpl_xy = [np.asarray(c.centre_mm[:2], float) for c in chambers]
    n = min(len(found), len(chambers))
    best: tuple[float, tuple[int, ...]] = (np.inf, tuple(range(n)))
    for perm in itertools.permutations(range(len(chambers)), n):
        cost = sum(float(np.linalg.norm(found[i]["xy"] - tpl_xy[perm[i]])) for i in range(n))
        if cost < best[0]:
            best = (cost, perm)
    perm = best[1]
    offsets = [float(np.linalg.norm(found[i]["xy"] - tpl_xy[perm[i]])) for i in range(n)]
    if all(offsets[i] <= chambers[perm[i]].diameter_mm / 2 for i in range(n)):
        return perm, "arrangement", []
    where = f"the cold chambers are not where template {template.name} places them relative to the rods ({', '.join(f'{o:.1f}' for o in offsets)} mm away)"
    air = [k for k, c in enumerate(chambers) if _is_air(c)]
    if n == len(chambers) == 2 and len(air) == 1 and all(f["mean"] is not None for f in found[:2]):
        diff = found[0]["mean"] - found[1]["mean"]
        threshold = max(CHAMBER_LEVEL_DIFFERENCE * level, 3.0 * math.hypot(found[0]["se"], found[1]["se"]))
        if abs(diff) >= threshold:
            a, w = air[0], 1 - air[0]
            colder, warmer = sorted((found[0]["mean"], found[1]["mean"]))
            return ((a, w) if diff < 0 else (w, a)), "level", [
                f"WARNING: {where}; water and air were told apart by their level: the colder one ({colder / level:.3f} of the "
                f"uniform level against {warmer / level:.3f}) is taken as {chambers[a].name} (air holds no water for activity and "
                "scatter to reach; common practice)"
            ]
        return perm, "undetermined", [
            f"WARNING: {where} and their levels agree within {abs(diff) / level:.3f} of the uniform level (less than "
            f"{threshold / level:.3f}): water cannot be told from air; the labels follow the nearest template place and the "
            "spill-over verdicts are withheld"
        ]
    return perm, "undetermined", [
        f"WARNING: {where} and cannot be told apart by level; the labels follow the nearest template place and the spill-over "
        "verdicts are withheld"
    ]


def _find_chambers(
    volume: Volume,
    template: Template,
    face: np.ndarray,
    rot: np.ndarray,
    level: float,
    body_r: float,
    sigma: float,
    pix: float,
    voi_mm: tuple[float, float] | None,
    noise_sd: float,
    overrides: dict[str, np.ndarray],
) -> tuple[list[ChamberFinding], str, list[str]]:
    """The cold chambers as the image shows them, identified as the template's chambers.

    Returns (findings in template order, identity rule used, warnings); see
    :func:`locate_small_animal`, step 6.
    """
    from .rois import cylinder_weights

    chambers = template.chambers
    tpl_xy = [np.asarray(c.centre_mm[:2], float) for c in chambers]
    if not chambers:
        return [], "template", []
    if all(c.name in overrides for c in chambers):
        out = []
        for c, txy in zip(chambers, tpl_xy):
            xy = (overrides[c.name] - face) @ rot[:, :2]
            out.append(ChamberFinding(c.name, True, overrides[c.name].copy(), xy, float(np.linalg.norm(xy - txy))))
        return out, "override", []
    fwhm = _FWHM_PER_SIGMA * sigma
    r_out = max(c.outer_diameter_mm for c in chambers) / 2
    r_in = min(c.diameter_mm for c in chambers) / 2
    dm = _deficit_map(volume, chambers, face, rot, level, body_r, sigma, pix)
    cands = _chamber_candidates(dm, len(chambers), r_out, fwhm, level, body_r)
    voi_d, voi_len = voi_mm if voi_mm is not None else (r_in, min(float(c.length_mm) for c in chambers) / 2)
    # noise of a VOI mean: the uniform region's voxel SD (an upper bound for a cold region) over
    # the number of resolution cells in the VOI
    se = noise_sd / math.sqrt(max(1.0, math.pi * (voi_d / 2) ** 2 * voi_len / max(fwhm, pix) ** 3))
    found: list[dict[str, Any]] = []
    for i, c in enumerate(cands):
        dist = np.hypot(dm.X - c[0], dm.Y - c[1])
        area = float(dm.D[(dist <= r_out + 2 * fwhm) & dm.own_cell(cands, i)].sum()) * dm.pixel_mm**2 / level
        end = _chamber_end(volume, face, rot, c, level, body_r, sigma, r_in, *dm.z_range_mm, _template_free_span(template), dm.pixel_mm)
        centre, _ = _chamber_voi_centre(face, rot, chambers[0], c, end)
        try:
            roi = cylinder_weights(volume, centre, rot[:, 2], voi_d, voi_len)
            vals = volume.data[roi.box][roi.weights >= 0.5]
        except PhantomNotFound:
            vals = np.array([])
        found.append(dict(xy=c, radius=math.sqrt(max(area, 0.0) / math.pi), depth=float(dm.D[dist <= max(r_out / 3, dm.pixel_mm)].mean()) / level,
                          end=end, mean=float(vals.mean()) if vals.size else None, se=se))
    perm, identity, warnings = _identify_chambers(template, found, level)
    if not found:
        identity = "template"
    by_chamber = {perm[i]: found[i] for i in range(min(len(found), len(chambers)))}
    out: list[ChamberFinding] = []
    for k, ch in enumerate(chambers):
        if ch.name in overrides:
            xy = (overrides[ch.name] - face) @ rot[:, :2]
            out.append(ChamberFinding(ch.name, True, overrides[ch.name].copy(), xy, float(np.linalg.norm(xy - tpl_xy[k]))))
            continue
        f = by_chamber.get(k)
        r_cold = ch.outer_diameter_mm / 2
        if f is None or f["depth"] < 0.5 or not 0.6 * r_cold <= f["radius"] <= 1.5 * r_cold:
            why = "no cold cylinder of its size" if f is None else (
                f"the coldest place left ({f['depth']:.2f} of the level deep, {2 * f['radius']:.1f} mm across) does not look like it")
            warnings.append(f"WARNING: cold chamber {ch.name} was not found in the image ({why}); its VOI sits where the template "
                            "places it and is not confirmed")
            out.append(ChamberFinding(ch.name, False, rot @ np.asarray(ch.centre_mm, float) + face, tpl_xy[k].copy(), 0.0,
                                      None if f is None else f["radius"], None if f is None else f["depth"]))
            continue
        centre, inner = _chamber_voi_centre(face, rot, ch, f["xy"], f["end"])
        off = float(np.linalg.norm(f["xy"] - tpl_xy[k]))
        if identity == "arrangement" and off > 1.0:
            warnings.append(f"cold chamber {ch.name} found {off:.1f} mm from where template {template.name} places it; its VOI follows the image")
        if f["end"] is None:
            warnings.append(f"the end of cold chamber {ch.name} towards the rods was not seen; its VOI sits at the template's depth")
        out.append(ChamberFinding(ch.name, True, centre, f["xy"].copy(), off, f["radius"], f["depth"], f["end"], inner, f["mean"]))
    warnings += _air_warmer_warning(template, out, identity, level, se)
    return out, identity, warnings


def _air_warmer_warning(template: Template, out: list[ChamberFinding], identity: str, level: float, se: float) -> list[str]:
    """A warning when the chamber the arrangement calls air reads clearly warmer than water."""
    air = [k for k, c in enumerate(template.chambers) if _is_air(c)]
    if identity != "arrangement" or len(air) != 1 or len(out) != 2:
        return []
    a, w = out[air[0]], out[1 - air[0]]
    if not (a.found and w.found and a.mean_bq_ml is not None and w.mean_bq_ml is not None):
        return []
    if a.mean_bq_ml - w.mean_bq_ml <= max(CHAMBER_LEVEL_DIFFERENCE * level, 3.0 * math.sqrt(2.0) * se):
        return []
    return [f"chamber {a.name} (air by the template's arrangement) reads warmer than {w.name} ({a.mean_bq_ml / level:.3f} against "
            f"{w.mean_bq_ml / level:.3f} of the uniform level); check which chamber holds water"]


#: Smallest difference of the two chambers' levels (fraction of the uniform level) that tells
#: water from air when the arrangement does not (phantometry's choice: published NU 4 results
#: differ by a few hundredths between water and air).
CHAMBER_LEVEL_DIFFERENCE = 0.01


def _chamber_end(volume: Volume, face: np.ndarray, rot: np.ndarray, xy: np.ndarray, level: float, body_r: float, sigma: float,
                 r_in: float, z_lo: float, z_hi: float, z_free: float, p: float) -> float | None:
    """Template-frame z where the deficit along a chamber's axis falls to half its plateau
    (the cold region's end towards the rods), or None."""
    zs = np.arange(max(0.5, z_free - 10.0), z_hi + 1e-9, p)
    # over the chamber's interior: the deficit's axial shape is the same at every radius inside
    # (a Gaussian blur is separable), and the wider disc averages more noise
    rr = np.sqrt(np.linspace(0.0, max(r_in, p) ** 2, 6))
    th = np.deg2rad(np.arange(0.0, 360.0, 20.0))
    R, T = np.meshgrid(rr, th, indexing="ij")
    X, Y = xy[0] + R * np.cos(T), xy[1] + R * np.sin(T)
    model = blurred_disc(np.hypot(X, Y), level, body_r, sigma)
    ex, ey, ez = rot[:, 0], rot[:, 1], rot[:, 2]
    pts = face + zs[:, None, None, None] * ez + X[..., None] * ex + Y[..., None] * ey
    vals = sample_world(volume, pts)
    deficit = np.nanmean(np.where(np.isfinite(vals), model - vals, np.nan).reshape(len(zs), -1), axis=1)
    plateau_sel = zs >= z_lo
    if not plateau_sel.any() or not np.isfinite(deficit).all():
        return None
    plateau = float(np.median(deficit[plateau_sel]))
    if plateau < 0.3 * level:
        return None
    half = 0.5 * plateau
    below = np.nonzero((deficit < half) & (zs < z_lo))[0]
    if len(below) == 0:
        return None
    i = int(below[-1])  # the last point below half before the plateau
    if i + 1 >= len(zs):
        return None
    d0, d1 = deficit[i], deficit[i + 1]
    z0 = float(zs[i] + (half - d0) / (d1 - d0) * (zs[i + 1] - zs[i])) if d1 != d0 else float(zs[i])
    return _fit_step(zs, deficit, z0, plateau, sigma, z_lo)


def _fit_step(zs: np.ndarray, values: np.ndarray, z0: float, plateau: float, sigma: float, z_hi: float) -> float:
    """Refine the position ``z0`` of a blurred step (0 below, ``plateau`` above) by a least-
    squares fit of ``plateau * Phi((z - z_end) / sigma)`` (the end of a long cylinder blurred by
    a Gaussian of ``sigma``, along its axis) over ``z0 - 3 sigma - 1`` to ``z_hi``; ``z0`` when
    the fit fails or moves it by more than ``2 sigma + 1`` mm."""
    from scipy.optimize import least_squares
    from scipy.special import ndtr

    s = max(float(sigma), 0.05)
    sel = (zs >= z0 - 3 * s - 1.0) & (zs <= z_hi)
    if sel.sum() < 4:
        return z0
    z, y = zs[sel], values[sel]

    def resid(q: np.ndarray) -> np.ndarray:
        return (q[1] * ndtr((z - q[0]) / s) - y) / max(plateau, 1e-12)

    try:
        fit = least_squares(resid, x0=[z0, plateau])
    except (ValueError, np.linalg.LinAlgError):  # pragma: no cover - degenerate profile
        return z0
    z_end = float(fit.x[0])
    return z_end if fit.success and abs(z_end - z0) <= 2 * s + 1.0 else z0


def _rod_far_end(volume: Volume, template: Template, face: np.ndarray, rot: np.ndarray, solid_len: float, pix: float) -> float | None:
    """Template-frame z of the rods' far end (where the largest rod's axial profile falls to half
    its plateau), or None."""
    rod = max(template.rods, key=lambda r: r.diameter_mm)
    p = min(0.25, pix / 2)
    zs = np.arange(-(solid_len + 10.0), -2.0 + 1e-9, p)
    rr = np.linspace(0.0, rod.diameter_mm / 4, 3)
    th = np.deg2rad(np.arange(0.0, 360.0, 45.0))
    R, T = np.meshgrid(rr, th, indexing="ij")
    X, Y = rod.centre_mm[0] + R * np.cos(T), rod.centre_mm[1] + R * np.sin(T)
    pts = face + zs[:, None, None, None] * rot[:, 2] + X[..., None] * rot[:, 0] + Y[..., None] * rot[:, 1]
    prof = np.nan_to_num(sample_world(volume, pts), nan=0.0).reshape(len(zs), -1).mean(axis=1)
    sel = (zs >= -0.75 * solid_len) & (zs <= -0.25 * solid_len)
    plateau = float(np.median(prof[sel]))
    if not plateau > 0:
        return None
    half = 0.5 * plateau
    below = np.nonzero((prof < half) & (zs < -0.5 * solid_len))[0]
    if len(below) == 0:
        return None
    i = int(below[-1])
    if i + 1 >= len(zs):
        return None
    a, b = prof[i], prof[i + 1]
    return float(zs[i] + (half - a) / (b - a) * (zs[i + 1] - zs[i])) if b != a else float(zs[i])


def _axial_profile(volume: Volume, point: np.ndarray, d: np.ndarray, s: np.ndarray, radius: float) -> np.ndarray:
    """Mean over a disc of ``radius`` perpendicular to ``d`` at each position ``point + s d``."""
    u, v = _orthonormal_basis(d)
    rr = np.linspace(0, radius, 6)
    th = np.deg2rad(np.arange(0, 360, 20.0))
    R, T = np.meshgrid(rr, th, indexing="ij")
    disc = (R * np.cos(T))[..., None] * u + (R * np.sin(T))[..., None] * v
    vals = sample_world(volume, point + np.asarray(s, float)[:, None, None, None] * d + disc[None])
    return np.nan_to_num(vals, nan=0.0).mean(axis=(1, 2))


def _refine_cylinder_axis(volume: Volume, face: np.ndarray, d: np.ndarray, z_from: float, z_to: float, body_r: float, bg: float, where: str,
                          fraction: float = 0.5) -> tuple[np.ndarray, np.ndarray]:
    """Line through the centroids of the filled body cross-sections (above ``fraction`` of
    ``bg``) between ``z_from`` and ``z_to`` mm along ``d`` from ``face``; returns (a point on
    the axis at the face, direction)."""
    from .rois import sample_plane

    u, v = _orthonormal_basis(d)
    pix = float(np.min(np.abs(volume.spacing_mm)))
    pts = []
    for z in np.arange(z_from, z_to + 1e-9, max(1.0, pix)):
        plane = sample_plane(volume, face + z * d, u, v, body_r + 4 * pix, pixel_mm=pix)
        mask = ndimage.binary_fill_holes(np.nan_to_num(plane.values) > fraction * bg)
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
    edge_z_mm: tuple[float, float] | None = None,
) -> "GenericPlacement":
    """Find a user-defined phantom (cylindrical or body-shaped, inserts anywhere).

    Method (phantometry's own): body and axis as for the small-animal phantom (coarse slice
    centroids, then a line through the centroids of the filled cross-sections on the full
    image); the body centre along the axis from the two ends of the axial profile; then the
    rotation about the axis and the lying direction by correlating the image with the
    template's expected concentrations on a cylindrical grid (z, r, theta), by FFT along theta,
    for both directions; finally each insert with enough signal is refined by a signed centroid
    and a weighted Kabsch fit when at least three inserts qualify.

    Last, for a cylindrical body, the radius and the point-response width are fitted to the
    angle-averaged radial profile of its edge over ``edge_z_mm`` (template frame; a uniform
    part, e.g. the reference VOI's range) by the blurred-disc model, and the body's length is
    taken from where its axial profile crosses half the background.

    Parameters
    ----------
    concentrations : dict insert name -> expected Bq/mL (from the fill record).
    edge_z_mm : template-frame z range where the body edge is fitted (default: 10 mm about the
        body's middle).
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
        raise PhantomNotFound(size_mismatch_message(where, body.extent_mm, template, edges=image_edges_reached(body)))
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
    length_found = float(s[high[-1]] - s[high[0]])
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
    # what the image shows of the body: its length along the axis, and for a cylinder its
    # radius and the point-response width from the blurred edge (reference part of the body)
    z_mid = float(body_centre_t[2])
    found_z = (z_mid - length_found / 2, z_mid + length_found / 2)
    radius = psf = None
    psf_source = "not measured (the body is not a cylinder)"
    if body_t.shape == "cylinder":
        origin = rot @ np.array([*body_t.centre_xy_mm, 0.0]) + t
        z_lo, z_hi = edge_z_mm if edge_z_mm is not None else (z_mid - 5.0, z_mid + 5.0)
        edge = _fit_disc_edge(volume, origin, rot, np.linspace(z_lo, z_hi, 5), body_r, bg, float(np.min(np.abs(volume.spacing_mm))))
        if edge is not None:
            radius, psf, psf_source = edge[1], _FWHM_PER_SIGMA * edge[2], "body edge"
        else:
            psf_source = "not measured (the body edge profile could not be fitted)"
    return GenericPlacement(template, rot, t, bg, body.noise_sd, fits, score, [], body_radius_mm=radius, psf_fwhm_mm=psf,
                            psf_source=psf_source, body_z_range_mm=found_z)


@dataclass
class GenericPlacement(Placement):
    """Placement of a user-defined phantom with what the image showed of its body.

    Attributes
    ----------
    body_radius_mm : radius of a cylindrical body from its blurred edge (None otherwise).
    psf_fwhm_mm : FWHM of the point response from the same edge (None when not measured).
    psf_source : how the point response was found, or why not.
    body_z_range_mm : template-frame z range of the body found along the axis (where the
        mean over a disc of half the body radius crosses half the background level).
    """

    body_radius_mm: float | None = None
    psf_fwhm_mm: float | None = None
    psf_source: str = "not measured"
    body_z_range_mm: tuple[float, float] | None = None

    def as_dict(self) -> dict[str, Any]:
        out = super().as_dict()
        out["body_found"] = {
            "radius_mm": None if self.body_radius_mm is None else round(self.body_radius_mm, 3),
            "z_range_mm": None if self.body_z_range_mm is None else [round(float(v), 3) for v in self.body_z_range_mm],
            "psf_fwhm_mm": None if self.psf_fwhm_mm is None else round(self.psf_fwhm_mm, 3),
            "psf_source": self.psf_source,
        }
        return out


def expected_concentration(template: Template, points_template_mm: np.ndarray, concentrations: dict[str, float], background: float) -> np.ndarray:
    """The concentration a template and fill predict at template-frame points (Bq/mL; point
    samples of the body and every insert, painted in the synthesizer's order)."""
    return _template_value_at(template, np.asarray(points_template_mm, float), concentrations, background)
