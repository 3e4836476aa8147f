"""NEMA NU 2 background ROIs placed on the body found in the image, and verified there.

Rules (README "How the numbers are made"; NEMA NU 2 image quality, recalled: twelve 37 mm
background ROIs on the sphere slice and at +-10, +-20 mm, at least 15 mm from the phantom's
edge and from the spheres, with concentric ROIs of every sphere size)
------------------------------------------------------------------------------------------
1. The template's ROI centres are body-frame positions (``x, y`` relative to the body); they
   are carried into the image by the body frame found from the outline
   (:func:`phantometry.locate.find_body_frame`), the same ``x, y`` on every background plane.
2. Each ROI (the largest size; the others are concentric) must keep ``clearance`` mm, on every
   plane, from the body edge *found on that plane* (:func:`phantometry.outline.find_outline`;
   a plane without an outline cannot be checked, and its set is reported as not confirmed),
   and in the plane from every sphere's outer surface and every insert parallel to the axis
   (at the positions found). A template position is kept when it keeps the clearance less an
   allowance for locating the edge in the image (:data:`EDGE_TOLERANCE_MM`, or more on a
   noisy image: the caller's ``tolerance_mm``).
3. An ROI that does not is moved to the nearest position in the body (searched on a 1 mm
   grid, refined to 0.1 mm) that keeps the full clearance and stays at least the template's
   closest ROI spacing (at most the ROI diameter) from the ROIs already placed, in template
   order; when the body has no such position left, it is dropped.
4. K, the number of ROIs used per size, is (ROIs kept or moved) x (planes).
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field
from typing import Callable

import numpy as np

from .outline import Outline

#: Allowance (mm) for locating the body edge in the image when checking a clearance.
EDGE_TOLERANCE_MM = 0.5
#: Grid step (mm) of the search for a valid position (refined to a tenth of it).
SEARCH_STEP_MM = 1.0


@dataclass
class Obstacle:
    """Something a background ROI keeps its clearance from, in body-frame ``x, y`` (mm)."""

    name: str
    xy: np.ndarray
    radius_mm: float


@dataclass
class PlaneGeometry:
    """One background plane: its offset, how body-frame points reach it, and its outline."""

    offset_mm: float
    #: body-frame (n, 2) -> world points (n, 3) on this plane
    to_plane: Callable[[np.ndarray], np.ndarray]
    outline: Outline | None


@dataclass
class BackgroundPlacement:
    """Where the background ROIs went and why.

    Attributes
    ----------
    template_xy : the template's centres (n, 2), body frame.
    xy : centres used (K_pos, 2), body frame, in template order (dropped ones left out).
    index : template index of each centre used.
    status : per template centre, ``kept``, ``moved`` or ``dropped``.
    moved_mm : per template centre, how far it was moved (0 kept, NaN dropped).
    clearance_mm : per template centre, the smallest clearance at its nominal position
        (edge, spheres and inserts, over the planes; largest ROI size).
    """

    template_xy: np.ndarray
    xy: np.ndarray
    index: np.ndarray
    status: list[str]
    moved_mm: np.ndarray
    clearance_mm: np.ndarray
    diameter_mm: float
    clearance_required_mm: float
    #: allowance for locating the edge when a template position was checked (mm)
    tolerance_mm: float = EDGE_TOLERANCE_MM
    notes: list[str] = field(default_factory=list)

    @property
    def n_kept(self) -> int:
        return self.status.count("kept")

    @property
    def n_moved(self) -> int:
        return self.status.count("moved")

    @property
    def n_dropped(self) -> int:
        return self.status.count("dropped")

    def summary(self) -> str:
        """One line: what happened to the template's ROI positions."""
        parts = [f"{len(self.xy)} of {len(self.template_xy)} positions used"]
        if self.n_moved:
            moved = [f"{i + 1} by {self.moved_mm[i]:.1f} mm" for i, s in enumerate(self.status) if s == "moved"]
            parts.append("moved: " + ", ".join(moved))
        if self.n_dropped:
            parts.append("dropped: " + ", ".join(str(i + 1) for i, s in enumerate(self.status) if s == "dropped"))
        return "; ".join(parts)


def clearances(xy: np.ndarray, planes: list[PlaneGeometry], obstacles: list[Obstacle], diameter_mm: float) -> tuple[np.ndarray, np.ndarray]:
    """Edge and obstacle clearances (mm) of discs of ``diameter_mm`` at body-frame centres (m, 2).

    Returns (edge, obstacle): the smallest distance over the planes with an outline from the
    disc's edge to the body edge found there (negative: it crosses it; +inf when no plane has
    an outline), and the smallest in-plane distance from the disc's edge to an obstacle's
    surface (+inf if none).
    """
    xy = np.asarray(xy, float).reshape(-1, 2)
    r = 0.5 * float(diameter_mm)
    edge = np.full(len(xy), np.inf)
    for pg in planes:
        if pg.outline is not None:
            edge = np.minimum(edge, pg.outline.signed_distance(pg.to_plane(xy)) - r)
    return edge, _obstacle_clearance(xy, obstacles, r)


def _obstacle_clearance(xy: np.ndarray, obstacles: list[Obstacle], r: float) -> np.ndarray:
    obst = np.full(len(xy), np.inf)
    for ob in obstacles:
        obst = np.minimum(obst, np.hypot(*(xy - ob.xy).T) - r - ob.radius_mm)
    return obst


def keeps_clearance(xy: np.ndarray, planes: list[PlaneGeometry], obstacles: list[Obstacle], diameter_mm: float, clearance_mm: float) -> np.ndarray:
    """Whether discs at body-frame centres (m, 2) keep ``clearance_mm`` from the obstacles and,
    on every plane, from the body edge found there (the fast test of the search: the edge is
    measured only where the obstacles allow, and only up to the clearance)."""
    xy = np.asarray(xy, float).reshape(-1, 2)
    r = 0.5 * float(diameter_mm)
    ok = _obstacle_clearance(xy, obstacles, r) >= clearance_mm
    for pg in planes:
        idx = np.flatnonzero(ok)
        if not idx.size:
            break
        if pg.outline is None:  # nothing to check against on this plane (the set is then not confirmed)
            continue
        ok[idx] = pg.outline.signed_distance(pg.to_plane(xy[idx]), clearance_mm + r + 1.0) - r >= clearance_mm
    return ok


def place(
    template_xy: np.ndarray,
    planes: list[PlaneGeometry],
    obstacles: list[Obstacle],
    diameter_mm: float,
    clearance_mm: float,
    bounds_xy_mm: tuple[float, float, float, float],
    *,
    tolerance_mm: float = EDGE_TOLERANCE_MM,
    step_mm: float = SEARCH_STEP_MM,
) -> BackgroundPlacement:
    """Keep, move or drop each template ROI position (module notes, rules 2-4).

    ``bounds_xy_mm`` (x0, x1, y0, y1): the body-frame box searched for new positions (the body
    with a margin).
    """
    txy = np.asarray(template_xy, float).reshape(-1, 2)
    n = len(txy)
    edge, obst = clearances(txy, planes, obstacles, diameter_mm)
    clear = np.minimum(edge, obst)
    ok = clear >= clearance_mm - tolerance_mm
    if n > 1:
        d = np.hypot(*(txy[:, None, :] - txy[None, :, :]).transpose(2, 0, 1))
        np.fill_diagonal(d, np.inf)
        min_sep = min(float(diameter_mm), float(d.min())) - 0.5
    else:
        min_sep = 0.0
    status = ["kept" if k else "" for k in ok]
    moved = np.where(ok, 0.0, np.nan)
    placed = {i: txy[i] for i in range(n) if ok[i]}
    if not ok.all():
        # where a moved ROI may go: every point of a grid over the body keeping the full clearance
        x0, x1, y0, y1 = bounds_xy_mm
        gx, gy = np.meshgrid(np.arange(x0, x1 + step_mm / 2, step_mm), np.arange(y0, y1 + step_mm / 2, step_mm), indexing="xy")
        grid = np.c_[gx.ravel(), gy.ravel()]
        free = grid[keeps_clearance(grid, planes, obstacles, diameter_mm, clearance_mm)]
        for i in np.flatnonzero(~ok):
            cand = free
            if placed and len(cand):
                others = np.array(list(placed.values()))
                sep = np.hypot(*(cand[:, None, :] - others[None]).transpose(2, 0, 1)).min(axis=1)
                cand = cand[sep >= min_sep]
            if len(cand) == 0:
                status[i] = "dropped"
                continue
            best = cand[int(np.argmin(np.hypot(*(cand - txy[i]).T)))]
            best = _refine_towards(txy[i], best, step_mm, planes, obstacles, diameter_mm, clearance_mm,
                                   np.array(list(placed.values())) if placed else np.zeros((0, 2)), min_sep)
            placed[int(i)] = best
            status[i] = "moved"
            moved[i] = float(np.hypot(*(best - txy[i])))
    index = np.array(sorted(placed), dtype=int)
    xy = np.array([placed[i] for i in index]).reshape(-1, 2)
    return BackgroundPlacement(txy, xy, index, status, moved, clear, float(diameter_mm), float(clearance_mm), float(tolerance_mm))


def _refine_towards(nominal: np.ndarray, best: np.ndarray, step: float, planes: list[PlaneGeometry], obstacles: list[Obstacle],
                    diameter_mm: float, clearance_mm: float, others: np.ndarray, min_sep: float) -> np.ndarray:
    """The valid point nearest ``nominal`` on a fine grid (a tenth of ``step``) about a valid grid point ``best``."""
    f = np.arange(-step, step + step / 20, step / 10)
    fx, fy = np.meshgrid(f, f, indexing="xy")
    cand = best + np.c_[fx.ravel(), fy.ravel()]
    good = keeps_clearance(cand, planes, obstacles, diameter_mm, clearance_mm)
    if len(others):
        good &= np.hypot(*(cand[:, None, :] - others[None]).transpose(2, 0, 1)).min(axis=1) >= min_sep
    if not good.any():
        return best
    cand = cand[good]
    return cand[int(np.argmin(np.hypot(*(cand - nominal).T)))]


@dataclass
class SetCheck:
    """How one background ROI size sits in the image (numbers of a RoiSetCheck)."""

    diameter_mm: float
    min_inside_fraction: float
    min_edge_distance_mm: float
    min_obstacle_distance_mm: float


def check_size(xy: np.ndarray, planes: list[PlaneGeometry], obstacles: list[Obstacle], diameter_mm: float) -> SetCheck:
    """Fraction of every ROI of one size inside the body outline found on its plane, and its
    smallest distances to the body edge and to the obstacles (mm), over the planes with an
    outline (NaN / +inf when none has one)."""
    xy = np.asarray(xy, float).reshape(-1, 2)
    if len(xy) == 0:
        return SetCheck(diameter_mm, math.nan, math.nan, math.nan)
    fractions = [pg.outline.disc_inside_fraction(pg.to_plane(xy), diameter_mm) for pg in planes if pg.outline is not None]
    edge, obst = clearances(xy, planes, obstacles, diameter_mm)
    return SetCheck(diameter_mm, float(np.min(np.concatenate(fractions))) if fractions else math.nan,
                    float(np.min(edge)), float(np.min(obst)))
