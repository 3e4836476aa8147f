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


def files_under(paths: Sequence[Path]) -> list[Path]:
    """Every file under ``paths`` (folders searched recursively, files as given), following
    symbolic links to folders and files.

    Each real folder is searched once and each real file listed once, whatever the links
    leading to it: a link back to a folder above it (a loop) or a second link to the same
    folder adds nothing. Files keep the path they were reached by (the first one, in sorted
    order), so messages name them as the user sees them. Folders that cannot be read are
    skipped.
    """
    seen_dirs: set[str] = set()
    seen_files: set[str] = set()
    out: list[Path] = []

    def add_file(p: Path) -> None:
        real = os.path.realpath(p)
        if real not in seen_files:
            seen_files.add(real)
            out.append(p)

    for root in paths:
        if not root.is_dir():
            add_file(root)
            continue
        stack = [root]
        while stack:
            folder = stack.pop()
            real = os.path.realpath(folder)
            if real in seen_dirs:
                continue
            seen_dirs.add(real)
            try:
                entries = sorted(os.scandir(folder), key=lambda e: e.name)
            except OSError:
                continue
            subfolders = []
            for e in entries:
                try:
                    if e.is_dir(follow_symlinks=True):
                        subfolders.append(Path(e.path))
                    elif e.is_file(follow_symlinks=True):
                        add_file(Path(e.path))
                except OSError:  # a dangling or unreadable link
                    continue
            stack.extend(reversed(subfolders))  # depth first, in name order
    return out


def discover_jobs(inputs: Sequence[str | os.PathLike] | str | os.PathLike) -> tuple[list[SeriesJob], list[str]]:
    """Every PET series under the inputs: DICOM series (searched recursively) and NIfTI files.

    Parameters
    ----------
    inputs : path or list of paths
        Folders and/or files. Folders are searched recursively, following symbolic links to
        folders, each real folder once (:func:`files_under`).

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
    dicom_files: list[Path] = []
    for f in files_under(paths):
        (nifti if _is_nifti(f) else dicom_files).append(f)
    notes: list[str] = []
    jobs: list[SeriesJob] = []
    if dicom_files:
        infos = discover_series(dicom_files)
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


__all__ = ["SeriesJob", "discover_jobs", "files_under"]
