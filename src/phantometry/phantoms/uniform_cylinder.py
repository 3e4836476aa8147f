"""Uniform cylinder (analysis kind ``uniform_cylinder``): activity calibration and uniformity.

The check sites run most often after the daily detector check: a cylinder filled with one
known concentration (a solution measured in the dose calibrator, or a sealed cylinder of
calibrated activity) verifies the scanner's activity calibration (measured / true) and the
axial and transverse uniformity that normalisation, attenuation and scatter corrections must
deliver (IAEA Human Health Series No. 1, Quality Assurance for PET and PET/CT Systems, 2009;
AAPM Report No. 126, 2019; the calibration QC of the EANM guideline v2.0, Boellaard et al.,
Eur J Nucl Med Mol Imaging 2015;42:328-354; all recalled: the metrics below are phantometry's
own definitions of the quantities those describe).

Geometry, from the image (phantometry's own method)
---------------------------------------------------
1. **Body.** :func:`phantometry.locate.find_body` (Otsu threshold on a block-mean copy, the
   largest connected part). Its principal extents must fit the template's size ranges, and
   it must look round: its central image slices (area / (pi r_max^2) >= :data:`MIN_ROUNDNESS`,
   r_max the farthest block from the slice's centroid), or else two of its three principal
   extents within 10 % (a short tilted cylinder's slices are clipped by its ends). A body
   phantom's D shape is neither.
2. **Axis and diameter.** First guesses of the axis: a line through the centroids of the
   body's coarse image slices, and the mask's three principal axes; the one whose
   cross-sections (below) are the most circular is kept. Then, on
   the full image, up to 24 cross-sections perpendicular to the axis (each the mean of three
   planes one voxel apart, kept :data:`SECTION_END_CLEARANCE_MM` from the ends) are sampled
   along :data:`N_RAYS` radial rays; on each ray the edge is where the profile crosses half
   way between the level 12-25 mm inside and the level 12-25 mm outside the edge (for a
   blurred edge of radius much larger than the blur, the half-level point is the true edge);
   a least-squares (Kasa) circle fit, with one pass of outlier rejection, gives each
   section's centre and radius. A line through the section centres is the new axis
   (any tilt); three rounds. The diameter is twice the mean section radius, corrected for
   the curvature of the blurred edge (the half-level contour of a disc blurred by a Gaussian
   of SD ``sigma`` lies ``sigma^2 / 2R`` inside its edge, to first order; ``sigma`` from the
   measured edge width below); its uncertainty the standard error over the sections.
3. **Length and centre** from the axial profile (mean over a disc of 0.6 radius): each end
   where the profile crosses half way between the levels 12-25 mm inside and outside it.
   An end that reaches the image's first or last slice (a cylinder longer than the axial
   field of view) is taken at that slice, flagged, and the length is then the visible part.
4. **Sanity.** Measured sizes outside ``diameter_range_mm`` / ``length_range_mm`` (by more
   than :data:`RANGE_TOLERANCE` of the limit), sections
   that are not circles (RMS departure above :data:`MAX_CIRCLE_RMS_FRACTION` of the radius or
   :data:`MAX_CIRCLE_RMS_MM`), or an interior holding hot or cold structures (more than
   :data:`MAX_NONUNIFORM_FRACTION` of its coarse blocks, averaged over 12 mm, beyond +-35 % of
   the median or four robust SDs, whichever is larger) are
   refused, naming the template that fits (:func:`phantometry.phantoms.suggest_template`).
   The edge's 10-90 % width, converted to a Gaussian FWHM (x 0.9188), is reported; a margin
   less than twice it warns.

Analysis volume and metrics
---------------------------
A cylinder on the measured axis, ``wall_margin_mm`` inside the wall and ``end_margin_mm``
inside each end (template options; 20 mm by default, common practice, more than twice the
point-response FWHM of clinical scanners). Voxels count when their centre lies inside a
region. Slices are bins of one slice spacing along the axis (for an untilted cylinder exactly
the image's slices); bins with fewer than half the typical voxel count (the ends of a tilted
volume) are left out.

* ``uniform_volume``: ``mean_bq_ml``; ``activity_recovery`` = mean / true (fill record,
  decay-corrected to the image reference time); ``calibration_error_pct`` =
  (recovery - 1) x 100; ``voxel_cv_pct`` = voxel SD / mean x 100 (sample SD); ``diameter_mm``,
  ``length_mm`` as measured; ``mean_suv`` (the mean of the SUV values the scanner stored) when
  the series was stored as body-weight SUV (DICOM Units GML).
* ``axial_profile``: ``max_deviation_pct`` = max_k |m_k - m| / m x 100 over the slice means
  ``m_k`` (``m`` the volume mean); ``slice_mean_cv_pct`` = SD(m_k) / mean(m_k) x 100.
* ``transverse``: ``radial_nonuniformity_pct`` = (mean of the central disc r <= R_a / 3 -
  mean of the outer ring 2 R_a / 3 < r <= R_a) / m x 100 (R_a the analysis radius; negative
  means a low centre, cupping); ``sector_max_deviation_pct`` = max_i |s_i - m| / m x 100 over
  ``sectors`` equal sectors of the analysis disc (default eight), each sector's mean over all
  slices (so averaged over the slices). Sector 1 starts at the image's +x direction (projected
  on the cross-section) and they run towards +y.

Closed forms for the synthesizer's imperfections (:mod:`phantometry.synth`, noise-free):
a gain ``k`` gives ``activity_recovery = k``; one slice with gain ``1 + a`` among ``N``
untilted slices gives ``max_deviation_pct = 100 a (1 - 1/N) / (1 + a/N)``; a radial gain
``1 + c (r/R)^2`` (``R`` the cylinder radius, ``rho = R_a / R``) gives
``radial_nonuniformity_pct = -100 (2/3) c rho^2 / (1 + c rho^2 / 2)`` (area means of ``r^2``:
``a^2 / 2`` over a disc of radius ``a``, ``(b_1^2 + b_2^2) / 2`` over a ring).

Uncertainties (image noise only; :mod:`phantometry.noise`)
----------------------------------------------------------
The noise model is estimated inside the analysis volume (:func:`phantometry.noise.estimate_noise`
with the measured cylinder as the body, clearance = the smaller margin). Every region is a
prism (a 2-D mask, taken on the image slice through the centre, times the slices), so the
variance of a region mean is ``(L/b)^p sum_tau C(tau) A(tau_yx) N(tau_z) / n^2`` with ``A`` the
in-plane overlap of the masks (FFT) and ``N(t) = n_z - |t|`` (exact for an untilted cylinder;
for a tilted one the slices' in-plane shift is neglected). Covariances between regions the
same way. ``mean_bq_ml``, ``activity_recovery``, ``calibration_error_pct``, ``mean_suv``,
``radial_nonuniformity_pct`` follow by first-order propagation (GUM); ``voxel_cv_pct`` from
``var(s^2) = 2 sum C^2 / n^2`` (Gaussian noise) and ``u(mean)``. The maxima and the SD of the
slice and sector means are propagated by Monte Carlo (JCGM 101:2008): the vector of means is
drawn from a normal law with the computed covariance about a noise-free estimate of the means,
and the SD of the metric over :data:`MC_DRAWS` draws is its standard uncertainty. The estimate
is the measured means with each deviation ``d_k`` from their mean soft-thresholded at
``u_k sqrt(2 ln n)`` (``u_k`` its standard uncertainty, ``n`` the number of means; the universal
threshold of Donoho and Johnstone, Biometrika 1994;81:425-455, recalled), so pure noise is not
taken for structure while a real artefact is kept.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any, Callable, Sequence

import numpy as np
from pydantic import Field, model_validator
from scipy import fft as sfft

from ..errors import PhantometryError, PhantomNotFound, TemplateError
from ..fill import FillRecord
from ..locate import Placement, find_body, sample_world
from ..rois import sample_plane
from ..templates import CylinderBody, Template, Vec2
from ..volume import Volume
from .base import (
    Analysis,
    AnalysisSettings,
    Chart,
    ComparedSetting,
    KindOptions,
    Overlay,
    PhantomKind,
    ResultGrid,
    RoiSetCheck,
    RowBuilder,
    Shape,
    SummaryTable,
    View,
    display_window,
    series_phrase,
    calibration_warning,
    check_scan_time,
    fmt_number,
)

#: Rays per cross-section of the diameter and axis fit.
N_RAYS = 90
#: Cross-sections of the axis fit keep at least this distance (mm) from the body's ends.
SECTION_END_CLEARANCE_MM = 20.0
#: Smallest area / (pi r_max^2) of a central coarse cross-section (r_max: the farthest block
#: centre from the centroid; about 1 for a disc, a little more on a coarse grid; a body
#: phantom's D shape gives about 0.75).
MIN_ROUNDNESS = 0.85
#: Largest RMS departure of a cross-section's edge from its fitted circle: this fraction of the
#: radius, or :data:`MAX_CIRCLE_RMS_MM`, whichever is larger.
MAX_CIRCLE_RMS_FRACTION = 0.03
MAX_CIRCLE_RMS_MM = 3.0
#: Largest fraction of the interior's (smoothed) coarse blocks departing from its median.
MAX_NONUNIFORM_FRACTION = 0.02
#: Smallest departure from the median that counts (fraction), and the averaging length (mm)
#: of the coarse image for the content check.
CONTENT_DEPARTURE = 0.35
CONTENT_SMOOTH_MM = 12.0
#: Relative tolerance of the size ranges (a cylinder of exactly a limit's size is accepted).
RANGE_TOLERANCE = 0.02
#: Monte Carlo draws of the uncertainties of maxima and SDs of slice and sector means.
MC_DRAWS = 4000
#: FWHM of a Gaussian per its SD.
FWHM_PER_SIGMA = 2.0 * math.sqrt(2.0 * math.log(2.0))
#: Gaussian FWHM per 10-90 % width of a blurred edge: 2 sqrt(2 ln 2) / (2 x 1.28155).
FWHM_PER_EDGE_WIDTH = FWHM_PER_SIGMA / (2.0 * 1.2815515655446004)
#: ROI -> metrics of the analysis (stable names; the README's table). ``mean_suv`` only when
#: the series was stored as SUV.
ROWS = {
    "uniform_volume": ("mean_bq_ml", "activity_recovery", "calibration_error_pct", "voxel_cv_pct", "diameter_mm", "length_mm", "mean_suv"),
    "axial_profile": ("max_deviation_pct", "slice_mean_cv_pct"),
    "transverse": ("radial_nonuniformity_pct", "sector_max_deviation_pct"),
}


class Options(KindOptions):
    """Analysis options of the uniform cylinder (the template's ``analysis:`` block)."""

    diameter_range_mm: Vec2 = (100.0, 350.0)
    length_range_mm: Vec2 = (100.0, 300.0)
    wall_margin_mm: float = Field(default=20.0, gt=0)
    end_margin_mm: float = Field(default=20.0, gt=0)
    sectors: int = Field(default=8, ge=4, le=36)
    profile_tolerance_pct: float = Field(default=5.0, gt=0)

    @model_validator(mode="after")
    def _ranges(self) -> "Options":
        for key in ("diameter_range_mm", "length_range_mm"):
            lo, hi = getattr(self, key)
            if not (0 < lo < hi):
                raise ValueError(f"{key}: needs 0 < low < high, got [{lo:g}, {hi:g}]")
        return self


# ===================================================================================== geometry
@dataclass
class CylinderFit:
    """The cylinder as measured in the image (world mm).

    Attributes
    ----------
    centre_mm : centre of the cylinder (on its axis, half way between its ends).
    axis : unit vector of the axis, pointing towards increasing slice index.
    ex, ey : unit vectors across the axis (``ex`` the image's +x projected; ``ex x ey = axis``).
    diameter_mm, diameter_u_mm : diameter and its standard error over the cross-sections.
    length_mm : length (the visible part when an end is truncated).
    truncated : (low end, high end) reach the first or last image slice.
    circle_rms_mm : median RMS departure of the cross-sections' edges from their circles.
    edge_fwhm_mm : Gaussian FWHM equivalent of the wall edge's 10-90 % width (None if unmeasured).
    level_bq_ml : median level of the interior (Bq/mL).
    n_sections : cross-sections fitted.
    """

    centre_mm: np.ndarray
    axis: np.ndarray
    ex: np.ndarray
    ey: np.ndarray
    diameter_mm: float
    diameter_u_mm: float | None
    length_mm: float
    truncated: tuple[bool, bool]
    circle_rms_mm: float
    edge_fwhm_mm: float | None
    level_bq_ml: float
    n_sections: int

    @property
    def radius_mm(self) -> float:
        return 0.5 * self.diameter_mm

    @property
    def rotation(self) -> np.ndarray:
        """Columns ex, ey, axis: the cylinder frame in the world (``world = R p + centre``)."""
        return np.column_stack([self.ex, self.ey, self.axis])

    def tilt_deg(self, volume: Volume) -> float:
        """Angle (degrees) between the axis and the image's slice axis."""
        return math.degrees(math.acos(min(1.0, abs(float(self.axis @ volume.axes_world[0])))))

    def as_dict(self, volume: Volume) -> dict[str, Any]:
        return {
            "centre_mm": [round(float(v), 3) for v in self.centre_mm],
            "axis": [round(float(v), 6) for v in self.axis],
            "tilt_deg": round(self.tilt_deg(volume), 3),
            "diameter_mm": round(self.diameter_mm, 3),
            "diameter_standard_error_mm": None if self.diameter_u_mm is None else round(self.diameter_u_mm, 4),
            "length_mm": round(self.length_mm, 3),
            "truncated_ends": {"low": self.truncated[0], "high": self.truncated[1]},
            "circle_rms_mm": round(self.circle_rms_mm, 4),
            "edge_fwhm_mm": None if self.edge_fwhm_mm is None else round(self.edge_fwhm_mm, 3),
            "interior_level_bq_ml": round(self.level_bq_ml, 3),
            "cross_sections": self.n_sections,
        }


def _frame(axis: np.ndarray, volume: Volume) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """(axis, ex, ey): the axis turned towards increasing slice index, ``ex`` the image's column
    direction (+x) projected across it, ``ey = axis x ex``."""
    d = np.asarray(axis, float) / np.linalg.norm(axis)
    if d @ volume.axes_world[0] < 0:
        d = -d
    for ref in (volume.axes_world[2], volume.axes_world[1]):
        ex = ref - (ref @ d) * d
        if np.linalg.norm(ex) > 0.2:
            break
    ex = ex / np.linalg.norm(ex)
    return d, ex, np.cross(d, ex)


def _not_a_cylinder(where: str, reason: str, extent_mm: Sequence[float], template: Template, round_body: bool = False) -> PhantomNotFound:
    """The refusal of an object that is not a uniform cylinder, naming the template that fits
    (among those with a cylindrical body when the object is round)."""
    from . import suggest_template

    other = suggest_template(extent_mm, exclude=template.name,
                             accept=(lambda t: isinstance(t.body, CylinderBody)) if round_body else None)
    hint = f"; it looks like the {other} phantom: try --template {other}" if other else "; use the template for this phantom (phantometry templates list)"
    size = " x ".join(f"{e:.0f}" for e in sorted(extent_mm))
    return PhantomNotFound(f"{where}: the object found ({size} mm) is not a uniform cylinder for template {template.name}: {reason}{hint}")


def _roundness(volume: Volume, body) -> float:
    """Median over the central coarse slices of area / (pi r_max^2) (1 for a disc)."""
    mask = body.mask
    counts = mask.sum(axis=(1, 2))
    use = np.flatnonzero(counts >= max(3, 0.8 * counts.max()))
    sp = np.abs(volume.spacing_mm) * body.factors  # coarse spacing (z, y, x)
    out = []
    jj, ii = np.nonzero(np.ones(mask.shape[1:], bool))
    for k in use:  # a loop over coarse slices, not voxels
        m = mask[k].ravel()
        y, x = jj[m] * sp[1], ii[m] * sp[2]
        r = np.hypot(y - y.mean(), x - x.mean())
        r_max = max(float(r.max()), 1e-9)
        out.append(m.sum() * sp[1] * sp[2] / (math.pi * r_max**2))
    return float(np.median(out)) if out else 0.0


def _axis_candidates(volume: Volume, body) -> list[tuple[np.ndarray, np.ndarray, float, float]]:
    """First guesses (centre, axis, radius, half-length) from the coarse body mask: a line
    through the centroids of the image slices (right for a cylinder along the scanner axis),
    then the principal axes of the mask (the one of smallest spread is right for a short
    cylinder, of largest spread for a long one, at any tilt; when the spreads are alike any one
    may be). The cross-section fit chooses among them."""
    mask = body.mask
    f = np.asarray(body.factors, float)
    sp = np.abs(volume.spacing_mm) * f
    block = float(np.max(sp))
    pts = volume.index_to_world(np.argwhere(mask) * f + (f - 1) / 2.0)
    c = pts.mean(axis=0)
    dirs = []
    counts = mask.sum(axis=(1, 2))
    use = counts >= max(3, 0.8 * counts.max())
    if use.sum() >= 3:
        jj, ii = np.meshgrid(np.arange(mask.shape[1]), np.arange(mask.shape[2]), indexing="ij")
        cj = (mask * jj).sum(axis=(1, 2))[use] / counts[use]
        ci = (mask * ii).sum(axis=(1, 2))[use] / counts[use]
        cen = volume.index_to_world(np.c_[np.nonzero(use)[0], cj, ci] * f + (f - 1) / 2.0)
        _, _, vt = np.linalg.svd(cen - cen.mean(axis=0), full_matrices=False)
        dirs.append(vt[0] if abs(vt[0] @ volume.axes_world[0]) > 0.5 else volume.axes_world[0])
    else:
        dirs.append(volume.axes_world[0])
    _, evecs = np.linalg.eigh(np.cov((pts - c).T))
    for d in (evecs[:, 0], evecs[:, 2], evecs[:, 1]):  # the middle one matters when the spreads are alike (L ~ 0.87 D)
        if all(abs(float(d @ e)) < 0.99 for e in dirs):
            dirs.append(d)
    out = []
    for d in dirs:
        d = d / np.linalg.norm(d)
        proj = (pts - c) @ d
        radial = np.linalg.norm((pts - c) - proj[:, None] * d, axis=1)
        half = 0.5 * float(np.ptp(proj) + block)
        radius = float(np.percentile(radial, 99.5)) + 0.5 * block
        out.append((c + 0.5 * float(proj.max() + proj.min()) * d, d, radius, half))
    return out


def _kasa_circle(u: np.ndarray, v: np.ndarray) -> tuple[float, float, float]:
    """Least-squares circle through points (Kasa's algebraic fit): centre u, v and radius."""
    A = np.c_[u, v, np.ones_like(u)]
    sol, *_ = np.linalg.lstsq(A, u * u + v * v, rcond=None)
    cu, cv = 0.5 * sol[0], 0.5 * sol[1]
    return float(cu), float(cv), float(math.sqrt(max(sol[2] + cu * cu + cv * cv, 0.0)))


@dataclass
class _Sections:
    centre: np.ndarray
    axis: np.ndarray
    radius: float
    radius_se: float | None
    rms: float
    n: int
    edge_fwhm: float | None
    level: float


def _two_equal_extents(extent_mm: Sequence[float], tolerance: float = 0.1) -> bool:
    """Two of the three sorted principal extents agree within ``tolerance`` (a cylinder's do)."""
    e = sorted(float(v) for v in extent_mm)
    return min(e[1] / e[0], e[2] / e[1]) <= 1.0 + tolerance if e[0] > 0 else False


def _sections(volume: Volume, centre: np.ndarray, axis: np.ndarray, r_guess: float, half_len: float, where: str,
              not_round: Callable[[str], PhantomNotFound]) -> _Sections:
    """One round of the cross-section fit (module notes, step 2); ``not_round(reason)`` makes
    the error for an object without circular cross-sections."""
    d, ex, ey = _frame(axis, volume)
    pix = float(np.min(np.abs(volume.spacing_mm)))
    clear = min(SECTION_END_CLEARANCE_MM, 0.3 * half_len)
    span = max(half_len - clear, 1.0)
    s = np.linspace(-span, span, int(np.clip(2 * span // 8, 3, 24)))
    offs = np.array([-1.0, 0.0, 1.0]) * pix
    theta = (np.arange(N_RAYS) + 0.5) * 2 * np.pi / N_RAYS
    dr = max(0.25 * pix, 0.2)
    r = np.arange(max(0.3 * r_guess, r_guess - 40.0), r_guess + 30.0 + dr / 2, dr)
    dirs = np.cos(theta)[:, None] * ex + np.sin(theta)[:, None] * ey
    pts = (centre + (s[:, None] + offs[None, :])[:, :, None, None, None] * d
           + r[None, None, None, :, None] * dirs[None, None, :, None, :])
    prof = sample_world(volume, pts).mean(axis=1)  # (sections, rays, radii); NaN outside the image
    win_in = (r >= r_guess - 25.0) & (r <= r_guess - 12.0)
    if not win_in.any():
        win_in = r <= r_guess - 12.0
    win_out = (r >= r_guess + 12.0) & (r <= r_guess + 25.0)
    level_in = _finite_median(prof[:, :, win_in].reshape(len(s), -1))
    level_out = _finite_median(prof[:, :, win_out].reshape(len(s), -1))
    level_out = np.where(np.isfinite(level_out), level_out, 0.0)
    thr = 0.5 * (level_in + level_out)
    i0 = int(np.searchsorted(r, r_guess - 10.0))
    tail = prof[:, :, i0:]
    below = tail < thr[:, None, None]
    first = np.argmax(below | np.isnan(tail), axis=-1)
    # a ray that leaves the image before its edge: the object reaches the image's border
    starts = np.isfinite(tail[..., 0])
    outside = starts & np.isnan(np.take_along_axis(tail, first[..., None], axis=-1)[..., 0])
    if outside.sum() > 0.05 * max(int(starts.sum()), 1):
        raise PhantomNotFound(f"{where}: the cylinder reaches beyond the image's transverse field of view; "
                              "reconstruct a larger field of view or centre the phantom")
    valid = below.any(axis=-1) & (first > 0)
    idx = np.clip(i0 + first, 1, len(r) - 1)
    p1 = np.take_along_axis(prof, idx[..., None] - 1, axis=-1)[..., 0]
    p2 = np.take_along_axis(prof, idx[..., None], axis=-1)[..., 0]
    with np.errstate(invalid="ignore", divide="ignore"):
        frac = np.clip((p1 - thr[:, None]) / (p1 - p2), 0.0, 1.0)
    r_edge = r[idx - 1] + frac * dr
    valid &= np.isfinite(r_edge) & starts & ~outside
    centres, radii, rms = [], [], []
    for k in range(len(s)):  # a loop over cross-sections (at most 24), not voxels
        ok = valid[k]
        if ok.sum() < 0.5 * N_RAYS:
            continue
        u, v = r_edge[k, ok] * np.cos(theta[ok]), r_edge[k, ok] * np.sin(theta[ok])
        cu, cv, rad = _kasa_circle(u, v)
        res = np.hypot(u - cu, v - cv) - rad
        keep = np.abs(res - np.median(res)) <= max(4 * 1.4826 * np.median(np.abs(res - np.median(res))), 0.5)
        if keep.sum() >= 0.5 * N_RAYS:
            cu, cv, rad = _kasa_circle(u[keep], v[keep])
        res = np.hypot(u - cu, v - cv) - rad
        centres.append(centre + s[k] * d + cu * ex + cv * ey)
        radii.append(rad)
        rms.append(float(np.sqrt(np.mean(res**2))))
    if len(centres) < 3:
        raise not_round("no circular cross-section was found along its axis")
    pts_c = np.array(centres)
    c = pts_c.mean(axis=0)
    new_d = d
    if len(pts_c) >= 3 and np.ptp((pts_c - c) @ d) > 1.0:
        _, _, vt = np.linalg.svd(pts_c - c, full_matrices=False)
        new_d = vt[0] if vt[0] @ d > 0 else -vt[0]
    radii_a = np.array(radii)
    se = float(radii_a.std(ddof=1) / math.sqrt(len(radii_a))) if len(radii_a) > 1 else None
    fwhm = _edge_fwhm(prof, valid, r_edge, r, level_in, level_out)
    radius = float(radii_a.mean())
    if fwhm is not None:  # the half-level contour of a blurred disc lies sigma^2 / 2R inside its edge
        radius += (fwhm / FWHM_PER_SIGMA) ** 2 / (2 * radius)
    return _Sections(c, new_d / np.linalg.norm(new_d), radius, se, float(np.median(rms)), len(radii_a), fwhm, float(np.median(level_in)))


def _finite_median(rows: np.ndarray) -> np.ndarray:
    """Median of the finite values of each row (NaN for a row without any)."""
    out = np.full(rows.shape[0], np.nan)
    for k, row in enumerate(rows):  # a loop over cross-sections, not voxels
        row = row[np.isfinite(row)]
        if row.size:
            out[k] = float(np.median(row))
    return out


def _edge_fwhm(prof: np.ndarray, valid: np.ndarray, r_edge: np.ndarray, r: np.ndarray, level_in: np.ndarray, level_out: np.ndarray) -> float | None:
    """Gaussian FWHM equivalent of the mean normalised edge profile's 10-90 % width."""
    dr = float(r[1] - r[0])
    w = int(round(15.0 / dr))
    k, a = np.nonzero(valid)
    if k.size < 10:
        return None
    centre_idx = np.rint((r_edge[k, a] - r[0]) / dr).astype(int)
    offs = np.arange(-w, w + 1)
    idx = centre_idx[:, None] + offs[None, :]
    ok = (idx.min(axis=1) >= 0) & (idx.max(axis=1) < len(r))
    if ok.sum() < 10:
        return None
    vals = prof[k[ok][:, None], a[ok][:, None], idx[ok]]
    span = (level_in - level_out)[k[ok]][:, None]
    rel = (vals - level_out[k[ok]][:, None]) / np.where(span > 0, span, np.nan)
    good = np.isfinite(rel)
    if good.sum(axis=0).min() == 0:
        return None
    norm = np.where(good, rel, 0.0).sum(axis=0) / good.sum(axis=0)
    x = offs * dr

    def crossing(level: float) -> float | None:
        above = norm >= level
        j = np.flatnonzero(above[:-1] & ~above[1:])
        if j.size == 0:
            return None
        j = int(j[np.argmin(np.abs(x[j]))])
        return float(x[j] + (norm[j] - level) / (norm[j] - norm[j + 1]) * dr)

    x90, x10 = crossing(0.9), crossing(0.1)
    if x90 is None or x10 is None or x10 <= x90:
        return None
    return FWHM_PER_EDGE_WIDTH * (x10 - x90)


def _ends(volume: Volume, centre: np.ndarray, axis: np.ndarray, radius: float, half_guess: float, where: str) -> tuple[np.ndarray, float, tuple[bool, bool]]:
    """(centre, length, truncated ends) from the axial profile (module notes, step 3)."""
    d = axis
    _, ex, ey = _frame(d, volume)
    pix = float(np.min(np.abs(volume.spacing_mm)))
    step = max(0.25 * pix, 0.2)
    s = np.arange(-(half_guess + 40.0), half_guess + 40.0 + step / 2, step)
    rr = 0.6 * radius * np.sqrt(np.linspace(0.0, 1.0, 5))
    th = np.arange(16) * 2 * np.pi / 16
    disc = (rr[:, None, None] * (np.cos(th)[None, :, None] * ex + np.sin(th)[None, :, None] * ey)).reshape(-1, 3)
    vals = sample_world(volume, centre + s[:, None, None] * d + disc[None])
    good = np.isfinite(vals)
    n_good = good.sum(axis=1)
    with np.errstate(invalid="ignore", divide="ignore"):
        prof = np.where(n_good >= 0.5 * vals.shape[1], np.where(good, vals, 0.0).sum(axis=1) / n_good, np.nan)
    central = (np.abs(s) <= 0.3 * half_guess) & np.isfinite(prof)
    level = float(np.median(prof[central])) if central.any() else float("nan")
    if not (level > 0):
        raise PhantomNotFound(f"{where}: the cylinder's centre is not in the image")
    above = np.flatnonzero(prof > 0.5 * level)
    lo_i, hi_i = int(above[0]), int(above[-1])
    n12, n25 = int(round(12.0 / step)), int(round(25.0 / step))

    def end(i: int, sign: int) -> tuple[float, bool]:
        # sign -1: the low end (outside at lower s), +1: the high end
        inside = prof[np.clip(i - sign * np.arange(n12, n25 + 1), 0, len(s) - 1)]
        outside = prof[np.clip(i + sign * np.arange(n12, n25 + 1), 0, len(s) - 1)]
        inside, outside = inside[np.isfinite(inside)], outside[np.isfinite(outside)]
        beyond = i + sign
        truncated = not (0 <= beyond < len(s)) or not np.isfinite(prof[beyond]) or outside.size == 0 or inside.size == 0
        if truncated:
            return float(s[i]), True
        thr = 0.5 * (float(np.median(inside)) + float(np.median(outside)))
        window = np.arange(max(i - n12, 1), min(i + n12, len(s) - 1))
        a, b = (prof[window - 1], prof[window]) if sign < 0 else (prof[window], prof[window + 1])
        cross = window[(a < thr) & (b >= thr)] if sign < 0 else window[(a >= thr) & (b < thr)]
        if cross.size == 0:
            return float(s[i]), False
        j = int(cross[np.argmin(np.abs(cross - i))])
        if sign < 0:  # rising between j-1 and j
            return float(s[j - 1] + (thr - prof[j - 1]) / (prof[j] - prof[j - 1]) * step), False
        return float(s[j] + (prof[j] - thr) / (prof[j] - prof[j + 1]) * step), False

    s_lo, t_lo = end(lo_i, -1)
    s_hi, t_hi = end(hi_i, +1)
    return centre + 0.5 * (s_lo + s_hi) * d, s_hi - s_lo, (t_lo, t_hi)


def locate_cylinder(volume: Volume, template: Template, options: Options, where: str) -> CylinderFit:
    """Measure a uniform cylinder in the image (module notes, steps 1-4).

    Raises
    ------
    PhantomNotFound
        The object is not a uniform cylinder in the template's size ranges (naming the
        template that fits), or it reaches beyond the image across the axis.
    """
    d_lo, d_hi = options.diameter_range_mm
    body = find_body(volume, where, max(float(np.min(np.abs(volume.spacing_mm))), min(6.0, d_lo / 15)))
    extent = [float(e) for e in body.extent_mm]
    roundness = _roundness(volume, body)
    # round: the image slices' sections, or else two equal principal extents (a tilted short
    # cylinder's image slices are clipped by its ends); the circle fits below check again
    is_round = roundness >= MIN_ROUNDNESS or _two_equal_extents(extent)
    if KIND.size_mismatch(template, extent) is None:
        raise _not_a_cylinder(where, f"its size is outside the template's ranges (diameter {d_lo:g}-{d_hi:g} mm, length "
                                     f"{options.length_range_mm[0]:g}-{options.length_range_mm[1]:g} mm)", extent, template, is_round)
    if not is_round:
        raise _not_a_cylinder(where, f"its cross-section is not round (area / circumscribed circle {roundness:.2f} < {MIN_ROUNDNESS:g})",
                              extent, template)
    def not_round(reason: str) -> PhantomNotFound:
        return _not_a_cylinder(where, reason, extent, template)

    best: tuple[float, _Sections, float] | None = None
    first_error: PhantomNotFound | None = None
    for centre, axis, radius, half in _axis_candidates(volume, body):
        try:
            sec = _sections(volume, centre, axis, radius, half, where, not_round)
        except PhantomNotFound as exc:
            first_error = first_error or exc
            continue
        if best is None or sec.rms / sec.radius < best[0]:
            best = (sec.rms / sec.radius, sec, half)
    if best is None:
        assert first_error is not None
        raise first_error
    _, sec, half = best
    sec = _sections(volume, sec.centre, sec.axis, sec.radius, half, where, not_round)
    centre, axis, radius = sec.centre, sec.axis, sec.radius
    centre, length, truncated = _ends(volume, centre, axis, radius, half, where)
    sec = _sections(volume, centre, axis, radius, 0.5 * length, where, not_round)
    centre, axis, radius = sec.centre, sec.axis, sec.radius
    centre, length, truncated = _ends(volume, centre, axis, radius, 0.5 * length, where)
    axis, ex, ey = _frame(axis, volume)
    fit = CylinderFit(centre, axis, ex, ey, 2 * radius, None if sec.radius_se is None else 2 * sec.radius_se, length, truncated,
                      sec.rms, sec.edge_fwhm, sec.level, sec.n)
    limit = max(MAX_CIRCLE_RMS_FRACTION * radius, MAX_CIRCLE_RMS_MM)
    if fit.circle_rms_mm > limit:
        raise _not_a_cylinder(where, f"its cross-sections depart from a circle by {fit.circle_rms_mm:.1f} mm RMS (limit {limit:.1f} mm)",
                              extent, template)
    tol = 1.0 + RANGE_TOLERANCE
    if not (d_lo / tol <= fit.diameter_mm <= d_hi * tol):
        raise _not_a_cylinder(where, f"its diameter {fit.diameter_mm:.1f} mm is outside the template's range {d_lo:g}-{d_hi:g} mm",
                              extent, template, True)
    l_lo, l_hi = options.length_range_mm
    if fit.length_mm > l_hi * tol or (fit.length_mm < l_lo / tol and not any(truncated)):
        raise _not_a_cylinder(where, f"its length {fit.length_mm:.1f} mm is outside the template's range {l_lo:g}-{l_hi:g} mm",
                              extent, template, True)
    _check_uniform_content(volume, body, fit, options, where, extent, template)
    return fit


def _check_uniform_content(volume: Volume, body, fit: CylinderFit, options: Options, where: str, extent, template: Template) -> None:
    """Refuse an interior with hot or cold structures (module notes, step 4).

    The coarse image is averaged over about :data:`CONTENT_SMOOTH_MM` (noise would otherwise
    pass for structure); a block counts as departing when it is more than the larger of
    :data:`CONTENT_DEPARTURE` and four robust SDs (1.4826 x MAD) of the interior from the
    median.
    """
    from scipy import ndimage

    f = np.asarray(body.factors, float)
    sp = np.abs(volume.spacing_mm) * f
    block = float(np.max(sp))
    r_in = fit.radius_mm - max(options.wall_margin_mm, 2 * block)
    h_in = 0.5 * fit.length_mm - max(options.end_margin_mm, 2 * block)
    if r_in <= block or h_in <= block:
        return
    size = tuple(int(max(1, round(CONTENT_SMOOTH_MM / s))) for s in sp)
    smooth = ndimage.uniform_filter(np.nan_to_num(body.coarse.astype(np.float64)), size=size, mode="nearest")
    idx = np.argwhere(body.mask)
    p = (volume.index_to_world(idx * f + (f - 1) / 2.0) - fit.centre_mm) @ fit.rotation
    inside = (p[:, 0] ** 2 + p[:, 1] ** 2 <= r_in**2) & (np.abs(p[:, 2]) <= h_in)
    vals = smooth[tuple(idx[inside].T)]
    if vals.size < 20:
        return
    med = float(np.median(vals))
    if not med > 0:
        return
    rel = vals / med - 1.0
    limit = max(CONTENT_DEPARTURE, 4 * 1.4826 * float(np.median(np.abs(rel - np.median(rel)))))
    frac = float(np.mean(np.abs(rel) > limit))
    if frac > MAX_NONUNIFORM_FRACTION:
        raise _not_a_cylinder(where, f"it holds hot or cold structures ({100 * frac:.0f} % of its interior is more than "
                                     f"{100 * limit:.0f} % from the median level)", extent, template)


# ===================================================================================== regions
@dataclass
class _Regions:
    """Sums over the analysis regions (one pass over the analysis box, slab by slab)."""

    n: int
    mean: float
    sd: float
    slice_z_mm: np.ndarray
    slice_means: np.ndarray
    slice_counts: np.ndarray
    disc_mean: float
    ring_mean: float
    disc_count: int
    ring_count: int
    sector_means: np.ndarray
    sector_counts: np.ndarray
    radial_r_mm: np.ndarray
    radial_means: np.ndarray
    mean_suv: float | None
    suv_factor: float | None
    plane_masks: dict[str, np.ndarray]
    n_slices: int


def _analysis_box(volume: Volume, fit: CylinderFit, reach_r: float, half_len: float) -> tuple[slice, slice, slice]:
    """Array-order box (clipped to the image) holding a cylinder of radius ``reach_r`` and half-length ``half_len``."""
    corners = np.array([fit.centre_mm + a * reach_r * fit.ex + b * reach_r * fit.ey + c * half_len * fit.axis
                        for a in (-1, 1) for b in (-1, 1) for c in (-1, 1)])
    idx = volume.world_to_index(corners)
    shape = np.array(volume.shape)
    lo = np.floor(idx.min(axis=0)).astype(int) - 1
    hi = np.ceil(idx.max(axis=0)).astype(int) + 1
    return tuple(slice(int(max(a, 0)), int(min(b, n - 1)) + 1) for a, b, n in zip(lo, hi, shape))  # type: ignore[return-value]


def _measure_regions(volume: Volume, fit: CylinderFit, r_a: float, l_a: float, n_sectors: int, where: str) -> _Regions:
    """Every region sum of the analysis volume in one pass over its box, slab by slab."""
    dz = float(np.abs(volume.spacing_mm[0]))
    pix = float(np.min(np.abs(volume.spacing_mm[1:])))
    r_prof = fit.radius_mm + 15.0
    box = _analysis_box(volume, fit, r_prof, 0.5 * l_a)
    R = fit.rotation
    # bins of one slice spacing along the axis, centred on the image's slice planes when untilted
    k_c = float(volume.world_to_index(fit.centre_mm)[0])
    plane_c = volume.index_to_world(np.array([round(k_c), *volume.world_to_index(fit.centre_mm)[1:]]))
    z_ref = float((plane_c - fit.centre_mm) @ fit.axis)
    n_half = int(math.ceil(0.5 * l_a / dz)) + 2
    n_bins = 2 * n_half + 1
    n_rbins = int(math.ceil(r_prof / pix)) + 1
    acc = {k: np.zeros(n) for k, n in (("s", n_bins), ("c", n_bins), ("sec_s", n_sectors), ("sec_c", n_sectors),
                                        ("rad_s", n_rbins), ("rad_c", n_rbins))}
    tot = np.zeros(7)  # n, sum, sum2, disc sum, disc n, ring sum, ring n
    suv_sum = 0.0
    factors = np.asarray(volume.bq_ml_per_suv, float) if len(volume.bq_ml_per_suv) == volume.shape[0] else None
    r_a2, r_d2, r_r2 = r_a * r_a, (r_a / 3) ** 2, (2 * r_a / 3) ** 2
    nk = box[0].stop - box[0].start
    step = max(1, int(2_000_000 // max(1, (box[1].stop - box[1].start) * (box[2].stop - box[2].start))))
    for k0 in range(0, nk, step):  # slabs of the box (a loop over slabs, not voxels)
        sub = (slice(box[0].start + k0, min(box[0].stop, box[0].start + k0 + step)), box[1], box[2])
        x, y, z = volume.box_coordinates(sub, R, fit.centre_mm)
        v = volume.data[sub]
        in_len = (np.abs(z) <= 0.5 * l_a) & np.isfinite(v)
        r2 = x * x + y * y
        vol = in_len & (r2 <= r_a2)
        vv = v[vol].astype(np.float64)
        tot[0] += vv.size
        tot[1] += vv.sum()
        tot[2] += (vv * vv).sum()
        disc = in_len & (r2 <= r_d2)
        ring = vol & (r2 > r_r2)
        tot[3] += float(v[disc].sum(dtype=np.float64))
        tot[4] += int(disc.sum())
        tot[5] += float(v[ring].sum(dtype=np.float64))
        tot[6] += int(ring.sum())
        b = np.rint((z[vol] - z_ref) / dz).astype(int) + n_half
        b = np.clip(b, 0, n_bins - 1)
        acc["s"] += np.bincount(b, vv, n_bins)
        acc["c"] += np.bincount(b, minlength=n_bins)
        sec = (np.floor(np.mod(np.arctan2(y[vol], x[vol]), 2 * np.pi) / (2 * np.pi / n_sectors)).astype(int)) % n_sectors
        acc["sec_s"] += np.bincount(sec, vv, n_sectors)
        acc["sec_c"] += np.bincount(sec, minlength=n_sectors)
        rb = np.minimum(np.sqrt(r2[in_len]) / pix, n_rbins - 1).astype(int)
        acc["rad_s"] += np.bincount(rb, v[in_len].astype(np.float64), n_rbins)
        acc["rad_c"] += np.bincount(rb, minlength=n_rbins)
        if factors is not None:
            kk = np.broadcast_to(np.arange(sub[0].start, sub[0].stop)[:, None, None], v.shape)[vol]
            suv_sum += float((vv / factors[kk]).sum())
        del x, y, z, r2
    n = int(tot[0])
    if n < 100:
        raise PhantomNotFound(f"{where}: the analysis volume holds only {n} voxels inside the image; is the phantom in the field of view?")
    mean = tot[1] / n
    sd = math.sqrt(max(tot[2] - n * mean * mean, 0.0) / (n - 1))
    typical = float(np.median(acc["c"][acc["c"] > 0]))
    keep = acc["c"] >= 0.5 * typical
    z_bins = z_ref + (np.arange(n_bins) - n_half) * dz
    with np.errstate(invalid="ignore", divide="ignore"):
        radial = acc["rad_s"] / acc["rad_c"]
    rad_ok = acc["rad_c"] > 0
    masks = _plane_masks(volume, fit, box, r_a, n_sectors)
    return _Regions(
        n=n, mean=mean, sd=sd,
        slice_z_mm=z_bins[keep], slice_means=acc["s"][keep] / acc["c"][keep], slice_counts=acc["c"][keep],
        disc_mean=tot[3] / max(tot[4], 1), ring_mean=tot[5] / max(tot[6], 1), disc_count=int(tot[4]), ring_count=int(tot[6]),
        sector_means=acc["sec_s"] / np.maximum(acc["sec_c"], 1), sector_counts=acc["sec_c"],
        radial_r_mm=((np.arange(n_rbins) + 0.5) * pix)[rad_ok], radial_means=radial[rad_ok],
        mean_suv=suv_sum / n if factors is not None else None,
        suv_factor=float(n * mean / suv_sum) if factors is not None and suv_sum > 0 else None,
        plane_masks=masks, n_slices=int(keep.sum()),
    )


def _plane_masks(volume: Volume, fit: CylinderFit, box, r_a: float, n_sectors: int) -> dict[str, np.ndarray]:
    """In-plane (j, i) masks of the regions on the image slice through the centre (for the
    noise propagation): ``volume``, ``disc``, ``ring``, ``sector_0`` ... ."""
    k_c = int(np.clip(round(float(volume.world_to_index(fit.centre_mm)[0])), 0, volume.shape[0] - 1))
    x, y, _ = volume.box_coordinates((slice(k_c, k_c + 1), box[1], box[2]), fit.rotation, fit.centre_mm)
    x, y = x[0].astype(np.float64), y[0].astype(np.float64)
    r2 = x * x + y * y
    vol = r2 <= r_a * r_a
    out = {"volume": vol, "disc": r2 <= (r_a / 3) ** 2, "ring": vol & (r2 > (2 * r_a / 3) ** 2)}
    sec = (np.floor(np.mod(np.arctan2(y, x), 2 * np.pi) / (2 * np.pi / n_sectors)).astype(int)) % n_sectors
    for i in range(n_sectors):
        out[f"sector_{i}"] = vol & (sec == i)
    return out


# ===================================================================================== uncertainties
def _overlaps(masks: Sequence[np.ndarray], half_lags: tuple[int, int]) -> dict[tuple[int, int], np.ndarray]:
    """In-plane overlaps ``A_ab(tau) = sum_x m_a(x) m_b(x + tau)`` at lags -L..L of every pair
    (FFT with zero padding by the lags)."""
    Lj, Li = half_lags
    shape = [sfft.next_fast_len(int(n + l + 1), real=True) for n, l in zip(masks[0].shape, (Lj, Li))]
    spectra = [sfft.rfft2(m.astype(np.float64), shape) for m in masks]
    idx = [np.r_[np.arange(-l, 0) % s, np.arange(0, l + 1)] for l, s in zip((Lj, Li), shape)]
    out = {}
    for a in range(len(masks)):
        for b in range(a, len(masks)):
            cc = sfft.irfft2(np.conj(spectra[a]) * spectra[b], shape)
            out[(a, b)] = out[(b, a)] = cc[np.ix_(*idx)]
    return out


def _prism_sum(kernel: np.ndarray, overlap: np.ndarray, n_z: int, lag: int | None = None) -> float:
    """``sum_{x in P_a, y in P_b} K(x - y)`` for prisms of ``n_z`` slices (``lag``: the slice
    lag of one pair of slices instead)."""
    Lk = kernel.shape[0] // 2
    if lag is not None:
        return float(np.sum(kernel[Lk + lag] * overlap)) if abs(lag) <= Lk else 0.0
    tk = np.arange(-Lk, Lk + 1)
    nz = np.clip(n_z - np.abs(tk), 0, None).astype(float)
    return float(np.einsum("k,kji,ji->", nz, kernel, overlap))


@dataclass
class _Uncertainties:
    values: dict[str, float] = field(default_factory=dict)
    slice_sd: np.ndarray | None = None


def _uncertainties(noise, reg: _Regions, n_sectors: int) -> _Uncertainties:
    """Standard uncertainties of every metric (module notes, "Uncertainties")."""
    C = noise.autocov_bq2_ml2
    _, Lj, Li = noise.half_lags
    names = ["volume", "disc", "ring"] + [f"sector_{i}" for i in range(n_sectors)]
    masks = [reg.plane_masks[n] for n in names]
    counts = np.array([float(m.sum()) for m in masks])
    if np.any(counts <= 0):
        return _Uncertainties()
    ov = _overlaps(masks, (Lj, Li))
    nz = reg.n_slices
    level = float(noise.scale_at(reg.mean) ** 2)  # (L / b)^p

    def cov(a: int, b: int) -> float:
        return level * _prism_sum(C, ov[(a, b)], nz) / (counts[a] * counts[b] * nz * nz)

    m = reg.mean
    var_mean = cov(0, 0)
    u = {"mean_bq_ml": math.sqrt(var_mean)}
    var_diff = cov(1, 1) + cov(2, 2) - 2 * cov(1, 2)
    diff = reg.disc_mean - reg.ring_mean
    u["radial_nonuniformity_pct"] = 100.0 / m * math.sqrt(max(var_diff, 0.0) + (diff / m) ** 2 * var_mean)
    # voxel SD: var(s^2) = 2 sum C^2 / n^2 (Gaussian noise), at the volume's level
    n_vox = counts[0] * nz
    var_s2 = 2.0 * level**2 * _prism_sum(C * C, ov[(0, 0)], nz) / n_vox**2
    s = reg.sd
    u_s = math.sqrt(max(var_s2, 0.0)) / (2 * s) if s > 0 else 0.0
    cv = s / m
    u["voxel_cv_pct"] = 100.0 * cv * math.sqrt((u_s / s) ** 2 + var_mean / m**2) if s > 0 else 0.0
    # slice means: Toeplitz covariance from the in-plane overlap of the volume mask
    lags = np.arange(len(reg.slice_means))
    per_lag = np.array([level * _prism_sum(C, ov[(0, 0)], nz, lag=int(t)) / counts[0] ** 2 for t in lags])
    cov_slices = per_lag[np.abs(lags[:, None] - lags[None, :])]
    # sector means: full covariance (each sector over all slices)
    sec_idx = np.arange(3, 3 + n_sectors)
    cov_sectors = np.array([[cov(int(a), int(b)) for b in sec_idx] for a in sec_idx])
    rng = np.random.default_rng(20261103)
    draws = _monte_carlo(reg.slice_means, reg.slice_counts, cov_slices, rng)
    u["max_deviation_pct"] = float(np.std(max_deviation_pct(draws, reg.slice_counts), ddof=1))
    u["slice_mean_cv_pct"] = float(np.std(100.0 * draws.std(axis=-1, ddof=1) / draws.mean(axis=-1), ddof=1))
    draws = _monte_carlo(reg.sector_means, reg.sector_counts, cov_sectors, rng)
    u["sector_max_deviation_pct"] = float(np.std(max_deviation_pct(draws, reg.sector_counts), ddof=1))
    return _Uncertainties(u, np.sqrt(np.diag(cov_slices)))


def max_deviation_pct(means: np.ndarray, weights: np.ndarray) -> np.ndarray:
    """``max_k |m_k - m| / m x 100`` of region means (last axis), ``m`` their mean weighted by
    ``weights`` (the regions' voxel counts, so ``m`` is the mean of the voxels)."""
    means = np.asarray(means, float)
    m = (means * weights).sum(axis=-1) / np.sum(weights)
    return 100.0 * np.abs(means - m[..., None]).max(axis=-1) / m


def _monte_carlo(means: np.ndarray, weights: np.ndarray, cov: np.ndarray, rng: np.random.Generator) -> np.ndarray:
    """:data:`MC_DRAWS` draws (rows) of a vector of region means about its thresholded
    measured values (module notes)."""
    m = float(np.sum(means * weights) / np.sum(weights))
    dev = means - m
    thr = np.sqrt(np.clip(np.diag(cov), 0.0, None) * 2.0 * math.log(max(len(means), 2)))
    centre = m + np.sign(dev) * np.clip(np.abs(dev) - thr, 0.0, None)
    evals, evecs = np.linalg.eigh(0.5 * (cov + cov.T))
    root = evecs * np.sqrt(np.clip(evals, 0.0, None))[None, :]
    return centre[None, :] + rng.standard_normal((MC_DRAWS, len(means))) @ root.T


# ===================================================================================== analysis
@dataclass
class UniformCylinderAnalysis(Analysis):
    """Everything measured on one uniform-cylinder scan."""

    kind = "uniform_cylinder"

    cylinder: CylinderFit | None = None
    analysis_radius_mm: float = 0.0
    analysis_length_mm: float = 0.0
    regions: _Regions | None = None
    slice_sd_bq_ml: np.ndarray | None = None

    @property
    def options(self) -> Options:
        return KIND.options(self.template)

    # ---------------------------------------------------------------- tables
    def summary_table(self) -> SummaryTable:
        rows = []
        for r in self.rows:
            rows.append([r.roi, r.metric, fmt_number(r.value, r.unit), fmt_number(r.uncertainty, r.unit) if r.uncertainty is not None else "-"])
        cyl = self.cylinder
        lines = []
        if cyl is not None:
            lines.append(f"cylinder {cyl.diameter_mm:.1f} mm x {cyl.length_mm:.1f} mm, axis tilt {cyl.tilt_deg(self.volume):.2f} deg; "
                         f"analysis volume {2 * self.analysis_radius_mm:.1f} mm x {self.analysis_length_mm:.1f} mm "
                         f"({self.options.wall_margin_mm:g} mm from the wall, {self.options.end_margin_mm:g} mm from the ends)")
        lines.append(f"true concentration at the reference time: {self.true_background_bq_ml:.0f} Bq/mL (fill record)")
        return SummaryTable(self.template.title, ["ROI", "metric", "value", "u"], rows, lines)

    def result_grids(self) -> list[ResultGrid]:
        titles = {"uniform_volume": "Calibration and voxel noise in the analysis volume",
                  "axial_profile": "Axial uniformity (slice means)", "transverse": "Transverse uniformity"}
        present = {(r.roi, r.metric) for r in self.rows}
        out = []
        for roi, metrics in ROWS.items():
            cols = [(m, m) for m in metrics if (roi, m) in present]
            if cols:
                out.append(ResultGrid(f"results-{roi.replace('_', '-')}", f"{titles[roi]}; values &plusmn; standard uncertainty.",
                                      [(roi, [])], [], cols))
        return out

    def key_metrics(self) -> list[tuple[str, str]]:
        return [("uniform_volume", "activity_recovery"), ("uniform_volume", "voxel_cv_pct"), ("axial_profile", "max_deviation_pct"),
                ("transverse", "radial_nonuniformity_pct")]

    def json_extras(self) -> dict[str, Any]:
        cyl, reg = self.cylinder, self.regions
        doc: dict[str, Any] = {"noise": self.noise.as_dict() if self.noise is not None else None}
        if cyl is None or reg is None:
            return doc
        doc["uniform_cylinder"] = {
            "cylinder": cyl.as_dict(self.volume),
            "analysis_volume": {"radius_mm": round(self.analysis_radius_mm, 3), "length_mm": round(self.analysis_length_mm, 3),
                                "wall_margin_mm": self.options.wall_margin_mm, "end_margin_mm": self.options.end_margin_mm,
                                "voxels": reg.n, "slices": reg.n_slices},
            "slices": {"z_mm": [round(float(v), 3) for v in reg.slice_z_mm], "mean_bq_ml": [round(float(v), 3) for v in reg.slice_means],
                       "standard_uncertainty_bq_ml": None if self.slice_sd_bq_ml is None else [round(float(v), 4) for v in self.slice_sd_bq_ml]},
            "transverse": {"central_disc_mean_bq_ml": round(reg.disc_mean, 3), "outer_ring_mean_bq_ml": round(reg.ring_mean, 3),
                           "sector_mean_bq_ml": [round(float(v), 3) for v in reg.sector_means],
                           "sectors_from": "image +x projected on the cross-section, towards +y"},
            "radial_profile": {"r_mm": [round(float(v), 3) for v in reg.radial_r_mm], "mean_bq_ml": [round(float(v), 3) for v in reg.radial_means]},
        }
        return doc

    # ---------------------------------------------------------------- pictures
    def overlay(self) -> Overlay:
        """A transverse view through the centre and a coronal view along the axis, with the
        measured wall, the analysis volume, the central disc and outer ring and the sectors."""
        cyl = self.cylinder
        assert cyl is not None
        r_a, l_a = self.analysis_radius_mm, self.analysis_length_mm
        half_t = cyl.radius_mm + 20.0
        tra = sample_plane(self.volume, cyl.centre_mm, cyl.ex, cyl.ey, half_t)
        c_uv = tra.world_to_uv(cyl.centre_mm)
        shapes = [Shape("circle", "outline", c_uv, cyl.diameter_mm, label=f"wall {cyl.diameter_mm:.1f} mm", label_below=True),
                  Shape("circle", "voi", c_uv, 2 * r_a),
                  Shape("circle", "insert", c_uv, 2 * r_a / 3, label="centre"),
                  Shape("circle", "insert", c_uv, 4 * r_a / 3)]
        n = self.options.sectors
        for i in range(n):
            a = 2 * np.pi * i / n
            shapes.append(Shape("contour", "guide", points_uv=np.array([c_uv + 2 * r_a / 3 * np.array([np.cos(a), np.sin(a)]),
                                                                          c_uv + r_a * np.array([np.cos(a), np.sin(a)])])))
        level = self.value("uniform_volume", "mean_bq_ml") or self.true_background_bq_ml
        vmax, note = display_window(level, factor=1.5, what="volume mean")
        scale = 50.0 if cyl.radius_mm >= 75 else 20.0
        half_c = max(cyl.radius_mm, 0.5 * cyl.length_mm) + 20.0
        cor = sample_plane(self.volume, cyl.centre_mm, cyl.ex, cyl.axis, half_c)
        cc = cor.world_to_uv(cyl.centre_mm)
        cshapes = [Shape("rect", "outline", cc, (cyl.diameter_mm, cyl.length_mm)), Shape("rect", "voi", cc, (2 * r_a, l_a))]
        views = [View(tra, "Transverse through the centre", shapes, vmax, colorbar="Bq/mL", scale_bar_mm=scale, window_note=note),
                 View(cor, "Along the axis, through the centre", cshapes, vmax, colorbar="Bq/mL", scale_bar_mm=scale, window_note=note)]
        title = (f"{self.template.title} | {series_phrase(self.volume)} | "
                 f"{cyl.diameter_mm:.1f} x {cyl.length_mm:.1f} mm, tilt {cyl.tilt_deg(self.volume):.1f} deg")
        legend = {"outline": "cylinder wall and ends as measured in the image",
                  "voi": f"analysis volume ({self.options.wall_margin_mm:g} mm inside the wall, {self.options.end_margin_mm:g} mm from the ends)",
                  "insert": "central disc (r <= R/3) and outer ring (2R/3 < r <= R) of the radial non-uniformity",
                  "guide": f"borders of the {self.options.sectors} sectors"}
        caption = [f"Grey scale: white 0, black {vmax:,.0f} Bq/mL and above ({note}), so the noise texture shows. Letters name the patient "
                   f"directions of each edge ({'DICOM LPS' if self.volume.frame == 'LPS' else 'NIfTI RAS'} frame)."]
        return Overlay(views, title, frame=self.volume.frame, legend=legend, caption=caption)

    def pictures(self) -> dict[str, Callable[[Path], Path]]:
        if self.regions is None:
            return {}
        return {"axial_profile.png": self._axial_picture, "radial_profile.png": self._radial_picture}

    def picture_captions(self) -> dict[str, str]:
        tol = self.profile_tolerance_pct()
        return {
            "axial_profile.png": f"Slice means of the analysis volume relative to its mean, with bars of one standard uncertainty; "
                                 f"dashed: +-{tol:g} % ({self._tolerance_source()}).",
            "radial_profile.png": "Mean over the analysis length in rings about the axis, relative to the analysis-volume mean; "
                                  "the central disc and outer ring of the radial non-uniformity are shaded.",
        }

    def profile_tolerance_pct(self) -> float:
        """The tolerance drawn on the axial profile: the upper limit of an active band on
        ``axial_profile`` ``max_deviation_pct``, else the template's ``profile_tolerance_pct``."""
        for bs in self.band_sets:
            e = bs.entry("axial_profile", "max_deviation_pct")
            if e is not None and e.high is not None:
                return float(e.high)
        return float(self.options.profile_tolerance_pct)

    def _tolerance_source(self) -> str:
        for bs in self.band_sets:
            if bs.entry("axial_profile", "max_deviation_pct") is not None:
                return f"band set {bs.name}"
        return "template default"

    def _axial_picture(self, path: Path) -> Path:
        from ..figures import finish_figure, pyplot

        reg = self.regions
        assert reg is not None
        plt = pyplot()
        rel = 100.0 * reg.slice_means / reg.mean
        fig, ax = plt.subplots(figsize=(7.5, 4.2))
        err = None if self.slice_sd_bq_ml is None else 100.0 * self.slice_sd_bq_ml / reg.mean
        ax.errorbar(reg.slice_z_mm, rel, yerr=err, fmt="o-", ms=3, lw=0.8, color="black", ecolor="#777777", elinewidth=0.8, capsize=0)
        tol = self.profile_tolerance_pct()
        ax.axhline(100.0, color="#444444", lw=0.8)
        for sign in (-1, 1):
            ax.axhline(100.0 + sign * tol, color="#c03000", lw=1.0, ls="--")
        k = int(np.argmax(np.abs(rel - 100.0)))
        ax.plot([reg.slice_z_mm[k]], [rel[k]], marker="o", ms=10, mfc="none", mec="#c03000", mew=1.4)
        ax.set_xlabel("position along the axis from the centre (mm)")
        ax.set_ylabel("slice mean / volume mean (%)")
        lo, hi = float(np.nanmin(rel)), float(np.nanmax(rel))
        ax.set_ylim(min(lo, 100 - tol) - 1.0, max(hi, 100 + tol) + 1.0)
        md = self.value("axial_profile", "max_deviation_pct")
        ax.set_title(f"Axial profile: {reg.n_slices} slices, largest deviation {md:.2f} % (circled); dashed +-{tol:g} %", fontsize=9)
        ax.grid(alpha=0.3)
        return finish_figure(fig, path, dpi=110)

    def _radial_picture(self, path: Path) -> Path:
        from ..figures import finish_figure, pyplot

        reg, cyl = self.regions, self.cylinder
        assert reg is not None and cyl is not None
        plt = pyplot()
        r_a = self.analysis_radius_mm
        fig, ax = plt.subplots(figsize=(7.5, 4.2))
        ax.axvspan(0, r_a / 3, color="#dddddd", lw=0)
        ax.axvspan(2 * r_a / 3, r_a, color="#dddddd", lw=0)
        ax.plot(reg.radial_r_mm, 100.0 * reg.radial_means / reg.mean, "o-", ms=3, lw=0.8, color="black")
        ax.axvline(r_a, color="#207020", lw=1.0, label=f"analysis edge {r_a:.1f} mm")
        ax.axvline(cyl.radius_mm, color="#808080", lw=1.0, ls="--", label=f"wall {cyl.radius_mm:.1f} mm")
        ax.axhline(100.0, color="#444444", lw=0.8)
        inner = reg.radial_r_mm <= r_a
        vals = 100.0 * reg.radial_means[inner] / reg.mean
        if vals.size:
            ax.set_ylim(min(float(vals.min()), 95.0) - 2.0, max(float(vals.max()), 105.0) + 2.0)
        ax.set_xlabel("distance from the axis (mm)")
        ax.set_ylabel("ring mean / volume mean (%)")
        rn = self.value("transverse", "radial_nonuniformity_pct")
        ax.set_title(f"Radial profile: radial non-uniformity {rn:+.2f} % (shaded: central disc and outer ring)", fontsize=9)
        ax.legend(fontsize=8, loc="lower left")
        ax.grid(alpha=0.3)
        return finish_figure(fig, path, dpi=110)


# ===================================================================================== the kind
class UniformCylinderKind(PhantomKind):
    """Activity calibration and uniformity on a uniform cylinder."""

    name = "uniform_cylinder"
    summary = "activity recovery against the fill record, voxel noise, axial and transverse uniformity"
    Options = Options

    def check_template(self, template: Template) -> list[str]:
        a = self.options(template)
        where = template.source_path or template.name
        if not isinstance(template.body, CylinderBody):
            raise TemplateError(f"{where}: invalid template: analysis kind {self.name} needs body.shape: cylinder")
        out = []
        if template.inserts:
            out.append(f"inserts: analysis kind {self.name} measures a uniform cylinder; remove the inserts "
                       f"({', '.join(i.name for i in template.inserts)})")
        d_lo, d_hi = a.diameter_range_mm
        l_lo, l_hi = a.length_range_mm
        if not (d_lo <= template.body.diameter_mm <= d_hi):
            out.append(f"body.diameter_mm: {template.body.diameter_mm:g} mm is outside analysis.diameter_range_mm {d_lo:g}-{d_hi:g}")
        if not (l_lo <= template.body_length_mm <= l_hi):
            out.append(f"body.z_range_mm: length {template.body_length_mm:g} mm is outside analysis.length_range_mm {l_lo:g}-{l_hi:g}")
        if 2 * a.wall_margin_mm >= d_lo:
            out.append(f"analysis.wall_margin_mm: {a.wall_margin_mm:g} mm leaves no analysis volume in a {d_lo:g} mm cylinder")
        if 2 * a.end_margin_mm >= l_lo:
            out.append(f"analysis.end_margin_mm: {a.end_margin_mm:g} mm leaves no analysis volume in a {l_lo:g} mm cylinder")
        return out

    def known_metrics(self, template: Template) -> dict[str, tuple[str, ...]]:
        return dict(ROWS)

    def size_mismatch(self, template: Template, extent_mm: Sequence[float]) -> float | None:
        """How far sorted extents are from any cylinder in the template's ranges: the larger
        of the two diameter extents' disagreement and the distance outside the ranges, both
        as ``|ln|`` of a ratio, for the better of the two ways a cylinder's extents sort
        (diameter smaller or larger than the length); None beyond ``ln 1.25``."""
        a = self.options(template)
        e = sorted(float(v) for v in extent_mm)

        def outside(x: float, rng: tuple[float, float]) -> float:
            return max(0.0, math.log(rng[0] / x), math.log(x / rng[1]))

        best = math.inf
        for pair, length in (((e[0], e[1]), e[2]), ((e[1], e[2]), e[0])):
            if min(pair) <= 0 or length <= 0:
                continue
            dia = math.sqrt(pair[0] * pair[1])
            score = max(math.log(pair[1] / pair[0]), outside(dia, a.diameter_range_mm), outside(length, a.length_range_mm))
            best = min(best, score)
        return None if best > math.log(1.25) else best

    def analyse(
        self,
        volume: Volume,
        template: Template,
        fill: FillRecord,
        *,
        overrides: dict[str, np.ndarray] | None = None,
        where: str,
        settings: AnalysisSettings,
    ) -> UniformCylinderAnalysis:
        """Measure the cylinder in the image, then the calibration and uniformity metrics."""
        check_scan_time(volume, fill, where)
        a = self.options(template)
        true_bg = fill.background_bq_ml(volume.acquired_at)
        cyl = locate_cylinder(volume, template, a, where)
        warnings: list[str] = []
        r_a = cyl.radius_mm - a.wall_margin_mm
        l_a = cyl.length_mm - 2 * a.end_margin_mm
        if r_a < 10.0 or l_a < 10.0:
            raise PhantomNotFound(f"{where}: the analysis volume ({2 * r_a:.0f} mm x {l_a:.0f} mm) is too small: the margins "
                                  f"({a.wall_margin_mm:g} mm, {a.end_margin_mm:g} mm) take most of the {cyl.diameter_mm:.0f} x "
                                  f"{cyl.length_mm:.0f} mm cylinder; lower them in a copy of the template")
        if any(cyl.truncated):
            ends = " and ".join(n for n, t in zip(("low", "high"), cyl.truncated) if t)
            warnings.append(f"the cylinder reaches beyond the axial field of view at its {ends} end: length_mm is the visible length "
                            f"({cyl.length_mm:.1f} mm) and the analysis volume stops {a.end_margin_mm:g} mm inside the field of view")
        if cyl.edge_fwhm_mm is not None and min(a.wall_margin_mm, a.end_margin_mm) < 2 * cyl.edge_fwhm_mm:
            warnings.append(f"the margins ({a.wall_margin_mm:g} mm, {a.end_margin_mm:g} mm) are less than twice the wall edge's width "
                            f"(FWHM {cyl.edge_fwhm_mm:.1f} mm): the blurred edge may reach the analysis volume")
        placement = Placement(template, cyl.rotation, cyl.centre_mm.copy(), cyl.level_bq_ml, 0.0)
        reg = _measure_regions(volume, cyl, r_a, l_a, a.sectors, where)
        m = reg.mean
        metrics = {
            "mean_bq_ml": m,
            "activity_recovery": m / true_bg,
            "calibration_error_pct": 100.0 * (m / true_bg - 1.0),
            "voxel_cv_pct": 100.0 * reg.sd / m,
            "max_deviation_pct": 100.0 * float(np.max(np.abs(reg.slice_means - m))) / m,
            "slice_mean_cv_pct": 100.0 * float(np.std(reg.slice_means, ddof=1) / np.mean(reg.slice_means)) if reg.n_slices > 1 else float("nan"),
            "radial_nonuniformity_pct": 100.0 * (reg.disc_mean - reg.ring_mean) / m,
            "sector_max_deviation_pct": 100.0 * float(np.max(np.abs(reg.sector_means - m))) / m,
        }
        noise = None
        unc = _Uncertainties()
        if settings.uncertainties:
            try:
                from ..noise import estimate_noise

                measured = template.model_copy(update={"body": CylinderBody(shape="cylinder", diameter_mm=cyl.diameter_mm,
                                                                            z_range_mm=(-0.5 * cyl.length_mm, 0.5 * cyl.length_mm))})
                noise = estimate_noise(volume, Placement(measured, cyl.rotation, cyl.centre_mm.copy(), cyl.level_bq_ml, 0.0), measured,
                                       clearance_mm=min(a.wall_margin_mm, a.end_margin_mm), variance_power=settings.variance_power,
                                       where=where, slab_mm=(-0.5 * l_a, 0.5 * l_a))
                unc = _uncertainties(noise, reg, a.sectors)
            except PhantometryError as exc:
                warnings.append(f"no uncertainties: the noise could not be estimated ({exc})")
        u = unc.values
        out = RowBuilder(volume, template)
        add = out.add
        add("uniform_volume", "mean_bq_ml", m, "Bq/mL", uncertainty=u.get("mean_bq_ml"))
        u_rec = u["mean_bq_ml"] / true_bg if "mean_bq_ml" in u else None
        note = calibration_warning(m, true_bg, "analysis-volume mean")
        add("uniform_volume", "activity_recovery", metrics["activity_recovery"], "1", note=note, uncertainty=u_rec)
        add("uniform_volume", "calibration_error_pct", metrics["calibration_error_pct"], "%",
            uncertainty=None if u_rec is None else 100.0 * u_rec)
        add("uniform_volume", "voxel_cv_pct", metrics["voxel_cv_pct"], "%", uncertainty=u.get("voxel_cv_pct"))
        add("uniform_volume", "diameter_mm", cyl.diameter_mm, "mm", uncertainty=cyl.diameter_u_mm,
            note="measured from the image (edge at half level)")
        add("uniform_volume", "length_mm", cyl.length_mm, "mm",
            note="visible length: the cylinder reaches beyond the axial field of view" if any(cyl.truncated) else "measured from the image (ends at half level)")
        if reg.mean_suv is not None:
            add("uniform_volume", "mean_suv", reg.mean_suv, "1", note="body-weight SUV as stored by the scanner (DICOM Units GML)",
                uncertainty=None if "mean_bq_ml" not in u or not reg.suv_factor else u["mean_bq_ml"] / reg.suv_factor)
        add("axial_profile", "max_deviation_pct", metrics["max_deviation_pct"], "%", uncertainty=u.get("max_deviation_pct"),
            note=f"over {reg.n_slices} slices")
        add("axial_profile", "slice_mean_cv_pct", metrics["slice_mean_cv_pct"], "%", uncertainty=u.get("slice_mean_cv_pct"))
        add("transverse", "radial_nonuniformity_pct", metrics["radial_nonuniformity_pct"], "%", uncertainty=u.get("radial_nonuniformity_pct"),
            note="central disc minus outer ring; negative: low centre")
        add("transverse", "sector_max_deviation_pct", metrics["sector_max_deviation_pct"], "%", uncertainty=u.get("sector_max_deviation_pct"),
            note=f"{a.sectors} sectors")
        if note:
            warnings.append(note)
        check = RoiSetCheck("analysis_volume", 1, 1, 1.0, min(a.wall_margin_mm, a.end_margin_mm), True,
                            f"{2 * r_a:.1f} mm x {l_a:.1f} mm on the measured axis", [(r.roi, r.metric) for r in out.rows])
        return UniformCylinderAnalysis(volume, template, fill, placement, out.rows, true_bg, {}, warnings, noise=noise,
                                       placement_checks=[check], cylinder=cyl, analysis_radius_mm=r_a, analysis_length_mm=l_a,
                                       regions=reg, slice_sd_bq_ml=unc.slice_sd)

    def comparison_charts(self, template: Template, fill: FillRecord, settings: Sequence[ComparedSetting]) -> list[Chart]:
        points = []
        failed = []
        for st in settings:
            if st.error is not None:
                failed.append((st.number, st.label, st.error))
                continue
            vals = {(r.roi, r.metric): (r.value, r.uncertainty) for r in st.rows}
            points.append((st.number, st.label, vals))
        return [Chart("uniformity_comparison.png", "Activity recovery, voxel CV, axial and radial uniformity per setting (numbered as in the "
                      "ranking; one colour and marker per setting); bars: standard uncertainty.", uniformity_comparison_chart, (points,),
                      {"failed": failed})]


def uniformity_comparison_chart(points, path: Path, *, failed: Sequence[tuple[int, str, str]] = ()) -> Path:
    """Four panels, one point per setting: activity recovery, voxel CV, largest axial deviation,
    radial non-uniformity (module-level, so a worker process can draw it); the key lists every
    setting and those that could not be measured."""
    from ..figures import save_chart

    return save_chart(draw_uniformity_comparison(points, failed=failed), path)


def draw_uniformity_comparison(points, *, failed: Sequence[tuple[int, str, str]] = ()):
    """The figure of :func:`uniformity_comparison_chart` (not saved)."""
    from ..figures import SettingsKey, new_figure, panel_grid, setting_style, wrap_text

    panels = [(("uniform_volume", "activity_recovery"), "activity recovery"), (("uniform_volume", "voxel_cv_pct"), "voxel CV (%)"),
              (("axial_profile", "max_deviation_pct"), "largest axial deviation (%)"),
              (("transverse", "radial_nonuniformity_pct"), "radial non-uniformity (%)")]
    width = 0.75 + 2 * 3.6 + 0.9 + 0.3
    fig, renderer = new_figure(width, 6.0)
    key = SettingsKey([(n, label, [None]) for n, label, _ in points], list(failed), width, renderer, fig.dpi)
    head = wrap_text("Uniform cylinder: every setting's calibration and uniformity (bars: standard uncertainty)", width * fig.dpi - 20, 10,
                     renderer)
    top = 0.2 + (head.count("\n") + 1) * 0.2 + 0.35
    bottom = 0.3 + key.height_in + 0.7
    fig.set_size_inches(width, top + 2 * 2.6 + 0.95 + bottom)
    fig.suptitle(head, fontsize=10, y=1 - 0.12 / fig.get_figheight(), va="top")
    axes = panel_grid(fig, 4, 2, 3.6, 2.6, top, bottom, 0.75, 0.9, 0.95)
    for ax, (key_, title) in zip(axes, panels):
        for number, _label, vals in points:
            v, u = vals.get(key_, (None, None))
            if v is None or not math.isfinite(v):
                continue
            st = setting_style(number)
            ax.errorbar([number], [v], yerr=None if u is None else [u], fmt="none", ecolor=st["color"], alpha=0.6, capsize=2)
            ax.plot([number], [v], ls="none", ms=6.5, mec="#222222", mew=0.6, marker=st["marker"], color=st["color"], gid=f"setting_{number}")
        ax.set_title(title, fontsize=9)
        ax.set_xlabel("setting", fontsize=8)
        ax.tick_params(labelsize=7)
        ax.grid(alpha=0.3)
        ax.set_xticks([p[0] for p in points])
        ax.margins(x=0.15)
    key.draw(fig, bottom - 0.7)
    return fig


KIND = UniformCylinderKind()
