"""Finding the series of a comparison: every PET series under the inputs, in a fixed order."""

from __future__ import annotations

import os
from pathlib import Path
from typing import Sequence

from ..errors import InputError, NoPETSeries
from ..ranking import SeriesJob

_NIFTI_SUFFIXES = (".nii", ".nii.gz")


def _is_nifti(path: Path) -> bool:
    return path.is_file() and path.name.lower().endswith(_NIFTI_SUFFIXES)


def discover_jobs(inputs: Sequence[str | os.PathLike] | str | os.PathLike) -> tuple[list[SeriesJob], list[str]]:
    """Every PET series under the inputs: DICOM series (searched recursively) and NIfTI files.

    Parameters
    ----------
    inputs : path or list of paths
        Folders and/or files.

    Returns
    -------
    (jobs, notes)
        Jobs in discovery order (DICOM by Series Number, date and time, then UID; then NIfTI files by path),
        and notes about series that were skipped (non-PET modalities).

    Raises
    ------
    InputError
        A path does not exist.
    NoPETSeries
        No PET series anywhere in the inputs.
    """
    from ..io.dicom import discover_series

    paths = [Path(p) for p in ([inputs] if isinstance(inputs, (str, os.PathLike)) else inputs)]
    if not paths:
        raise InputError("no input given: name a folder of reconstructions or the series to compare")
    for p in paths:
        if not p.exists():
            raise InputError(f"{p}: no such file or folder")
    nifti: list[Path] = []
    dicom_roots: list[Path] = []
    for p in paths:
        if _is_nifti(p):
            nifti.append(p)
        else:
            dicom_roots.append(p)
            if p.is_dir():
                nifti.extend(q for q in p.rglob("*") if _is_nifti(q))
    notes: list[str] = []
    jobs: list[SeriesJob] = []
    if dicom_roots:
        infos = discover_series(dicom_roots)
        for info in infos:
            if info.modality != "PT":
                notes.append(f"skipped series {info.label()}: modality {info.modality or 'unknown'}, not PET")
                continue
            folders = {f.parent for f in info.files}
            where = str(folders.pop()) if len(folders) == 1 else f"series {info.series_uid}"
            jobs.append(
                SeriesJob(
                    number=len(jobs) + 1,
                    kind="dicom",
                    paths=tuple(str(f) for f in info.files),
                    series_uid=info.series_uid,
                    series_number=info.series_number,
                    series_description=info.series_description,
                    where=where,
                )
            )
    for p in sorted(set(nifti)):
        jobs.append(SeriesJob(number=len(jobs) + 1, kind="nifti", paths=(str(p),), where=str(p)))
    if not jobs:
        where = ", ".join(map(str, paths))
        raise NoPETSeries(f"{where}: no PET series (DICOM PT or NIfTI) found; give the folder holding the reconstructions")
    return jobs, notes


__all__ = ["SeriesJob", "discover_jobs"]
