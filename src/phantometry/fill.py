"""The fill record: how a phantom was filled, and the true concentrations it implies.

A physicist writes the fill record (a small YAML file) when preparing a phantom::

    nuclide: F-18
    background:
      concentration_kbq_ml: 5.30
      measured_at: 2026-11-03T09:40:00+01:00
    spheres:                       # or rods: (small-animal phantoms)
      ratio_to_background: 4.0
    cold: [sphere_28mm, sphere_37mm]   # inserts filled with non-radioactive water
    inserts:                       # optional per-insert overrides of the spheres entry
      sphere_10mm: {concentration_kbq_ml: 21.0, measured_at: 2026-11-03T09:45:00+01:00}
    site: Demo Hospital            # optional free text: site, phantom, operator_note
    phantom: iec-body
    operator_note: filled with the 9.7 L water bath

Forms of an activity entry (exactly one per entry):

* **concentration**: ``concentration_kbq_ml`` (kBq/mL) measured at ``measured_at``.
* **ratio** (``spheres``/``rods``/``inserts`` only): ``ratio_to_background``, the insert to
  background concentration ratio (a_H/a_B of NEMA NU 2), the same at every time for one
  nuclide.
* **syringe** (``background``, ``spheres``/``rods``): the activity put into a known volume,
  from dose-calibrator readings: ``syringe_mbq`` measured at ``syringe_measured_at``, the
  ``residual_mbq`` left in the syringe measured at ``residual_measured_at``, and the
  ``volume_ml`` of water it was diluted in (the phantom background, or the sphere stock
  solution). The rule is::

      C(residual_measured_at) = (A_syringe * exp(-lambda * (t_residual - t_syringe)) - A_residual) / V

  i.e. the syringe reading is decayed to the residual reading's time, the residual is
  subtracted, and the net activity is spread over ``volume_ml``; the concentration refers to
  ``residual_measured_at`` (decay law with lambda = ln 2 / T_half, half-lives from
  :mod:`phantometry.nuclides`). The volume of the activity itself is neglected. A residual of
  0 MBq is allowed (a rinsed syringe); the residual must be measured at or after the syringe,
  and the net activity must be positive.

**Site time zone** (optional): ``timezone: Europe/Berlin`` (an IANA name, daylight-saving
aware) names the zone of the site's clocks. Scanner times written without a UTC offset are read
in it (:mod:`phantometry.sitetime`); ``--timezone`` overrides it.

**Uncertainties** (optional; standard uncertainties, k = 1, GUM)::

    uncertainty:
      activity_pct: 1.5      # each dose-calibrator reading (syringe, residual, concentration)
      calibration_pct: 2.0   # the calibrator's calibration, common to every reading
      residual_mbq: 0.02     # each residual reading, MBq (instead of activity_pct)
      ratio_pct: 1.0         # a ratio_to_background stated without readings
    background:
      ...
      volume_u_ml: 50        # (syringe form) standard uncertainty of volume_ml

Readings are independent of each other except for the calibration, a factor common to all of
them (it cancels in an activity ratio). :meth:`FillRecord.uncertainties` propagates them to
the true concentrations and activity ratios by the law of propagation of uncertainty (GUM,
JCGM 100:2008, eq. 10, with central-difference sensitivity coefficients); the README says how
they reach recovery coefficients, activity recovery and percent contrast.

Times must carry a time-zone offset (``2026-11-03T09:40:00+01:00``). Activities and volumes
must be positive. Unknown keys are refused by name, so a misspelt key never goes unnoticed, and
no personal data can be stored. The YAML holds kBq/mL and MBq; the API returns Bq/mL.
"""

from __future__ import annotations

import os
import types
import typing
from dataclasses import dataclass
from datetime import datetime
from pathlib import Path
from typing import Annotated, Any, ClassVar

import numpy as np
import yaml
from pydantic import (
    BaseModel,
    BeforeValidator,
    ConfigDict,
    Field,
    InstanceOf,
    PlainSerializer,
    PrivateAttr,
    ValidationError,
    model_validator,
)

from .timeutil import parse_aware_time, zone_from_name
from .yamlfile import read_yaml_file, validation_problems
from .errors import FillRecordError, InputError
from .nuclides import DecayGapError, Nuclide, decay_factor, get_nuclide

__all__ = [
    "BackgroundFill",
    "FillRecord",
    "FillUncertainty",
    "FillUncertaintyInputs",
    "InsertFill",
    "SpheresFill",
    "load_fill_record",
    "write_fill_record",
]

_KBQ = 1.0e3  # Bq per kBq
_MBQ = 1.0e6  # Bq per MBq
#: Range of concentrations (Bq/mL) accepted from a fill record, at its own times and at the
#: scan time: far beyond any phantom in both directions, narrow enough that every quantity
#: derived from one (ratios to measured values, recovery coefficients) is a finite number.
USABLE_BQ_ML = (1.0e-9, 1.0e15)
#: the keys that make up each activity form, for messages
_FORM_FIELDS = {
    "concentration": "concentration_kbq_ml",
    "ratio": "ratio_to_background",
    "syringe": "syringe_mbq, residual_mbq and volume_ml",
}


# ---------------------------------------------------------------------------- field types
def _number(value: Any) -> Any:
    """Refuse booleans (YAML ``yes``/``true``), which pydantic would read as 1.0."""
    if isinstance(value, bool):
        raise ValueError(f"expected a number, got {value!r}")
    return value


def _aware_time(value: Any) -> datetime:
    """An ISO 8601 date-time with a time-zone offset (a string or a YAML timestamp)."""
    return parse_aware_time(value, "", ValueError)


def _zone_name(value: Any) -> str:
    """An IANA time-zone name the zoneinfo database knows (``Europe/Berlin``)."""
    if not isinstance(value, str):
        raise ValueError(f"expected an IANA time-zone name such as Europe/Berlin, got {value!r}")
    try:
        zone_from_name(value, "timezone")
    except InputError as exc:
        raise ValueError(str(exc).removeprefix("timezone: ")) from None
    return value.strip()


def _nuclide(value: Any) -> Nuclide:
    if isinstance(value, Nuclide):
        return value
    try:
        return get_nuclide(str(value))
    except InputError as exc:
        raise ValueError(str(exc)) from None


PositiveFloat = Annotated[float, BeforeValidator(_number), Field(gt=0, allow_inf_nan=False)]
NonNegativeFloat = Annotated[float, BeforeValidator(_number), Field(ge=0, allow_inf_nan=False)]
AwareTime = Annotated[datetime, BeforeValidator(_aware_time)]
ZoneName = Annotated[str, BeforeValidator(_zone_name)]
NuclideField = Annotated[InstanceOf[Nuclide], BeforeValidator(_nuclide), PlainSerializer(lambda n: n.name, return_type=str)]


# ---------------------------------------------------------------------------- entries
class _Strict(BaseModel):
    model_config = ConfigDict(extra="forbid", frozen=True, allow_inf_nan=False)


class _ActivityEntry(_Strict):
    """Base of the activity entries: checks that exactly one complete form is given."""

    #: form name -> keys it needs; subclasses keep the forms whose keys they declare
    _FORMS: ClassVar[dict[str, tuple[str, ...]]] = {
        "concentration": ("concentration_kbq_ml", "measured_at"),
        "ratio": ("ratio_to_background",),
        "syringe": ("syringe_mbq", "syringe_measured_at", "residual_mbq", "residual_measured_at", "volume_ml"),
    }

    @classmethod
    def _forms(cls) -> dict[str, tuple[str, ...]]:
        return {name: keys for name, keys in cls._FORMS.items() if keys[0] in cls.model_fields}

    @classmethod
    def _describe_forms(cls) -> str:
        return ", or ".join(" + ".join(keys) for keys in cls._forms().values())

    @model_validator(mode="after")
    def _one_complete_form(self) -> "_ActivityEntry":
        given = {name: [k for k in keys if getattr(self, k) is not None] for name, keys in self._forms().items()}
        used = [name for name, keys in given.items() if keys]
        if not used:
            raise ValueError(f"no activity given; give {self._describe_forms()}")
        if len(used) > 1:
            keys = " and ".join(given[name][0] for name in used)
            raise ValueError(f"both {keys} given; give only one of: {self._describe_forms()}")
        missing = [k for k in self._forms()[used[0]] if getattr(self, k) is None]
        if missing:
            raise ValueError(f"missing {', '.join(missing)} (needed with {', '.join(given[used[0]])})")
        if used[0] == "syringe" and self.residual_measured_at < self.syringe_measured_at:  # type: ignore[attr-defined]
            raise ValueError("residual_measured_at is before syringe_measured_at; the residual is measured after dispensing")
        return self

    @property
    def form(self) -> str:
        """``"concentration"``, ``"ratio"`` or ``"syringe"``."""
        return next(name for name, keys in self._forms().items() if getattr(self, keys[0]) is not None)

    def reference_bq_ml(self, nuclide: Nuclide) -> tuple[float, datetime] | None:
        """Concentration (Bq/mL) and the time it refers to; None for the ratio form.

        The syringe form follows the rule in the module docstring.
        """
        form = self.form
        if form == "concentration":
            return self.concentration_kbq_ml * _KBQ, self.measured_at  # type: ignore[attr-defined]
        if form == "syringe":
            s: Any = self
            net_mbq = s.syringe_mbq * decay_factor(nuclide, s.syringe_measured_at, s.residual_measured_at) - s.residual_mbq
            return net_mbq * _MBQ / s.volume_ml, s.residual_measured_at
        return None


class _ConcentrationForm(_ActivityEntry):
    concentration_kbq_ml: PositiveFloat | None = None
    measured_at: AwareTime | None = None


class _SyringeForm(_ActivityEntry):
    syringe_mbq: PositiveFloat | None = None
    syringe_measured_at: AwareTime | None = None
    residual_mbq: NonNegativeFloat | None = None
    residual_measured_at: AwareTime | None = None
    volume_ml: PositiveFloat | None = None
    #: standard uncertainty of ``volume_ml`` (mL), optional
    volume_u_ml: NonNegativeFloat | None = None

    @model_validator(mode="after")
    def _volume_u_needs_volume(self) -> "_SyringeForm":
        if self.volume_u_ml is not None and self.volume_ml is None:
            raise ValueError("volume_u_ml is the uncertainty of volume_ml, which is not given")
        return self


class _RatioForm(_ActivityEntry):
    ratio_to_background: PositiveFloat | None = None


class FillUncertaintyInputs(_Strict):
    """Standard uncertainties (k = 1) of the fill record's inputs; see the module docstring."""

    activity_pct: NonNegativeFloat | None = None
    calibration_pct: NonNegativeFloat | None = None
    residual_mbq: NonNegativeFloat | None = None
    ratio_pct: NonNegativeFloat | None = None


class BackgroundFill(_ConcentrationForm, _SyringeForm):
    """The background: a concentration at a time, or a syringe diluted in ``volume_ml``."""


class SpheresFill(_ConcentrationForm, _RatioForm, _SyringeForm):
    """The common fill of the hot inserts: concentration, ratio to background or syringe."""


class InsertFill(_ConcentrationForm, _RatioForm):
    """One insert's own fill (overrides the spheres entry): concentration or ratio."""


# ---------------------------------------------------------------------------- the record
class FillRecord(_Strict):
    """A validated fill record; see the module docstring for the file format.

    Build one with :func:`load_fill_record` or :meth:`from_dict`. Concentrations are returned
    in Bq/mL, decay-corrected with the physical decay law ``A(t) = A(t0) exp(-lambda (t - t0))``
    (:func:`phantometry.nuclides.decay_factor`).
    """

    nuclide: NuclideField
    background: BackgroundFill
    spheres: SpheresFill | None = None
    rods: SpheresFill | None = None
    inserts: dict[str, InsertFill] | None = None
    cold: list[str] = Field(default_factory=list)
    site: str | None = None
    phantom: str | None = None
    operator_note: str | None = None
    timezone: ZoneName | None = None
    uncertainty: FillUncertaintyInputs | None = None

    _source: str = PrivateAttr(default="fill record")

    @model_validator(mode="after")
    def _consistent(self) -> "FillRecord":
        if self.spheres is not None and self.rods is not None:
            raise ValueError("spheres, rods: both given; rods is another name for spheres, give one")
        problems = []
        for name in sorted(set(self.cold) & set(self.inserts or {})):
            problems.append(f"inserts.{name}: {name} is also listed in cold; remove one")
        for name in sorted({n for n in self.cold if self.cold.count(n) > 1}):
            problems.append(f"cold: {name} listed twice")
        entries = [(key, getattr(self, key)) for key in ("background", "spheres", "rods")]
        entries += [(f"inserts.{name}", entry) for name, entry in (self.inserts or {}).items()]
        references: dict[str, float] = {}
        for key, entry in entries:
            if entry is None:
                continue
            try:
                ref = entry.reference_bq_ml(self.nuclide)
            except DecayGapError as exc:
                problems.append(f"{key}: syringe_measured_at to residual_measured_at: {exc}")
                continue
            if ref is None:
                continue
            if entry.form == "syringe" and ref[0] <= 0:
                problems.append(
                    f"{key}: residual_mbq {entry.residual_mbq:g} MBq is not less than syringe_mbq decayed to "
                    f"residual_measured_at ({entry.residual_mbq + ref[0] * entry.volume_ml / _MBQ:.4g} MBq); "
                    "check the readings and their times"
                )
                continue
            problem = _unusable(key, entry, ref[0])
            if problem:
                problems.append(problem)
            else:
                references[key] = ref[0]
        background = references.get("background")
        for key, entry in entries:
            if key != "background" and entry is not None and entry.form == "ratio" and background is not None:
                problem = _unusable(key, entry, entry.ratio_to_background * background)  # type: ignore[attr-defined]
                if problem:
                    problems.append(problem)
        if problems:
            raise ValueError("; ".join(problems))
        return self

    def check_inserts(self, template: Any) -> None:
        """Refuse insert names in ``cold`` and ``inserts`` that the template contradicts.

        A name in ``inserts`` must be an insert the template lets the fill record fill
        (``fill: fill_record``); a name in ``cold`` may also be one the template already holds
        cold (``fill: cold``). Any other name (misspelt, of another phantom, or an insert the
        template fills with the background solution or makes of plastic) would be ignored.

        Parameters
        ----------
        template : :class:`phantometry.templates.Template`

        Raises
        ------
        FillRecordError
            Naming each such insert and listing the template's fillable inserts.
        """
        fills = {i.name: i.fill for i in template.inserts}
        fillable = [name for name, how in fills.items() if how == "fill_record"]
        problems = []
        for key, names, allowed in (("cold", self.cold, ("fill_record", "cold")), ("inserts", list(self.inserts or {}), ("fill_record",))):
            for name in names:
                if name not in fills:
                    problems.append(f"{key}: {name} is not an insert of template {template.name}")
                elif fills[name] not in allowed:
                    problems.append(f"{key}: {name} is filled by template {template.name} itself (fill: {fills[name]})")
        if problems:
            raise FillRecordError(
                f"{self._source}: {'; '.join(problems)}; the fill record fills {', '.join(fillable) or 'no insert'} "
                "of this template: fix the name or use the right template"
            )

    # ------------------------------------------------------------------ construction
    @classmethod
    def from_dict(cls, data: Any, source: str | os.PathLike | None = None) -> "FillRecord":
        """Validate a parsed fill record.

        Parameters
        ----------
        data : mapping
            The YAML document as parsed (strings or datetimes for times).
        source : str or path, optional
            Where it came from, named in error messages.

        Raises
        ------
        FillRecordError
            One line ``SOURCE: field.path: problem; ...`` listing every problem found.
        """
        where = str(source) if source is not None else "fill record"
        if not isinstance(data, dict):
            raise FillRecordError(f"{where}: expected a mapping of keys (nuclide, background, ...), got {type(data).__name__}")
        try:
            record = cls.model_validate(data)
        except ValidationError as exc:
            raise FillRecordError(f"{where}: {_flatten(exc)}; fix the fill record") from None
        record._source = where
        return record

    def to_dict(self) -> dict[str, Any]:
        """The record as plain YAML/JSON-ready data (times as ISO 8601 strings); round-trips."""
        d = self.model_dump(mode="json", exclude_none=True)
        if not d.get("cold"):
            d.pop("cold", None)
        return d

    # ------------------------------------------------------------------ queries
    @property
    def source(self) -> str:
        """The file (or label) the record was read from."""
        return self._source

    @property
    def hot_fill(self) -> SpheresFill | None:
        """The ``spheres`` entry, or ``rods`` when the record uses that name."""
        return self.spheres if self.spheres is not None else self.rods

    def is_cold(self, name: str) -> bool:
        """True if the insert ``name`` is listed in ``cold`` (non-radioactive water)."""
        return name in self.cold

    def background_bq_ml(self, at: datetime) -> float:
        """True background concentration (Bq/mL) at the timezone-aware time ``at``.

        Raises
        ------
        FillRecordError
            When ``at`` is too far from the record's time for decay correction
            (:data:`phantometry.nuclides.MAX_DECAY_HALF_LIVES`), or the result is outside
            :data:`USABLE_BQ_ML`.
        """
        conc, ref_time = self.background.reference_bq_ml(self.nuclide)  # type: ignore[misc]
        return self._at_scan("background", self.background, conc, ref_time, at)

    def _at_scan(
        self, key: str, entry: "_ActivityEntry", conc: float, ref_time: datetime, at: datetime, target: str = "the scan time",
        imaged: bool = True,
    ) -> float:
        """``conc`` (Bq/mL at ``ref_time``) decayed to ``at``; refusals name the file and field.

        With ``imaged``, the concentration the image shows: for a parent imaged through its
        daughter (Ge-68/Ga-68) times :attr:`~phantometry.nuclides.Nuclide.imaged_activity_ratio`.
        """
        time_key = "residual_measured_at" if entry.form == "syringe" else "measured_at"
        try:
            value = conc * decay_factor(self.nuclide, ref_time, at) * (self.nuclide.imaged_activity_ratio if imaged else 1.0)
        except DecayGapError as exc:
            raise FillRecordError(f"{self._source}: {key}.{time_key} to {target}: {exc}") from None
        low, high = USABLE_BQ_ML
        if not low <= value <= high:
            raise FillRecordError(
                f"{self._source}: {key}: {_FORM_FIELDS[entry.form]} give {value:.3g} Bq/mL at {target} "
                f"{at.isoformat()}, outside {low:g} to {high:g} Bq/mL; check the values and dates"
            )
        return value

    def _entry(self, name: str) -> _ActivityEntry:
        if self.inserts and name in self.inserts:
            return self.inserts[name]
        if self.hot_fill is None:
            raise FillRecordError(
                f"{self._source}: no fill given for insert {name!r}; add spheres: (or rods:), inserts: {name}: ..., "
                f"or list it in cold"
            )
        return self.hot_fill

    def _entry_key(self, name: str) -> str:
        """The fill-record key of the entry that fills insert ``name`` (for messages)."""
        if self.inserts and name in self.inserts:
            return f"inserts.{name}"
        return "spheres" if self.spheres is not None else "rods"

    def insert_bq_ml(self, name: str, at: datetime) -> float:
        """True concentration (Bq/mL) of insert ``name`` at the timezone-aware time ``at``.

        0.0 for inserts listed in ``cold``; else the insert's own ``inserts`` entry, else the
        ``spheres``/``rods`` entry: ratio x background, or the concentration decayed to ``at``.
        """
        if self.is_cold(name):
            return 0.0
        entry = self._entry(name)
        ref = entry.reference_bq_ml(self.nuclide)
        if ref is None:
            return entry.ratio_to_background * self.background_bq_ml(at)  # type: ignore[attr-defined]
        key = self._entry_key(name)
        return self._at_scan(key, entry, ref[0], ref[1], at)

    def activity_ratio(self, name: str) -> float:
        """Insert to background concentration ratio a_H/a_B (NEMA NU 2 image quality test).

        Time-independent for one nuclide, since both decay alike; 0.0 for cold inserts.
        """
        if self.is_cold(name):
            return 0.0
        entry = self._entry(name)
        ref = entry.reference_bq_ml(self.nuclide)
        if ref is None:
            return float(entry.ratio_to_background)  # type: ignore[attr-defined]
        key = self._entry_key(name)
        bg, bg_time = self.background.reference_bq_ml(self.nuclide)  # type: ignore[misc]
        return ref[0] / self._at_scan("background", self.background, bg, bg_time, ref[1], target=f"{key}'s time", imaged=False)

    # ------------------------------------------------------------------ times
    def times(self) -> list[tuple[str, datetime]]:
        """Every time the record holds, as (field path, time), in file order."""
        out: list[tuple[str, datetime]] = []
        entries = [(key, getattr(self, key)) for key in ("background", "spheres", "rods")]
        entries += [(f"inserts.{name}", entry) for name, entry in (self.inserts or {}).items()]
        for key, entry in entries:
            if entry is None:
                continue
            for field_name in ("measured_at", "syringe_measured_at", "residual_measured_at"):
                t = getattr(entry, field_name, None)
                if t is not None:
                    out.append((f"{key}.{field_name}", t))
        return out

    # ------------------------------------------------------------------ uncertainties
    @property
    def has_uncertainties(self) -> bool:
        """True when the record states any input uncertainty (``uncertainty:`` or ``volume_u_ml``)."""
        return bool(self.uncertainty is not None or any(u for _, _, u, _ in self._uncertain_inputs()))

    def _uncertain_inputs(self) -> list[tuple[str, str, float, bool]]:
        """(entry key, field, standard uncertainty in the field's unit, is a reading) of every input."""
        u = self.uncertainty or FillUncertaintyInputs()
        rel = (u.activity_pct or 0.0) / 100.0
        out: list[tuple[str, str, float, bool]] = []
        entries = [(key, getattr(self, key)) for key in ("background", "spheres", "rods")]
        entries += [(f"inserts.{name}", entry) for name, entry in (self.inserts or {}).items()]
        for key, entry in entries:
            if entry is None:
                continue
            form = entry.form
            if form == "concentration":
                out.append((key, "concentration_kbq_ml", rel * entry.concentration_kbq_ml, True))
            elif form == "ratio":
                out.append((key, "ratio_to_background", (u.ratio_pct or 0.0) / 100.0 * entry.ratio_to_background, False))
            else:
                out.append((key, "syringe_mbq", rel * entry.syringe_mbq, True))
                u_res = u.residual_mbq if u.residual_mbq is not None else rel * entry.residual_mbq
                out.append((key, "residual_mbq", u_res, True))
                out.append((key, "volume_ml", entry.volume_u_ml or 0.0, False))
        return out

    def _perturbed(self, deltas: dict[tuple[str, str], float], calibration: float = 1.0) -> "FillRecord":
        """A copy with inputs moved by ``deltas`` (in their units) and every reading scaled by
        ``calibration`` (no validation: a step of the propagation, not a record)."""
        readings = {(k, f) for k, f, _, is_reading in self._uncertain_inputs() if is_reading}
        updates: dict[str, Any] = {}
        inserts = dict(self.inserts or {})
        keys = {k for k, _, _, _ in self._uncertain_inputs()}
        for key in keys:
            entry = inserts[key.split(".", 1)[1]] if key.startswith("inserts.") else getattr(self, key)
            change = {}
            for (k, f), d in deltas.items():
                if k == key:
                    change[f] = getattr(entry, f) + d
            for k, f in readings:
                if k == key:
                    change[f] = change.get(f, getattr(entry, f)) * calibration
            if not change:
                continue
            new_entry = entry.model_copy(update=change)
            if key.startswith("inserts."):
                inserts[key.split(".", 1)[1]] = new_entry
            else:
                updates[key] = new_entry
        if self.inserts is not None:
            updates["inserts"] = inserts
        copy = self.model_copy(update=updates)
        copy._source = self._source
        return copy

    def uncertainties(self, at: datetime, names: list[str]) -> "FillUncertainty":
        """Relative standard uncertainties of the true concentrations at ``at`` and standard
        uncertainties of the activity ratios of the inserts ``names``.

        Law of propagation of uncertainty for uncorrelated inputs (GUM, JCGM 100:2008, eq. 10)
        with the calibration as one more input common to every reading; sensitivity
        coefficients by central differences of the record's own rules (steps of 1/1000 of each
        standard uncertainty, where the model is linear to far better than 1e-6).
        """
        inputs = [(k, f, u) for k, f, u, _ in self._uncertain_inputs() if u > 0]
        u_cal = ((self.uncertainty.calibration_pct or 0.0) / 100.0) if self.uncertainty else 0.0
        hot = [n for n in names if not self.is_cold(n)]

        def outputs(record: "FillRecord") -> np.ndarray:
            vals = [record.background_bq_ml(at)]
            vals += [record.insert_bq_ml(n, at) for n in hot]
            vals += [record.activity_ratio(n) for n in hot]
            return np.array(vals, float)

        y0 = outputs(self)
        var = np.zeros_like(y0)
        steps: list[tuple[dict[tuple[str, str], float], float, float]] = [({(k, f): 1e-3 * u}, 1.0, u) for k, f, u in inputs]
        for delta, _, u in steps:
            (key, val), = delta.items()
            up = outputs(self._perturbed({key: val}))
            down = outputs(self._perturbed({key: -val}))
            var += ((up - down) / (2e-3 * u) * u) ** 2
        if u_cal > 0:
            h = 1e-3 * u_cal
            up = outputs(self._perturbed({}, 1.0 + h))
            down = outputs(self._perturbed({}, 1.0 - h))
            var += ((up - down) / (2 * h) * u_cal) ** 2
        sd = np.sqrt(var)
        n = len(hot)
        rel_bg = float(sd[0] / y0[0]) if y0[0] > 0 else 0.0
        rel_ins = {name: float(sd[1 + i] / y0[1 + i]) if y0[1 + i] > 0 else 0.0 for i, name in enumerate(hot)}
        u_ratio = {name: float(sd[1 + n + i]) for i, name in enumerate(hot)}
        return FillUncertainty(rel_bg, rel_ins, u_ratio)


@dataclass(frozen=True)
class FillUncertainty:
    """What the fill record's stated uncertainties mean for the truth (:meth:`FillRecord.uncertainties`).

    Attributes
    ----------
    background_rel : relative standard uncertainty of the true background concentration.
    insert_rel : insert -> relative standard uncertainty of its true concentration (hot inserts).
    ratio : insert -> standard uncertainty of its activity ratio a_H/a_B (hot inserts).
    """

    background_rel: float
    insert_rel: dict[str, float]
    ratio: dict[str, float]


# ---------------------------------------------------------------------------- errors
def _unusable(key: str, entry: _ActivityEntry, bq_ml: float) -> str | None:
    """A problem text when ``bq_ml`` derived from ``entry`` is not in :data:`USABLE_BQ_ML`."""
    low, high = USABLE_BQ_ML
    if low <= bq_ml <= high:  # False for nan
        return None
    what = "times the background" if entry.form == "ratio" else ""
    return (
        f"{key}: {_FORM_FIELDS[entry.form]} {what + ' ' if what else ''}give {bq_ml:.3g} Bq/mL, outside the usable "
        f"{low:g} to {high:g} Bq/mL; check the value and its unit"
    )


def _model_at(loc: tuple[Any, ...]) -> type[BaseModel] | None:
    """The model class that holds the key at the end of ``loc`` (for naming allowed keys)."""
    tp: Any = FillRecord
    for part in loc[:-1]:
        if isinstance(tp, type) and issubclass(tp, BaseModel):
            field = tp.model_fields.get(part) if isinstance(part, str) else None
            if field is None:
                return None
            tp = field.annotation
        elif typing.get_origin(tp) is dict:
            tp = typing.get_args(tp)[1]
        else:
            return None
        args = [a for a in typing.get_args(tp) if a is not type(None)]
        if typing.get_origin(tp) in (typing.Union, types.UnionType) and len(args) == 1:
            tp = args[0]
    return tp if isinstance(tp, type) and issubclass(tp, BaseModel) else None


def _flatten(exc: ValidationError) -> str:
    """Pydantic's errors as ``field.path: problem; ...`` on one line."""

    def place(loc: tuple) -> str | None:
        return ".".join(str(p) for p in loc) if loc else None  # record-level checks name their own fields

    def problem(e: dict[str, Any]) -> str | None:
        loc = tuple(e["loc"])
        if e["type"] == "extra_forbidden":
            model = _model_at(loc)
            allowed = f"; allowed here: {', '.join(model.model_fields)}" if model else ""
            return f"unknown key {loc[-1]!r}{allowed}"
        if e["type"] == "missing":
            return "missing (required)"
        if e["type"] in ("greater_than", "greater_than_equal"):
            bound = "positive" if e["type"] == "greater_than" else "zero or more"
            return f"must be {bound}, got {e.get('input')!r}"
        if e["type"] == "literal_error":
            return e["msg"]
        return None

    return "; ".join(validation_problems(exc, place=place, problem=problem))


# ---------------------------------------------------------------------------- files
def load_fill_record(path: str | os.PathLike) -> FillRecord:
    """Read and validate a fill record YAML file.

    Raises
    ------
    FillRecordError
        If the file is missing, is not YAML, or breaks the format (every problem listed).
    """
    p = Path(path)
    data = read_yaml_file(p, FillRecordError, "fill record", "give the YAML file written when filling the phantom")
    if data is None:
        raise FillRecordError(f"{p}: the fill record is empty; give at least nuclide and background")
    return FillRecord.from_dict(data, source=p)


def write_fill_record(record: FillRecord, path: str | os.PathLike) -> Path:
    """Write ``record`` as YAML (readable back with :func:`load_fill_record`); returns the path."""
    p = Path(path)
    p.parent.mkdir(parents=True, exist_ok=True)
    p.write_text(yaml.safe_dump(record.to_dict(), sort_keys=False, allow_unicode=True), encoding="utf-8")
    return p
