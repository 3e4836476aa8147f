"""How ROI planes are read from a volume: the original slices, or planes interpolated across them.

NEMA NU 2 draws its image-quality ROIs on the *reconstructed* transverse slices nearest the
sphere plane and +-10, +-20 mm from it (recalled). Interpolating a plane between two slices
averages them, which lowers the pixel noise and therefore the background variability of a
noisy image. So:

* **nearest slice** when the phantom axis is within :data:`NEAREST_SLICE_MAX_TILT_DEG` of the
  image's slice axis (and the slices have square, orthogonal pixels): every plane is one
  original slice, the one nearest the requested point, read without interpolation; the ROI
  centres are carried along the phantom axis onto that slice, so their in-plane placement
  stays sub-voxel (exact disc weights, :mod:`phantometry.rois`);
* **interpolated** otherwise (a tilted phantom has no slice parallel to its planes): planes
  perpendicular to the phantom axis, trilinear (:func:`phantometry.rois.sample_plane`).

:class:`PlaneSampler` makes the choice once per analysis and records it
(:meth:`PlaneSampler.as_dict`, written to ``measurements.json``).
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field
from typing import Any

import numpy as np

from .rois import PlaneImage, sample_plane
from .volume import Volume

#: Largest angle (degrees) between the phantom axis and the image's slice axis at which the
#: original slices are read (NEMA NU 2 reads reconstructed slices; within about 1 degree the
#: in-plane drift over the +-20 mm of the background slices stays below 0.35 mm).
NEAREST_SLICE_MAX_TILT_DEG = 1.0


def slice_axis_angle_deg(volume: Volume, axis_world: np.ndarray) -> float:
    """Angle (degrees, 0..90) between a direction and the volume's slice axis (array axis 0)."""
    a = np.asarray(axis_world, float)
    c = abs(float(volume.axes_world[0] @ (a / np.linalg.norm(a))))
    return math.degrees(math.acos(min(1.0, c)))


def _slices_are_readable(volume: Volume) -> str | None:
    """Why the original slices cannot be read as square-pixel planes, or None when they can."""
    sp = volume.spacing_mm
    if abs(float(sp[1]) - float(sp[2])) > 1e-6 * float(sp[2]):
        return f"the slices' pixels are not square ({float(sp[2]):g} x {float(sp[1]):g} mm)"
    ax = volume.axes_world
    if max(abs(float(ax[0] @ ax[1])), abs(float(ax[0] @ ax[2])), abs(float(ax[1] @ ax[2]))) > 1e-6:
        return "the voxel axes are not orthogonal"
    return None


def along_axis_onto_plane(plane: PlaneImage, points_mm: np.ndarray, axis_world: np.ndarray) -> np.ndarray:
    """World points (..., 3) carried along ``axis_world`` until they meet ``plane``.

    On a plane perpendicular to the axis this is the orthogonal projection; on an original
    slice of a slightly tilted phantom it keeps an ROI on its line parallel to the phantom axis.
    """
    p = np.asarray(points_mm, float)
    a = np.asarray(axis_world, float)
    n = plane.normal
    s = -plane.distance_to_plane(p) / float(a @ n)
    return p + np.asarray(s)[..., None] * a


@dataclass
class PlaneSampler:
    """Reads the planes of one analysis, as the original slices or interpolated (module notes).

    Attributes
    ----------
    volume : the image.
    axis_world : unit phantom axis (world).
    u_dir, v_dir : in-plane directions of interpolated planes (perpendicular to the axis).
    mode : ``nearest_slice`` or ``interpolated``.
    tilt_deg : angle between the phantom axis and the slice axis.
    reason : why interpolated planes are used (None for nearest slices).
    """

    volume: Volume
    axis_world: np.ndarray
    u_dir: np.ndarray
    v_dir: np.ndarray
    mode: str
    tilt_deg: float
    reason: str | None = None
    #: what was read for each named plane: name -> details (slice index, distance from the request)
    record: dict[str, dict[str, Any]] = field(default_factory=dict)

    @classmethod
    def choose(cls, volume: Volume, axis_world: np.ndarray, u_dir: np.ndarray, v_dir: np.ndarray,
               max_tilt_deg: float = NEAREST_SLICE_MAX_TILT_DEG) -> "PlaneSampler":
        """Nearest slices when the axis is within ``max_tilt_deg`` of the slice axis and the
        slices are square-pixel and orthogonal; interpolated planes otherwise."""
        a = np.asarray(axis_world, float) / np.linalg.norm(axis_world)
        tilt = slice_axis_angle_deg(volume, a)
        why = _slices_are_readable(volume)
        if why is None and tilt > max_tilt_deg:
            why = f"the phantom axis is {tilt:.2f} deg from the slice axis (more than {max_tilt_deg:g} deg)"
        mode = "interpolated" if why else "nearest_slice"
        return cls(volume, a, np.asarray(u_dir, float), np.asarray(v_dir, float), mode, tilt, why)

    @property
    def nearest_slice(self) -> bool:
        return self.mode == "nearest_slice"

    def plane(self, point_mm: np.ndarray, half_width_mm: float, name: str | None = None) -> PlaneImage:
        """The plane read for a point: the original slice nearest to it (nearest-slice mode) or
        the plane through it perpendicular to the axis (interpolated mode).

        A nearest slice is read on the voxel centres (pixel = the in-plane spacing, axes = the
        image's rows and columns), so its values *are* the slice's voxels.
        """
        p = np.asarray(point_mm, float)
        if not self.nearest_slice:
            plane = sample_plane(self.volume, p, self.u_dir, self.v_dir, half_width_mm)
            if name is not None:
                self.record[name] = {"interpolated_at_mm": [round(float(v), 3) for v in p]}
            return plane
        vol = self.volume
        idx = vol.world_to_index(p)
        k = int(np.clip(np.rint(idx[0]), 0, vol.shape[0] - 1))
        on_slice = vol.index_to_world(np.array([float(k), idx[1], idx[2]]))
        cols, rows = vol.axes_world[2], vol.axes_world[1]
        plane = sample_plane(vol, on_slice, cols, rows, half_width_mm, pixel_mm=float(vol.spacing_mm[2]))
        if name is not None:
            self.record[name] = {"slice_index": k, "distance_mm": round(float(plane.distance_to_plane(p)), 3)}
        return plane

    def onto(self, plane: PlaneImage, points_mm: np.ndarray) -> np.ndarray:
        """World points carried along the phantom axis onto a plane read by :meth:`plane`."""
        return along_axis_onto_plane(plane, points_mm, self.axis_world)

    def as_dict(self) -> dict[str, Any]:
        return {
            "mode": self.mode,
            "axis_to_slice_axis_deg": round(self.tilt_deg, 3),
            "max_tilt_for_slices_deg": NEAREST_SLICE_MAX_TILT_DEG,
            "reason": self.reason,
            "planes": self.record,
        }
