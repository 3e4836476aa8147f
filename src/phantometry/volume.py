"""The volume model: voxels in Bq/mL with their geometry and acquisition metadata.

Conventions (kept everywhere in phantometry):

* ``Volume.data`` is a C-ordered float32 array indexed ``data[k, j, i]`` (slice, row, column),
  i.e. (z, y, x) in array order.
* ``Volume.affine`` is a 4x4 matrix mapping the homogeneous *index* vector ``(i, j, k, 1)``
  (column, row, slice: the nibabel/DICOM order, reversed with respect to the array axes) to
  world coordinates in mm. Use :meth:`Volume.index_to_world` / :meth:`Volume.world_to_index`,
  which take and return array-order ``(k, j, i)`` indices, so that callers never need to
  reverse axes by hand.
* ``Volume.frame`` names the world frame: ``"LPS"`` (DICOM patient coordinates) or ``"RAS"``
  (NIfTI scanner coordinates). World positions reported by the tool are in this frame.
* No patient identity (name, ID, birth date, accession) is ever stored on a Volume.
"""

from __future__ import annotations

import dataclasses
from dataclasses import dataclass, field
from datetime import datetime
from typing import Any

import numpy as np

from .errors import GeometryError

WORLD_FRAMES = ("LPS", "RAS")


@dataclass(frozen=True)
class Reconstruction:
    """Reconstruction settings as far as the image headers tell them.

    Attributes
    ----------
    method : str or None
        Reconstruction method as written by the scanner (DICOM ReconstructionMethod).
    iterations, subsets : int or None
        Iterative reconstruction parameters when the headers state them.
    filter : str or None
        Post-filter / convolution kernel description (DICOM ConvolutionKernel).
    matrix : tuple of int
        Image matrix (rows, columns, slices).
    voxel_size_mm : tuple of float
        Voxel spacing (x, y, z) in mm: column spacing, row spacing, slice spacing.
    """

    method: str | None = None
    iterations: int | None = None
    subsets: int | None = None
    filter: str | None = None
    matrix: tuple[int, int, int] = (0, 0, 0)
    voxel_size_mm: tuple[float, float, float] = (0.0, 0.0, 0.0)

    def label(self) -> str:
        """Short human-readable description, e.g. ``OSEM 3i21s, Gaussian 5mm, 256x256, 2.0 mm``."""
        parts = []
        if self.method:
            parts.append(self.method)
        if self.iterations or self.subsets:
            parts.append(f"{self.iterations or '?'}i{self.subsets or '?'}s")
        if self.filter:
            parts.append(self.filter)
        if any(self.matrix):
            parts.append(f"{self.matrix[0]}x{self.matrix[1]}x{self.matrix[2]}")
        if any(self.voxel_size_mm):
            parts.append("x".join(f"{v:.3g}" for v in self.voxel_size_mm) + " mm")
        return ", ".join(parts) if parts else "unknown reconstruction"


@dataclass(frozen=True)
class Scanner:
    """The device that acquired the image (no site-identifying free text beyond the headers)."""

    manufacturer: str | None = None
    model: str | None = None
    station: str | None = None
    serial: str | None = None


@dataclass
class Volume:
    """A reconstructed PET volume in Bq/mL with geometry and metadata.

    Parameters
    ----------
    data : ndarray, shape (nz, ny, nx)
        Activity concentration in Bq/mL (float32), array order (slice, row, column).
    affine : ndarray, shape (4, 4)
        Maps homogeneous index ``(i, j, k, 1)`` (column, row, slice) to world mm.
    frame : {"LPS", "RAS"}
        World coordinate frame of ``affine``.
    acquired_at : datetime or None
        Timezone-aware reference time of the activity values (the time the image values are
        decay-corrected to, or the acquisition start when not decay corrected).
    nuclide : str or None
        Radionuclide, canonical form such as ``"F-18"``.
    original_units : str
        Units of the source pixel data before conversion (e.g. ``"BQML"``, ``"GML"``).
    decay_correction : str or None
        DICOM DecayCorrection of the source (``"START"``, ``"ADMIN"``, ``"NONE"``) if known.
    bq_ml_per_suv : tuple of float
        For a series stored as body-weight SUV (``original_units == "GML"``): the Bq/mL of one
        SUV unit in each slice (array order), the factor the loader converted with, so that
        ``data[k] / bq_ml_per_suv[k]`` is the SUV the scanner stored; empty otherwise.
    scan_start : datetime or None
        Start of the acquisition (DICOM: Series Date/Time unless after the earliest
        Acquisition Date/Time, QIBA), for the checks of fill against scan.
    time_basis : str or None
        How the times were placed on the clock (:mod:`phantometry.sitetime`): ``header
        offset``, ``given zone``, ``fill record offset``, ``given time``, or ``unresolved``
        (the scanner's wall clock held as UTC until the site's zone is known). None: an aware
        time given by a program.
    time_zone : str or None
        The zone or offset the times were read in, as a person reads it.
    frame_duration_s : float or None
        Acquisition duration of a frame (bed), when the header states it.
    decay_reference : str or None
        What ``acquired_at`` is for these values, in words (e.g. each frame's start plus the
        frame-average correction for DecayCorrection NONE).
    """

    data: np.ndarray
    affine: np.ndarray
    frame: str = "LPS"
    acquired_at: datetime | None = None
    nuclide: str | None = None
    original_units: str = "BQML"
    decay_correction: str | None = None
    series_uid: str | None = None
    series_number: int | None = None
    series_description: str | None = None
    modality: str = "PT"
    scanner: Scanner = field(default_factory=Scanner)
    reconstruction: Reconstruction = field(default_factory=Reconstruction)
    source: str | None = None
    sop_instance_uids: tuple[str, ...] = ()
    frame_of_reference_uid: str | None = None
    study_uid: str | None = None
    #: what the loader noticed about the image and worked around (e.g. a header half-life
    #: replaced by the table value); measure puts these in measurements.json ``warnings``
    warnings: tuple[str, ...] = ()
    bq_ml_per_suv: tuple[float, ...] = ()
    scan_start: datetime | None = None
    time_basis: str | None = None
    time_zone: str | None = None
    frame_duration_s: float | None = None
    decay_reference: str | None = None

    def __post_init__(self) -> None:
        data = np.asarray(self.data)
        if data.ndim != 3:
            raise GeometryError(f"a volume needs 3-D data, got shape {data.shape}")
        if data.dtype != np.float32:
            data = data.astype(np.float32)
        self.data = np.ascontiguousarray(data)
        affine = np.asarray(self.affine, dtype=float)
        if affine.shape != (4, 4):
            raise GeometryError(f"affine must be 4x4, got {affine.shape}")
        if not np.all(np.isfinite(affine)):
            raise GeometryError(f"{self.source or 'volume'}: the voxel-to-world affine holds a number that is not finite")
        if abs(np.linalg.det(affine[:3, :3])) < 1e-9:
            raise GeometryError("affine is singular: voxel axes are degenerate")
        self.affine = affine
        if self.frame not in WORLD_FRAMES:
            raise GeometryError(f"unknown world frame {self.frame!r}; expected one of {WORLD_FRAMES}")
        for moment in (self.acquired_at, self.scan_start):
            if moment is not None and moment.tzinfo is None:
                raise ValueError("acquired_at and scan_start must be timezone-aware")

    # ------------------------------------------------------------------ geometry
    @property
    def shape(self) -> tuple[int, int, int]:
        """Array shape (nz, ny, nx)."""
        return tuple(self.data.shape)  # type: ignore[return-value]

    @property
    def spacing_mm(self) -> np.ndarray:
        """Voxel spacing in array order (dz, dy, dx), mm."""
        return np.linalg.norm(self.affine[:3, :3], axis=0)[::-1].copy()

    @property
    def voxel_volume_ml(self) -> float:
        """Volume of one voxel in mL (1 mL = 1000 mm^3)."""
        return float(abs(np.linalg.det(self.affine[:3, :3])) / 1000.0)

    @property
    def axes_world(self) -> np.ndarray:
        """Unit vectors of the array axes (k, j, i) in world coordinates, rows in array order."""
        cols = self.affine[:3, :3] / np.linalg.norm(self.affine[:3, :3], axis=0)
        return cols.T[::-1].copy()

    def index_to_world(self, index_kji: np.ndarray) -> np.ndarray:
        """World mm of array-order indices.

        Parameters
        ----------
        index_kji : array_like, shape (..., 3)
            Fractional indices (k, j, i) in array order.

        Returns
        -------
        ndarray, shape (..., 3)
            World coordinates in mm in :attr:`frame`.
        """
        idx = np.asarray(index_kji, dtype=float)[..., ::-1]
        return idx @ self.affine[:3, :3].T + self.affine[:3, 3]

    def world_to_index(self, points_mm: np.ndarray) -> np.ndarray:
        """Fractional array-order indices (k, j, i) of world points (mm)."""
        pts = np.asarray(points_mm, dtype=float)
        inv = np.linalg.inv(self.affine)
        ijk = pts @ inv[:3, :3].T + inv[:3, 3]
        return ijk[..., ::-1]

    def box_coordinates(
        self,
        box: tuple[slice, slice, slice],
        rotation: np.ndarray | None = None,
        origin_mm: np.ndarray | None = None,
        dtype: Any = np.float32,
    ) -> list[np.ndarray]:
        """Coordinates (mm) of the voxel centres of an array-order box, one array per axis.

        World coordinates, or with ``rotation`` and ``origin_mm`` the coordinates
        ``(p - origin) @ rotation`` of another frame (a template's). Each array has the box's
        shape and ``dtype``; built by broadcasting one arange per axis (no index grids).
        """
        A = self.affine[:3, :3]
        t = self.affine[:3, 3].astype(float)
        if rotation is not None:
            R = np.asarray(rotation, float)
            A = R.T @ A
            t = R.T @ (t - (np.zeros(3) if origin_mm is None else np.asarray(origin_mm, float)))
        ax = [np.arange(b.start, b.stop, dtype=dtype) for b in box]  # k, j, i
        k = ax[0][:, None, None]
        j = ax[1][None, :, None]
        i = ax[2][None, None, :]
        one = np.dtype(dtype).type
        return [one(A[r, 0]) * i + one(A[r, 1]) * j + one(A[r, 2]) * k + one(t[r]) for r in range(3)]

    def world_grid(self, slices: tuple[slice, slice, slice] | None = None) -> np.ndarray:
        """World coordinates (mm) of voxel centres, shape (nz, ny, nx, 3) or of a sub-box.

        Parameters
        ----------
        slices : tuple of 3 slices, optional
            Array-order sub-box; the whole volume when omitted.
        """
        if slices is None:
            slices = tuple(slice(0, n) for n in self.shape)  # type: ignore[assignment]
        ranges = [np.arange(*s.indices(n)[:2]) for s, n in zip(slices, self.shape)]
        kk, jj, ii = np.meshgrid(*ranges, indexing="ij")
        idx = np.stack([kk, jj, ii], axis=-1).astype(float)
        return self.index_to_world(idx)

    def contains_world(self, points_mm: np.ndarray, margin_vox: float = 0.0) -> np.ndarray:
        """True where world points fall inside the voxel grid (with an optional margin)."""
        idx = self.world_to_index(points_mm)
        shape = np.array(self.shape, dtype=float)
        return np.all((idx >= -0.5 + margin_vox) & (idx <= shape - 0.5 - margin_vox), axis=-1)

    @property
    def centre_world(self) -> np.ndarray:
        """World mm of the geometric centre of the grid."""
        return self.index_to_world((np.array(self.shape, dtype=float) - 1) / 2.0)

    # ------------------------------------------------------------------ metadata
    def with_data(self, data: np.ndarray) -> "Volume":
        """A copy with other voxel values on the same grid and metadata."""
        return dataclasses.replace(self, data=data)

    def _time_text(self, moment: datetime | None) -> str | None:
        """ISO 8601; an unresolved wall-clock time without an offset (it has no zone yet)."""
        if moment is None:
            return None
        if self.time_basis == "unresolved":
            return moment.replace(tzinfo=None).isoformat()
        return moment.isoformat()

    def summary(self) -> dict[str, Any]:
        """JSON-ready description without voxel data (and without any patient identity)."""
        return {
            "series_uid": self.series_uid,
            "series_number": self.series_number,
            "series_description": self.series_description,
            "modality": self.modality,
            "frame": self.frame,
            "shape_zyx": list(self.shape),
            "spacing_mm_zyx": [round(float(s), 6) for s in self.spacing_mm],
            "affine": [[float(v) for v in row] for row in self.affine],
            "acquired_at": self._time_text(self.acquired_at),
            "scan_start": self._time_text(self.scan_start),
            "time_basis": self.time_basis,
            "time_zone": self.time_zone,
            "frame_duration_s": self.frame_duration_s,
            "decay_reference": self.decay_reference,
            "nuclide": self.nuclide,
            "original_units": self.original_units,
            "decay_correction": self.decay_correction,
            "scanner": dataclasses.asdict(self.scanner),
            "reconstruction": {**dataclasses.asdict(self.reconstruction), "label": self.reconstruction.label()},
            "source": self.source,
        }


def affine_from_axes(
    origin_mm: np.ndarray,
    row_direction: np.ndarray,
    column_direction: np.ndarray,
    slice_direction: np.ndarray,
    spacing_xyz_mm: tuple[float, float, float],
) -> np.ndarray:
    """Build an index -> world affine from DICOM-style direction cosines.

    Parameters
    ----------
    origin_mm : array_like (3,)
        World position of the centre of voxel (0, 0, 0).
    row_direction : array_like (3,)
        Direction in which the column index i increases (DICOM ImageOrientationPatient[:3]).
    column_direction : array_like (3,)
        Direction in which the row index j increases (ImageOrientationPatient[3:]).
    slice_direction : array_like (3,)
        Direction in which the slice index k increases.
    spacing_xyz_mm : (dx, dy, dz)
        Column spacing, row spacing and slice spacing in mm.
    """
    a = np.eye(4)
    dirs = [np.asarray(d, float) / np.linalg.norm(d) for d in (row_direction, column_direction, slice_direction)]
    for col, (d, s) in enumerate(zip(dirs, spacing_xyz_mm)):
        a[:3, col] = d * s
    a[:3, 3] = np.asarray(origin_mm, float)
    return a
