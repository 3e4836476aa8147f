"""Tests of phantometry.nuclides: tabulated half-lives, name aliases and the decay law."""

from __future__ import annotations

import math
from datetime import datetime, timedelta, timezone
from zoneinfo import ZoneInfo

import pytest

from phantometry.errors import InputError
from phantometry.nuclides import (
    MAX_DECAY_HALF_LIVES,
    MAX_DECAY_YEARS,
    NUCLIDES,
    DecayGapError,
    decay_correct,
    decay_factor,
    frame_average_factor,
    frame_reference_offset_s,
    get_nuclide,
    seconds_between,
)

CET = timezone(timedelta(hours=1))
T0 = datetime(2026, 11, 3, 9, 40, tzinfo=CET)  # invented demo date

# Half-lives against the named evaluations (the sources are named in phantometry.nuclides and
# the README's nuclide table):
#   EP 5.7 = European Pharmacopoeia 01/2008:50700 table of physical characteristics of
#            radionuclides (values from NNDC NuDat): F-18 109.77(5) min, N-13 9.965(4) min,
#            O-15 122.24(16) s; Cu-64 12.7004 h, Zr-89 78.41 h, Rb-82 1.2575 min (as listed in
#            shared/REFERENCE-VALUES.md)
#   NUBASE2020 (Kondev et al., Chin. Phys. C 45 (2021) 030001), as tabulated in public nuclide
#            tables: C-11 20.3402(53) min, Ge-68 270.95 d, I-124 4.1760 d, Y-90 64.05 h
#   DDEP (Kuzmenko, Appl. Radiat. Isot. 152 (2019) 188-192): Ga-68 67.83(20) min
#   PRISMAP portfolio / Garcia-Torano et al. 2016: Sc-44 4.042 h
#   recalled: Na-22 2.6019 a (public tables 2.602 a), Mn-52 5.591 d, Br-76 16.2 h, Cu-62 9.673 min
YEAR_S = 365.2422 * 86400  # the year of NUBASE (recalled)
HALF_LIVES_S = {
    "F-18": 109.77 * 60,
    "C-11": 20.3402 * 60,
    "N-13": 9.965 * 60,
    "O-15": 122.24,
    "Ga-68": 67.83 * 60,
    "Ge-68": 270.95 * 86400,
    "Cu-64": 12.7004 * 3600,
    "Zr-89": 78.41 * 3600,
    "Rb-82": 1.2575 * 60,
    "Na-22": 2.6019 * YEAR_S,
    "I-124": 4.1760 * 86400,
    "Y-90": 64.05 * 3600,
    "Sc-44": 4.042 * 3600,
    "Mn-52": 5.591 * 86400,
    "Br-76": 16.2 * 3600,
    "Cu-62": 9.673 * 60,
}
# sources that must be named beside each value (a value with no evaluation says "recalled")
SOURCE_WORDS = {"F-18": "EP", "C-11": "NUBASE2020", "Ga-68": "DDEP", "Ge-68": "NUBASE2020", "Na-22": "recalled",
                "I-124": "NUBASE2020", "Y-90": "NUBASE2020", "Sc-44": "PRISMAP", "Mn-52": "recalled", "Br-76": "recalled",
                "Cu-62": "recalled", "N-13": "EP", "O-15": "EP", "Cu-64": "EP", "Zr-89": "EP", "Rb-82": "EP"}


@pytest.mark.parametrize("name, half_life_s", sorted(HALF_LIVES_S.items()))
def test_half_life_matches_published_table(name, half_life_s):
    nuc = get_nuclide(name)
    assert nuc.name == name
    assert nuc.half_life_s == pytest.approx(half_life_s, rel=1e-9)
    # lambda = ln 2 / T_half (physical decay law)
    assert nuc.decay_constant_per_s == pytest.approx(math.log(2) / half_life_s, rel=1e-12)
    assert SOURCE_WORDS[name] in nuc.source


def test_table_holds_exactly_the_published_nuclides():
    assert set(NUCLIDES) == set(HALF_LIVES_S)


def test_c11_follows_the_current_evaluation_not_the_2008_table():
    # EP 5.7 (2008, NNDC) listed 20.385(20) min; NUBASE2020 20.3402(53) min is 0.22 % shorter
    assert get_nuclide("C-11").half_life_s / (20.385 * 60) - 1 == pytest.approx(-0.0022, abs=2e-4)


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
        # DICOM PS3.16 CID 4020 code meanings of the new nuclides
        ("^68^Germanium", "Ge-68"),
        ("Ge-68/Ga-68", "Ge-68"),  # a source named by parent and daughter: the parent
        ("68Ge/68Ga", "Ge-68"),
        ("^22^Sodium", "Na-22"),
        ("^124^Iodine", "I-124"),
        ("^90^Yttrium", "Y-90"),
        ("^44^Scandium", "Sc-44"),
        ("^52^Manganese", "Mn-52"),
        ("^76^Bromine", "Br-76"),
        ("Cu62", "Cu-62"),
    ],
)
def test_aliases(alias, canonical):
    assert get_nuclide(alias).name == canonical


@pytest.mark.parametrize("bad", ["Tc-99m", "F-19", "I-131", "", "fluorine", "Sc-43"])
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


def test_long_lived_nuclides_are_capped_at_30_years():
    # 40 half-lives of Na-22 are about 104 years; no source is kept that long (common practice)
    later = T0 + timedelta(days=29 * 365)
    assert 0 < decay_factor("Na-22", T0, later) < 1
    with pytest.raises(DecayGapError, match="more than 30 years") as info:
        decay_factor("Na-22", T0, T0 + timedelta(days=31 * 365))
    assert "Na-22" in str(info.value) and "\n" not in str(info.value)
    assert MAX_DECAY_YEARS == 30
    # a Ge-68 phantom calibrated 18 months before the scan is fine (under 40 half-lives)
    assert 0 < decay_factor("Ge-68", T0, T0 + timedelta(days=548)) < 1


def test_ge68_over_500_days_against_the_closed_form():
    # A(t) = A0 exp(-ln2 t / T_half), T_half(Ge-68) = 270.95 d (NUBASE2020): 500 d (exactly
    # 43,200,000 s) gives 2^(-500/270.95), worked by hand: 500/270.95 = 1.845359,
    # 2^-1.845359 = exp(-1.279106) = 0.278286
    start = datetime(2025, 6, 21, 9, 0, tzinfo=timezone(timedelta(hours=2)))
    end = start + timedelta(days=500)
    expected = 2.0 ** (-500.0 / 270.95)
    assert decay_factor("Ge-68", start, end) == pytest.approx(expected, rel=1e-13)
    assert decay_factor("Ge-68", start, end) == pytest.approx(0.278286, abs=2e-6)
    # across a change of daylight saving written as wall-clock times of one zone, still exact
    berlin = ZoneInfo("Europe/Berlin")
    a = datetime(2025, 6, 21, 9, 0, tzinfo=berlin)  # CEST, +02:00
    b = datetime(2026, 11, 3, 9, 0, tzinfo=berlin)  # CET, +01:00
    elapsed_s = (b.astimezone(timezone.utc) - a.astimezone(timezone.utc)).total_seconds()
    assert decay_factor("Ge-68", a, b) == pytest.approx(2.0 ** (-elapsed_s / (270.95 * 86400)), rel=1e-13)


def test_ge68_is_imaged_through_ga68_in_equilibrium():
    # transient equilibrium (Bateman, long after separation): A_Ga / A_Ge = l_Ga / (l_Ga - l_Ge)
    # = 1 / (1 - T_Ga / T_Ge) = 1 / (1 - 67.83 min / 270.95 d) = 1.0001739
    ge = get_nuclide("Ge-68")
    assert ge.daughter == "Ga-68"
    assert ge.imaged_activity_ratio == pytest.approx(1.0 / (1.0 - 67.83 / (270.95 * 1440.0)), rel=1e-12)
    assert ge.imaged_activity_ratio == pytest.approx(1.0001739, abs=2e-7)
    assert get_nuclide("F-18").imaged_activity_ratio == 1.0


# Frame-average decay, closed form (1 - e^(-lambda T)) / (lambda T) (the integral of the decay
# law over the frame; DICOM PS3.3 PET Image module Decay Factor, QIBA). The issue's figures:
# F-18 10 min -3.1 %, 20 min -6.1 %; Ga-68 20 min -9.6 %; C-11 10 min about -15 % (15.3 % with the NUBASE2020 half-life).
@pytest.mark.parametrize("name", ["F-18", "Ga-68", "C-11"])
@pytest.mark.parametrize("minutes", [5, 10, 20])
def test_frame_average_factor_closed_form(name, minutes):
    t_half = HALF_LIVES_S[name]
    lam_t = math.log(2) * minutes * 60 / t_half
    closed = (1 - math.exp(-lam_t)) / lam_t
    assert frame_average_factor(name, minutes * 60) == pytest.approx(closed, rel=1e-13)
    # the same by numerical integration of the decay law over the frame (Simpson, 2000 steps)
    n = 2000
    h = minutes * 60 / n
    lam = math.log(2) / t_half
    ys = [math.exp(-lam * k * h) for k in range(n + 1)]
    simpson = h / 3 * (ys[0] + ys[-1] + 4 * sum(ys[1:-1:2]) + 2 * sum(ys[2:-1:2])) / (minutes * 60)
    assert frame_average_factor(name, minutes * 60) == pytest.approx(simpson, rel=1e-10)
    # the moment whose activity equals the frame mean lies inside the frame, before its middle
    delta = frame_reference_offset_s(name, minutes * 60)
    assert 0 < delta < minutes * 30
    assert math.exp(-lam * delta) == pytest.approx(closed, rel=1e-12)


@pytest.mark.parametrize("name, minutes, loss_pct", [("F-18", 10, 3.1), ("F-18", 20, 6.1), ("Ga-68", 20, 9.6), ("C-11", 10, 15.3)])
def test_frame_average_losses_quoted_in_the_issue(name, minutes, loss_pct):
    # the bias of referring a frame mean to the frame start (issue 16), to 0.1 percentage point
    assert 100 * (1 - frame_average_factor(name, minutes * 60)) == pytest.approx(loss_pct, abs=0.15)


def test_frame_average_of_a_zero_frame_is_one():
    assert frame_average_factor("F-18", 0.0) == 1.0
