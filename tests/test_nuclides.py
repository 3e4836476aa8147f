"""Tests of phantometry.nuclides: tabulated half-lives, name aliases and the decay law."""

from __future__ import annotations

import math
from datetime import datetime, timedelta, timezone
from zoneinfo import ZoneInfo

import pytest

from phantometry.errors import InputError
from phantometry.nuclides import MAX_DECAY_HALF_LIVES, NUCLIDES, DecayGapError, decay_correct, decay_factor, get_nuclide, seconds_between

CET = timezone(timedelta(hours=1))
T0 = datetime(2026, 11, 3, 9, 40, tzinfo=CET)  # invented demo date

# Half-lives from the European Pharmacopoeia table of physical characteristics of
# radionuclides / NNDC NuDat evaluated nuclear data (as listed in shared/REFERENCE-VALUES.md).
HALF_LIVES_S = {
    "F-18": 109.77 * 60,
    "C-11": 20.385 * 60,
    "N-13": 9.965 * 60,
    "O-15": 122.24,
    "Ga-68": 67.71 * 60,
    "Cu-64": 12.7004 * 3600,
    "Zr-89": 78.41 * 3600,
    "Rb-82": 1.2575 * 60,
}


@pytest.mark.parametrize("name, half_life_s", sorted(HALF_LIVES_S.items()))
def test_half_life_matches_published_table(name, half_life_s):
    nuc = get_nuclide(name)
    assert nuc.name == name
    assert nuc.half_life_s == pytest.approx(half_life_s, rel=1e-9)
    # lambda = ln 2 / T_half (physical decay law)
    assert nuc.decay_constant_per_s == pytest.approx(math.log(2) / half_life_s, rel=1e-12)


def test_table_holds_exactly_the_published_nuclides():
    assert set(NUCLIDES) == set(HALF_LIVES_S)


@pytest.mark.parametrize("name", sorted(HALF_LIVES_S))
def test_one_half_life_halves_the_activity(name):
    # A(t) = A0 exp(-ln2 t / T_half): one half-life leaves one half, two leave one quarter
    t_half = timedelta(seconds=HALF_LIVES_S[name])
    assert decay_factor(name, T0, T0 + t_half) == pytest.approx(0.5, rel=1e-12)
    assert decay_factor(name, T0, T0 + 2 * t_half) == pytest.approx(0.25, rel=1e-12)
    # backwards in time the activity grows
    assert decay_factor(name, T0 + t_half, T0) == pytest.approx(2.0, rel=1e-12)
    assert decay_correct(1000.0, name, T0, T0 + t_half) == pytest.approx(500.0, rel=1e-12)


def test_f18_one_hour_by_hand():
    # exp(-ln2 * 60 / 109.77) = exp(-0.378873) = 0.684633, worked by hand from the decay law
    assert decay_factor("F-18", T0, T0 + timedelta(hours=1)) == pytest.approx(
        math.exp(-math.log(2) * 60 / 109.77), rel=1e-12
    )
    assert decay_factor("F-18", T0, T0 + timedelta(hours=1)) == pytest.approx(0.684633, abs=1e-6)


@pytest.mark.parametrize(
    "alias, canonical",
    [
        ("F-18", "F-18"),
        ("F18", "F-18"),
        ("18F", "F-18"),
        ("f-18", "F-18"),
        ("^18^Fluorine", "F-18"),  # DICOM Radionuclide Code Sequence CodeMeaning style
        ("fluorine-18", "F-18"),
        ("Ga68", "Ga-68"),
        ("68Ga", "Ga-68"),
        ("^68^Gallium", "Ga-68"),
        ("Zr-89", "Zr-89"),
        ("Rb82", "Rb-82"),
        ("11C", "C-11"),
        (" O-15 ", "O-15"),
    ],
)
def test_aliases(alias, canonical):
    assert get_nuclide(alias).name == canonical


@pytest.mark.parametrize("bad", ["Tc-99m", "F-19", "I-124", "", "fluorine"])
def test_unknown_nuclide_refused_with_the_choices(bad):
    with pytest.raises(InputError, match="unknown radionuclide") as info:
        get_nuclide(bad)
    assert "F-18" in str(info.value)


def test_naive_datetime_refused():
    naive = datetime(2026, 11, 3, 9, 40)
    with pytest.raises(InputError, match="time zone"):
        decay_factor("F-18", naive, T0)
    with pytest.raises(InputError, match="time zone"):
        decay_factor("F-18", T0, naive)


def test_decay_across_fixed_offsets_uses_elapsed_time():
    # 09:40+01:00 and 10:40+02:00 are the same instant (08:40 UTC): no decay
    same_instant = datetime(2026, 11, 3, 10, 40, tzinfo=timezone(timedelta(hours=2)))
    assert decay_factor("F-18", T0, same_instant) == pytest.approx(1.0, abs=1e-15)
    # 09:40+01:00 -> 09:40 UTC is one hour later
    later = datetime(2026, 11, 3, 9, 40, tzinfo=timezone.utc)
    assert decay_factor("F-18", T0, later) == pytest.approx(math.exp(-math.log(2) * 60 / 109.77), rel=1e-12)


def test_decay_across_daylight_saving_change():
    # Europe/Berlin leaves summer time on 2026-10-25 at 03:00 CEST -> 02:00 CET (EU rule, last
    # Sunday of October; IANA tz database). 01:30 CEST = 23:30 UTC, 03:30 CET = 02:30 UTC:
    # 3 h elapsed although the wall clock moved 2 h.
    berlin = ZoneInfo("Europe/Berlin")
    before = datetime(2026, 10, 25, 1, 30, tzinfo=berlin)
    after = datetime(2026, 10, 25, 3, 30, tzinfo=berlin)
    assert before.utcoffset() == timedelta(hours=2) and after.utcoffset() == timedelta(hours=1)
    expected = math.exp(-math.log(2) * 180 / 109.77)  # 3 h of F-18 decay
    assert decay_factor("F-18", before, after) == pytest.approx(expected, rel=1e-12)
    # the same instants written with fixed offsets give the same answer
    assert decay_factor("F-18", before.astimezone(timezone.utc), after.astimezone(CET)) == pytest.approx(expected, rel=1e-12)


# ---------------------------------------------------------------------------- decay gaps
def test_decay_gap_of_more_than_40_half_lives_refused_in_days_with_the_nuclide():
    # 40 half-lives of F-18 (109.77 min, European Pharmacopoeia / NNDC NuDat) = 3.049 days
    ok = T0 + timedelta(minutes=39.9 * 109.77)
    assert decay_factor("F-18", T0, ok) == pytest.approx(2.0 ** -39.9, rel=1e-9)
    with pytest.raises(DecayGapError) as info:
        decay_factor("F-18", T0, T0 + timedelta(minutes=40.1 * 109.77))
    message = str(info.value)
    assert "3.1 days" in message and "F-18" in message and "109.77 min" in message and "\n" not in message
    with pytest.raises(DecayGapError, match="46,"):  # 1900 to 2026: about 46,000 days
        decay_factor("F-18", datetime(1900, 1, 1, tzinfo=CET), T0)


@pytest.mark.parametrize(
    "early, late",
    [
        (datetime(1, 1, 1, 0, 10, tzinfo=timezone(timedelta(hours=5))), datetime(2026, 11, 3, tzinfo=timezone.utc)),
        (datetime(2026, 11, 3, tzinfo=timezone.utc), datetime(9999, 12, 31, 23, 0, tzinfo=timezone(timedelta(hours=-5)))),
    ],
)
def test_times_at_the_ends_of_the_calendar_refused_not_overflowed(early, late):
    with pytest.raises(DecayGapError, match="days"):
        decay_factor("F-18", early, late)
    # the gap itself is computed without leaving the calendar
    assert seconds_between(early, late) > 0 and seconds_between(late, early) == -seconds_between(early, late)


def test_gap_limit_scales_with_the_half_life():
    # 30 days is under 40 half-lives of Zr-89 (78.41 h) but far over those of F-18
    later = T0 + timedelta(days=30)
    assert 0 < decay_factor("Zr-89", T0, later) < 1
    with pytest.raises(DecayGapError):
        decay_factor("F-18", T0, later)
    assert MAX_DECAY_HALF_LIVES == 40
