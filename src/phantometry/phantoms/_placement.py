"""Small helpers of placement quality (:class:`~phantometry.phantoms.base.RoiSetCheck`) shared
by the kinds: the overlap of a cylindrical ROI with the cylindrical region it is meant to
sample, and the loud warning of a set that is not wholly inside its region."""

from __future__ import annotations

import math

from .base import RoiSetCheck


def disc_overlap_fraction(offset_mm: float, r_roi_mm: float, r_region_mm: float) -> float:
    """Fraction of a disc of radius ``r_roi_mm`` inside a disc of radius ``r_region_mm`` whose
    centre is ``offset_mm`` away (the lens area of two circles over the ROI's area)."""
    d, r, R = abs(float(offset_mm)), float(r_roi_mm), float(r_region_mm)
    if r <= 0:
        return 1.0 if d <= R else 0.0
    if d + r <= R:
        return 1.0
    if d >= r + R:
        return 0.0
    if d + R <= r:  # the region lies wholly inside the ROI
        return (R / r) ** 2
    a = r * r * math.acos((d * d + r * r - R * R) / (2 * d * r))
    b = R * R * math.acos((d * d + R * R - r * r) / (2 * d * R))
    c = 0.5 * math.sqrt(max((-d + r + R) * (d + r - R) * (d - r + R) * (d + r + R), 0.0))
    return (a + b - c) / (math.pi * r * r)


def interval_overlap_fraction(lo: float, hi: float, region_lo: float, region_hi: float) -> float:
    """Fraction of the interval ``[lo, hi]`` inside ``[region_lo, region_hi]``."""
    if hi <= lo:
        return 1.0 if region_lo <= lo <= region_hi else 0.0
    return max(0.0, min(hi, region_hi) - max(lo, region_lo)) / (hi - lo)


def cylinder_inside(offset_mm: float, r_roi: float, z_roi: tuple[float, float], r_region: float,
                    z_region: tuple[float, float]) -> tuple[float, float]:
    """(fraction inside, distance of the ROI's edge from the region's edge) of a cylindrical ROI
    in a coaxial-parallel cylindrical region: axes parallel, ``offset_mm`` apart; z ranges along
    the axes. The distance is negative when the ROI crosses the region's edge."""
    frac = disc_overlap_fraction(offset_mm, r_roi, r_region) * interval_overlap_fraction(*z_roi, *z_region)
    edge = min(r_region - (abs(offset_mm) + r_roi), z_roi[0] - z_region[0], z_region[1] - z_roi[1])
    return frac, edge


def outside_warning(check: RoiSetCheck, what: str) -> str | None:
    """The loud warning of a set with a measured ROI not wholly inside its region, or None."""
    if check.min_inside_fraction >= 1.0 - 1e-6:
        return None
    return (
        f"WARNING: {what}: a measured ROI is only {100 * check.min_inside_fraction:.0f} % inside the region it is meant to "
        f"sample (as found in this image); its numbers mix in what lies outside"
        + ("" if check.confirmed else "; band verdicts withheld")
    )


def ball_overlap_fraction(offset_mm: float, r_roi_mm: float, r_region_mm: float) -> float:
    """Fraction of a ball of radius ``r_roi_mm`` inside a ball of radius ``r_region_mm`` whose
    centre is ``offset_mm`` away (the volume of the lens of two spheres over the ROI's volume)."""
    d, r, R = abs(float(offset_mm)), float(r_roi_mm), float(r_region_mm)
    if r <= 0:
        return 1.0 if d <= R else 0.0
    if d + r <= R:
        return 1.0
    if d >= r + R:
        return 0.0
    if d + R <= r:
        return (R / r) ** 3
    lens = math.pi * (R + r - d) ** 2 * (d * d + 2 * d * r - 3 * r * r + 2 * d * R + 6 * r * R - 3 * R * R) / (12 * d)
    return lens / (4.0 / 3.0 * math.pi * r**3)
