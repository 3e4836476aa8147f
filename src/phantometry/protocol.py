"""Protocol checks: was the phantom filled and scanned as the standard (or band set) asks?

Never errors: each check is information (``ok``, ``info``) or a ``warning``, listed in
``measurements.json`` (``protocol_checks``) and the report. The conditions:

* **Activity ratio** -- the fill record's insert-to-background ratio against each band set's
  ``activity_ratio`` (warning beyond +-10 %, as :data:`phantometry.bands.RATIO_WARNING_FRACTION`);
  without a band set, for the body phantom, against NEMA NU 2's 4:1 or 8:1 (the ratios are
  confirmed in shared/REFERENCE-VALUES.md).
* **Background at scan start** -- the true background concentration at the scan start against
  the recommended level: 2 kBq/mL for the EANM FDG harmonisation band sets (EANM guideline
  v2.0, Boellaard et al. 2015: "e.g. 20 kBq/mL spheres and 2 kBq/mL background", confirmed);
  5.3 kBq/mL for the NEMA NU 2 body phantom (recalled); about 3.7 MBq in the small-animal
  phantom, i.e. about 185 kBq/mL in its roughly 20 mL (NEMA NU 4-2008, recalled). A warning
  beyond +-20 % (phantometry's choice: the noise, not the bias, of the metrics depends on it).
* **Scan duration** -- the header's frame (bed) duration, information only: NEMA NU 2 asks for
  the time of a 100 cm whole-body scan done in 60 min, i.e. 60 min x axial step / 100 cm
  (recalled; the image's axial extent stands for the step, so the figure is approximate);
  NEMA NU 4-2008 about 20 min (recalled).
"""

from __future__ import annotations

import math
from dataclasses import asdict, dataclass
from typing import TYPE_CHECKING, Any, Sequence

from .bands import RATIO_WARNING_FRACTION

if TYPE_CHECKING:  # pragma: no cover
    from .bands import BandSet
    from .phantoms.base import Analysis

__all__ = ["ProtocolCheck", "protocol_checks"]

#: relative deviation of the background from the recommended level that warns
BACKGROUND_WARNING_FRACTION = 0.20

_NU2 = "NEMA NU 2 (recalled)"
_NU4 = "NEMA NU 4-2008 (recalled)"
_EANM = "EANM FDG PET/CT guideline v2.0 (Boellaard et al. 2015)"


@dataclass
class ProtocolCheck:
    """One acquisition condition compared with what a standard recommends.

    Attributes
    ----------
    check : ``activity_ratio``, ``background_at_scan_start`` or ``scan_duration``.
    status : ``ok``, ``info`` or ``warning``.
    message : one line for people.
    value, expected : the measured and the recommended number (``unit``).
    roi : the insert a ratio check is about, if any.
    source : where the recommendation comes from.
    """

    check: str
    status: str
    message: str
    value: float | None = None
    expected: float | None = None
    unit: str | None = None
    roi: str | None = None
    source: str | None = None

    def as_dict(self) -> dict[str, Any]:
        return asdict(self)


def _hot_ratios(analysis: "Analysis") -> dict[str, float]:
    """Insert -> activity ratio of the hot inserts the analysis has a truth for."""
    out = {}
    for name in analysis.true_insert_bq_ml:
        if analysis.fill.is_cold(name):
            continue
        try:
            out[name] = float(analysis.fill.activity_ratio(name))
        except Exception:  # an insert the fill record does not fill: nothing to check
            continue
    return out


def _ratio_checks(analysis: "Analysis", band_sets: Sequence["BandSet"]) -> list[ProtocolCheck]:
    ratios = _hot_ratios(analysis)
    if not ratios:
        return []
    targets = [(b.activity_ratio, f"band set {b.name}") for b in band_sets if b.activity_ratio]
    if not targets and analysis.template.analysis.kind == "body_image_quality":
        mean = sum(ratios.values()) / len(ratios)
        nearest = min((4.0, 8.0), key=lambda r: abs(mean / r - 1.0))
        targets = [(nearest, f"NEMA NU 2 ({nearest:g}:1, ratio confirmed)")]
    out = []
    for target, source in targets:
        for roi, r in sorted(ratios.items()):
            off = r / target - 1.0
            status = "ok" if abs(off) <= RATIO_WARNING_FRACTION else "warning"
            out.append(ProtocolCheck(
                "activity_ratio", status,
                f"{roi}: activity ratio {r:.3g}:1 against {target:g}:1 of {source} ({100 * off:+.0f} %)",
                r, float(target), "1", roi, source))
    return out


def _recommended_background(analysis: "Analysis", band_sets: Sequence["BandSet"]) -> tuple[float, str] | None:
    """(Bq/mL, source) the standard recommends at scan start, or None."""
    kind = analysis.template.analysis.kind
    if kind == "body_image_quality":
        if any(b.name.startswith("eanm-fdg") for b in band_sets):
            return 2000.0, _EANM
        return 5300.0, _NU2
    if kind == "small_animal_image_quality":
        return 185000.0, _NU4 + ": about 3.7 MBq in about 20 mL"
    return None


def _background_check(analysis: "Analysis", band_sets: Sequence["BandSet"]) -> list[ProtocolCheck]:
    rec = _recommended_background(analysis, band_sets)
    volume = analysis.volume
    start = volume.scan_start or volume.acquired_at
    if rec is None or start is None:
        return []
    try:
        value = float(analysis.fill.background_bq_ml(start))
    except Exception:  # a fill record that cannot be decayed to the start was refused before
        return []
    expected, source = rec
    off = value / expected - 1.0
    status = "ok" if abs(off) <= BACKGROUND_WARNING_FRACTION else "warning"
    return [ProtocolCheck(
        "background_at_scan_start", status,
        f"background {value / 1000.0:.3g} kBq/mL at the scan start against {expected / 1000.0:.3g} kBq/mL recommended "
        f"({100 * off:+.0f} %)", value, expected, "Bq/mL", None, source)]


def _duration_check(analysis: "Analysis") -> list[ProtocolCheck]:
    volume = analysis.volume
    duration = volume.frame_duration_s
    if duration is None or not math.isfinite(duration):
        return []
    kind = analysis.template.analysis.kind
    if kind == "body_image_quality":
        axial_mm = float(volume.spacing_mm[0] * volume.shape[0])
        expected = 3600.0 * axial_mm / 1000.0
        source = _NU2 + ": 100 cm in 60 min, the image's axial extent standing for the bed step"
    elif kind == "small_animal_image_quality":
        expected, source = 1200.0, _NU4
    else:
        return [ProtocolCheck("scan_duration", "info", f"frame duration {duration / 60.0:.3g} min", duration, None, "s")]
    return [ProtocolCheck(
        "scan_duration", "info",
        f"frame duration {duration / 60.0:.3g} min; the standard's recipe gives about {expected / 60.0:.3g} min",
        duration, expected, "s", None, source)]


def protocol_checks(analysis: "Analysis", band_sets: Sequence["BandSet"] = ()) -> list[ProtocolCheck]:
    """The protocol checks of an analysis (module docstring), in a fixed order."""
    return [*_ratio_checks(analysis, band_sets), *_background_check(analysis, band_sets), *_duration_check(analysis)]
