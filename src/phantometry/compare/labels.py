"""Labels of the settings of a comparison: from a labels file, else from the reconstruction
attributes (DICOM Reconstruction Method with iterations and subsets, Convolution Kernel; matrix
and voxel size when they differ between the series; the Series Description, then the Series
Number, when labels would still collide)."""

from __future__ import annotations

import csv
import io
import os
from pathlib import Path
from typing import Sequence

from ..errors import InputError
from ..ranking import SeriesOutcome
from ..volume import Reconstruction


def load_labels(path: str | os.PathLike) -> dict[str, str]:
    """Read a labels file: series UID, series number or NIfTI file name -> label.

    YAML: a mapping ``{key: label}`` (optionally under a top-level ``labels:`` key).
    CSV: a header line with a key column (``series``, ``series_uid``, ``series_number`` or
    ``file``) and ``label``.

    Raises
    ------
    InputError
        Missing file, malformed content, empty labels.
    """
    p = Path(path)
    if not p.is_file():
        raise InputError(f"{p}: labels file not found; give a YAML or CSV file mapping series to labels")
    try:
        text = p.read_text(encoding="utf-8")
    except UnicodeDecodeError:
        raise InputError(f"{p}: the labels file is not UTF-8 text; save it as UTF-8") from None
    except OSError as exc:
        raise InputError(f"{p}: cannot read the labels file ({exc.strerror or exc})") from None
    out: dict[str, str] = {}
    if p.suffix.lower() == ".csv":
        rows = list(csv.DictReader(io.StringIO(text)))
        if not rows:
            raise InputError(f"{p}: no rows; expected a header 'series,label' and one line per series")
        keys = [k for k in ("series", "series_uid", "series_number", "file") if k in rows[0]]
        if not keys or "label" not in rows[0]:
            raise InputError(f"{p}: header must name a key column (series, series_uid, series_number or file) and label; found {', '.join(rows[0])}")
        for n, row in enumerate(rows, start=2):
            key = (row.get(keys[0]) or "").strip()
            label = (row.get("label") or "").strip()
            if not key or not label:
                raise InputError(f"{p}: line {n}: empty {keys[0] if not key else 'label'}; give both the series and its label")
            out[key] = label
        return out
    from ..yamlfile import parse_yaml_text

    data = parse_yaml_text(text, str(p), InputError)
    if isinstance(data, dict) and set(data) == {"labels"}:
        data = data["labels"]
    if not isinstance(data, dict) or not data:
        raise InputError(f"{p}: expected a mapping 'series UID or number: label', got {type(data).__name__}")
    for key, label in data.items():
        if label is None or str(label).strip() == "":
            raise InputError(f"{p}: {key}: empty label; give a label or remove the line")
        out[str(key).strip()] = str(label).strip()
    return out


def _core_label(rec: Reconstruction | None) -> str:
    if rec is None:
        return ""
    head = " ".join(x for x in (rec.method, f"{rec.iterations or '?'}i{rec.subsets or '?'}s" if (rec.iterations or rec.subsets) else None) if x)
    return ", ".join(x for x in (head, rec.filter) if x)


def _geometry_label(rec: Reconstruction | None) -> str:
    if rec is None:
        return ""
    parts = []
    if any(rec.matrix):
        parts.append(f"{rec.matrix[0]}x{rec.matrix[1]}")
    if any(rec.voxel_size_mm):
        parts.append("x".join(f"{v:.3g}" for v in rec.voxel_size_mm) + " mm")
    return ", ".join(parts)


def assign_labels(outcomes: Sequence[SeriesOutcome], mapping: dict[str, str] | None = None) -> list[str]:
    """Label every outcome in place and return warnings (unused or duplicate labels).

    A mapping entry matches a Series Instance UID, a Series Number or a NIfTI file name (with
    or without its extension). Other series are labelled from their reconstruction attributes
    (see the module notes; matrix and voxel size are added when they differ between the
    measured series); labels are made unique by adding the Series Description, then
    ``#number``.
    """
    mapping = dict(mapping or {})
    used: set[str] = set()
    notes: list[str] = []

    def mapped(o: SeriesOutcome) -> str | None:
        j = o.job
        keys = []
        if j.series_uid:
            keys.append(j.series_uid)
        if j.series_number is not None:
            keys.append(str(j.series_number))
        if j.kind == "nifti":
            name = Path(j.paths[0]).name
            keys += [name, name.split(".")[0]]
        for k in keys:
            if k in mapping:
                used.add(k)
                return mapping[k]
        return None

    measured = [o for o in outcomes if o.ok and o.reconstruction is not None] or [o for o in outcomes if o.reconstruction is not None]
    geometries = {_geometry_label(o.reconstruction) for o in measured}
    with_geometry = len(geometries) > 1
    auto: dict[int, str] = {}
    for o in outcomes:
        m = mapped(o)
        if m is not None:
            o.label = m
            continue
        parts = [_core_label(o.reconstruction)]
        if with_geometry or not parts[0]:
            parts.append(_geometry_label(o.reconstruction))
        text = ", ".join(p for p in parts if p)
        auto[id(o)] = text or (o.job.series_description or Path(o.job.paths[0]).name)
        o.label = auto[id(o)]
    # make automatic labels unique: add the description, then the number
    for step in ("description", "number"):
        counts: dict[str, int] = {}
        for o in outcomes:
            counts[o.label] = counts.get(o.label, 0) + 1
        for o in outcomes:
            if counts[o.label] > 1 and id(o) in auto:
                if step == "description" and o.job.series_description and o.job.series_description not in o.label:
                    o.label = f"{o.label} [{o.job.series_description}]"
                elif step == "number":
                    o.label = f"{o.label} #{o.job.series_number if o.job.series_number is not None else o.job.number}"
    counts = {}
    for o in outcomes:
        counts[o.label] = counts.get(o.label, 0) + 1
    for label, n in counts.items():
        if n > 1:
            notes.append(f"label {label!r} is given to {n} series; tell them apart in the labels file")
    unused = sorted(set(mapping) - used)
    if unused:
        notes.append(f"labels file entries match no series: {', '.join(unused)}")
    return notes


__all__ = ["load_labels", "assign_labels"]
