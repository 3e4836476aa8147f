"""Labels and identity of a recorded analysis: site, scanner and protocol labels, settings hash, record key.

A label given by the user is used as given (white space collapsed); a missing one is derived
from the headers and the fill record by :func:`default_site_label`,
:func:`default_scanner_label` and :func:`default_protocol_label`. Two analyses are the same
analysis (a duplicate, refused unless replaced) when their :func:`record_key` agrees: the same
series (its UID, else its acquisition time), template and :func:`settings_hash`.
"""

from __future__ import annotations

import hashlib
import json
from datetime import datetime, timezone
from typing import Any, Mapping

from ..errors import LedgerError


def clean_label(value: Any, what: str, where: str) -> str:
    """A label with its white space collapsed; refused when empty (its length: ``schema.check_text``).

    Raises
    ------
    LedgerError
        The label is missing or only white space.
    """
    text = " ".join(str(value).split()) if value is not None else ""
    if not text:
        raise LedgerError(f"{where}: the {what} label is empty; give --{what} NAME")
    return text


def default_scanner_label(series: Mapping[str, Any]) -> str:
    """Scanner label from the headers: station name, else make, model and serial."""
    sc = series.get("scanner") or {}
    if sc.get("station"):
        return str(sc["station"])
    parts = [sc.get(k) for k in ("manufacturer", "model", "serial") if sc.get(k)]
    return " ".join(str(p) for p in parts) if parts else "unknown scanner"


def default_protocol_label(series: Mapping[str, Any]) -> str:
    """Protocol label from the reconstruction: method, iterations x subsets, filter, voxel size.

    The matrix is left out (its slice count follows the axial coverage, not the protocol).
    """
    rec = series.get("reconstruction") or {}
    parts: list[str] = []
    method = rec.get("method")
    if method:
        parts.append(str(method))
    it, sub = rec.get("iterations"), rec.get("subsets")
    if it or sub:
        text = f"{it or '?'}i{sub or '?'}s"
        if not method or text not in str(method):
            parts.append(text)
    if rec.get("filter"):
        parts.append(str(rec["filter"]))
    vox = rec.get("voxel_size_mm")
    if vox and any(vox):
        parts.append("x".join(f"{float(v):.3g}" for v in vox) + " mm")
    return ", ".join(parts) if parts else "unspecified protocol"


def default_site_label(fill_record: Mapping[str, Any] | None) -> str:
    """Site label from the fill record's ``site``, else ``unspecified site``."""
    site = (fill_record or {}).get("site")
    return str(site) if site else "unspecified site"


def _canonical_json(obj: Any) -> str:
    return json.dumps(obj, sort_keys=True, separators=(",", ":"), default=str, allow_nan=False)


def settings_hash(fill_record: Mapping[str, Any] | None, settings: Mapping[str, Any] | None = None) -> str:
    """SHA-256 (hex) of the settings that make two analyses of one series differ.

    The settings are the fill record and any extra ``settings`` mapping (canonical JSON with
    sorted keys), so re-measuring a series with another fill record is a new analysis,
    while recording the same measurement twice is a duplicate.
    """
    return hashlib.sha256(_canonical_json({"fill_record": fill_record or None, "settings": settings or None}).encode()).hexdigest()


def record_key(series_uid: str | None, acquired_at: datetime, template: str, settings_hash_hex: str) -> str:
    """SHA-256 (hex) identity of an analysis: series (UID, else acquisition time), template, settings hash."""
    identity = f"series:{series_uid}" if series_uid else f"acquired:{acquired_at.astimezone(timezone.utc).isoformat()}"
    return hashlib.sha256(f"{identity}\x1f{template}\x1f{settings_hash_hex}".encode()).hexdigest()


__all__ = [
    "clean_label",
    "default_protocol_label",
    "default_scanner_label",
    "default_site_label",
    "record_key",
    "settings_hash",
]
