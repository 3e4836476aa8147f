"""What a user sees on the terminal: help pages, tables, numbers, progress, messages."""

from __future__ import annotations

import re
import sys
from pathlib import Path

import pytest

from phantometry.cli import command, main

SCRIPT = Path(sys.executable).parent / "phantometry"

TYPE_NOISE = re.compile(r"<[a-z][A-Za-z_\[\]., |]*>")


def _command_paths(cmd, prefix=()):
    yield prefix
    for name, sub in sorted(getattr(cmd, "commands", {}).items()):
        yield from _command_paths(sub, (*prefix, name))


def test_every_help_page_names_values_in_words(capsys):
    # every command of the tree, including any added later: no <str>, <bool>, <list[Path]>
    paths = list(_command_paths(command()))
    assert ("measure",) in paths and ("ledger", "check") in paths
    for path in paths:
        assert main([*path, "--help"]) == 0
        out = capsys.readouterr().out
        assert not TYPE_NOISE.search(out), (path, out)
        usage = out.splitlines()[0]
        assert usage.startswith("Usage: phantometry") and "{" not in usage, usage
    assert main(["measure", "--help"]) == 0
    out = capsys.readouterr().out
    assert "measure [OPTIONS] INPUT..." in out
    for shown in ("--out DIR", "--fill FILE", "--centre NAME=X,Y,Z", "--bands NAME|FILE", "--quiet"):
        assert shown in out, shown


def test_missing_argument_is_named_as_in_the_help(capsys):
    assert main(["measure"]) == 2
    err = capsys.readouterr().err
    assert "Missing argument 'INPUT'" in err and "<" not in err


# ============================================================================== progress
def _run_with_terminal_stderr(args, cwd):
    """Run the console script with stderr on a pseudo-terminal (as in an interactive shell)
    and stdout piped; returns (exit code, stdout, what the terminal received)."""
    import os
    import pty
    import select
    import subprocess

    master, slave = pty.openpty()
    env = dict(os.environ, MPLBACKEND="Agg", COLUMNS="100")
    proc = subprocess.Popen([str(SCRIPT), *args], stdout=subprocess.PIPE, stderr=slave, stdin=subprocess.DEVNULL, cwd=cwd, env=env)
    os.close(slave)
    seen = b""
    while True:
        ready, _, _ = select.select([master], [], [], 300)
        if not ready:
            proc.kill()
            raise AssertionError("no output for 300 s")
        try:
            chunk = os.read(master, 4096)
        except OSError:  # the terminal closed: the process ended
            break
        if not chunk:
            break
        seen += chunk
    os.close(master)
    out = proc.stdout.read().decode()
    return proc.wait(timeout=60), out, seen.decode(errors="replace").replace("\r\n", "\n")


def _run_piped(args, cwd, columns=100):
    import os
    import subprocess

    env = dict(os.environ, MPLBACKEND="Agg", COLUMNS=str(columns))
    return subprocess.run([str(SCRIPT), *args], capture_output=True, text=True, cwd=cwd, env=env, timeout=600)


def test_progress_on_an_interactive_terminal_only(demo_scan, tmp_path):
    args = ["measure", str(demo_scan["image"]), "--fill", str(demo_scan["fill"])]
    code, out, term = _run_with_terminal_stderr([*args, "--out", str(tmp_path / "a")], tmp_path)
    assert code == 0, term
    steps = [line for line in term.splitlines() if line.startswith("phantometry: [")]
    files = len(list(demo_scan["image"].iterdir()))
    assert f"loading {demo_scan['image']} ({files} files)" in steps[0]
    for word in ("locating the phantom", "measuring the ROIs", "uncertainties", "writing"):
        assert sum(word in s for s in steps) == 1, (word, steps)
    times = [float(re.match(r"phantometry: \[\s*([0-9.]+) s\]", s).group(1)) for s in steps]
    assert times == sorted(times)
    assert "phantometry: [" not in out  # the results on stdout stay clean
    # --quiet: nothing on the terminal
    code, out, term = _run_with_terminal_stderr([*args, "--out", str(tmp_path / "b"), "--quiet"], tmp_path)
    assert code == 0 and term.strip() == "", term
    # piped: nothing on stderr, the same results on stdout
    r = _run_piped([*args, "--out", str(tmp_path / "c")], tmp_path)
    assert r.returncode == 0 and r.stderr == "", r.stderr
    assert "RC max" in r.stdout


def test_step_printer_rules():
    import io

    from phantometry.cli.progress import step_printer

    assert step_printer(False, io.StringIO()) is None  # not a terminal

    class Terminal(io.StringIO):
        def isatty(self):
            return True

    term = Terminal()
    assert step_printer(True, term) is None  # --quiet
    step = step_printer(False, term)
    step("locating the phantom")
    assert re.fullmatch(r"phantometry: \[\s*\d+\.\d s\] locating the phantom\n", term.getvalue())


# ============================================================================== numbers
def test_number_conventions():
    from phantometry.cli.numbers import limits_range, number, span, with_unit

    assert number(float("nan"), "1") == number(None) == number("x") == "-"
    assert number(-0.0004, "%") == "0.00" and number(-0.0000001, "1") == "0.000"  # never -0.00
    assert number(0.68889, "1") == "0.689" and number(0.698, "1") == "0.698"  # one digit count per unit
    assert number(5313.696, "Bq/mL") == "5314" and number(5.934, "mm") == "5.93"
    assert with_unit(1.0031, "1") == "1.003" and with_unit(0.0, "%") == "0.00 %" and with_unit(None, "%") == "-"
    assert limits_range(0.44, 0.6) == "0.44–0.60" and limits_range(0.7, 1.0) == "0.7–1.0"
    assert limits_range(0.85, None) == "≥ 0.85" and limits_range(None, 12.5) == "≤ 12.5" and limits_range(None, None) == "-"
    assert limits_range(-0.1, 0.1) == "-0.1 to 0.1" and span("1.0", "2.0") == "1.0–2.0"


@pytest.fixture(scope="module")
def cold_scan(tmp_path_factory):
    """A 10:1 scan with the two largest spheres cold (2012-edition style fill), as DICOM."""
    from phantometry.synth import SynthSpec, synthesize, write_synthetic

    out = tmp_path_factory.mktemp("cold_scan")
    res = synthesize(SynthSpec(voxel_mm=(3.0,) * 3, psf_fwhm_mm=6.0, noise_cv=0.08, sphere_ratio=10.0,
                               cold=["sphere_28mm", "sphere_37mm"], rotation_deg=(1, -1, 25), seed=11))
    return write_synthetic(res, out, "dicom")


def test_measure_tables_as_printed(cold_scan, tmp_path):
    import unicodedata

    r = _run_piped(["measure", str(cold_scan["image"]), "--fill", str(cold_scan["fill"]), "--out", str(tmp_path / "one"),
                    "--bands", "eanm-fdg-2015"], tmp_path, columns=80)
    assert r.returncode == 0, r.stderr
    out = r.stdout
    assert "nan" not in out.lower() and "-0.0" not in out and "WARNING: WARNING" not in out
    assert not re.search(r"activity_recovery\s+[0-9.]+ 1\s*$", out, re.M)  # no unit "1" after a ratio
    assert re.search(r"activity_recovery\s+[01]\.\d{3}$", out, re.M)
    assert re.search(r"lung_residual_pct\s+-?\d+\.\d{2} %$", out, re.M)
    # every table line fits the 80 columns of a piped terminal: nothing cut off with an ellipsis
    assert "…" not in out
    width = max(sum(2 if unicodedata.east_asian_width(c) in "WF" else 1 for c in line) for line in out.splitlines())
    assert width <= 80, width
    # the cold spheres show the one missing mark in the summary and in the verdict table
    cold_rows = [line for line in out.splitlines() if line.startswith("sphere_37mm")]
    assert cold_rows and all("nan" not in line for line in cold_rows)
    summary = next(line for line in cold_rows if " cold " in line)
    assert summary.split()[4:7] == ["-", "-", "-"]
    # verdict table, one band set: the limits as a range with equal digits, the verdict once
    rows = [line for line in out.splitlines() if re.match(r"sphere_\d+mm\s+RC (max|mean)\s", line)]
    assert len(rows) == 12
    for line in rows:
        assert re.search(r"\s\d\.\d\d–\d\.\d\d\s", line), line
        assert sum(line.split().count(v) for v in ("pass", "fail", "n/a")) == 1, line
    assert "0.44–0.60" in out  # the 13 mm RC mean band of EANM 2015 (0.44 to 0.60; band file)


def test_measure_with_two_band_sets_keeps_names_whole(cold_scan, tmp_path):
    r = _run_piped(["measure", str(cold_scan["image"]), "--fill", str(cold_scan["fill"]), "--out", str(tmp_path / "two"),
                    "--bands", "eanm-fdg-2015", "--bands", "eanm-fdg-2018", "--quiet"], tmp_path, columns=80)
    assert r.returncode == 0, r.stderr
    header = next(line for line in r.stdout.splitlines() if line.startswith("ROI") and "verdict" in line)
    assert "eanm-fdg-2015" in header and "eanm-fdg-2018" in header and header.split()[-1] == "verdict"
    rows = [line for line in r.stdout.splitlines() if re.match(r"sphere_\d+mm\s+RC (max|mean)\s", line)]
    for line in rows:  # low/high beside each band's range it falls outside; one verdict at the end
        words = line.split()
        assert words[-1] in ("pass", "fail", "n/a") and sum(words.count(v) for v in ("pass", "fail", "n/a")) == 1, line
        if words[-1] == "pass":
            assert "low" not in words and "high" not in words
        if words[-1] == "fail":
            assert "low" in words or "high" in words


# ============================================================================== ledger
def _drifting_history(base, n=14):
    """measurements.json files of one invented scanner, two protocols, 14 scans three weeks
    apart; from the 8th scan on, the recovery falls and the FWHM grows (a drift)."""
    import json
    from datetime import datetime, timedelta, timezone

    t0 = datetime(2025, 1, 7, 9, 30, tzinfo=timezone(timedelta(hours=1)))
    folders = []
    for i in range(n):
        when = t0 + timedelta(days=21 * i)
        drift = max(0, i - 6) * 0.02
        rows = []
        for k, d in enumerate((10, 22, 37)):
            for metric, v0 in (("rc_max", 0.6 + 0.1 * k), ("rc_mean", 0.45 + 0.1 * k)):
                rows.append({"roi": f"sphere_{d}mm", "metric": metric, "value": v0 - drift + 0.005 * ((i * 7 + k) % 3 - 1), "unit": "1"})
        rows.append({"roi": "lung_insert", "metric": "lung_residual_pct", "value": 0.0004 * ((i % 3) - 1), "unit": "%"})
        rows.append({"roi": "phantom", "metric": "effective_fwhm_mm", "value": 6.0 + 2 * drift + 0.02 * (i % 2), "unit": "mm"})
        for it in (2, 3):
            doc = {"tool": {"name": "phantometry", "version": "0.1.0"},
                   "series": {"series_uid": f"1.2.826.0.1.3680043.8.498.77{it}.{i}", "acquired_at": when.isoformat(),
                              "scanner": {"station": "LVH-PET2"}, "reconstruction": {"method": "OSEM", "iterations": it, "subsets": 16}},
                   "template": {"name": "iec-body"},
                   "fill_record": {"nuclide": "F-18", "background": {"concentration_kbq_ml": 5.3, "measured_at": when.isoformat()},
                                   "spheres": {"ratio_to_background": 4.0}, "site": "Larkspur Valley Hospital (invented)"},
                   "measurements": rows}
            folder = base / f"m{i:02d}_{it}"
            folder.mkdir(parents=True)
            (folder / "measurements.json").write_text(json.dumps(doc))
            folders.append(folder)
    return folders


@pytest.fixture(scope="module")
def drift_ledger(tmp_path_factory):
    base = tmp_path_factory.mktemp("drift_ledger")
    db = base / "ledger.sqlite3"
    assert main(["ledger", "add", *map(str, _drifting_history(base / "hist")), "--db", str(db)]) == 0
    return db


def test_ledger_check_groups_flags_by_trend(drift_ledger, capsys):
    assert main(["ledger", "check", "--db", str(drift_ledger)]) == 0
    out = capsys.readouterr().out
    total, series = map(int, re.search(r"(\d+) drift flag\(s\) in (\d+) of \d+ metric series checked", out).groups())
    assert total > 2 * series > 0  # several flags per trend: grouped, not one line each
    rows = [line for line in out.splitlines() if re.search(r"│ (sphere_\d+mm|phantom|lung_insert) +│", line)]
    assert len(rows) == series  # one line per trend
    assert sum(line.count("LVH-PET2") for line in out.splitlines()) == 2  # the scanner once per protocol group
    counted = sum(int(n) for line in rows for n in re.findall(r"\((\d+)\)", line.split("│")[6]))
    assert counted == total  # the rule counts add up to every flag
    assert "steadily falling (" in out and "--verbose" in out
    assert not re.search(r"\d{4}-\d\d-\d\d \d\d:\d\d │ 0\.\d+ │", out)  # no per-point rows


def test_ledger_check_verbose_lists_the_points(drift_ledger, capsys):
    assert main(["ledger", "check", "--db", str(drift_ledger), "--verbose"]) == 0
    out = capsys.readouterr().out
    total = int(re.search(r"(\d+) drift flag\(s\)", out).group(1))
    points = re.findall(r"│ +\d+ │ \d{4}-\d\d-\d\d \d\d:\d\d │ +(-?[0-9.]+)( mm| %)? │ ", out)
    assert len(points) == total
    assert all(re.fullmatch(r"\d+\.\d{3}", v) for v, unit in points if not unit)  # ratios: 3 decimals, no unit


def test_ledger_trend_digits_follow_the_unit(drift_ledger, capsys):
    assert main(["ledger", "trend", "sphere_10mm", "rc_max", "--protocol", "OSEM, 2i16s", "--db", str(drift_ledger)]) == 0
    out = capsys.readouterr().out
    values = re.findall(r"│ \d{4}-\d\d-\d\d \d\d:\d\d │ +(\S+) │", out)
    assert len(values) == 14 and all(re.fullmatch(r"0\.\d{3}", v) for v in values), values
    assert "[1]" not in out  # a ratio has no unit to show
    limits = re.search(r"mean (\S+), sigma (\S+) .*warning (\S+)–(\S+), action (\S+)–(\S+)$", out, re.M)
    assert limits and all(re.fullmatch(r"\d\.\d{3}", limits.group(k)) for k in (1, 3, 4, 5, 6)), out
    assert main(["ledger", "trend", "lung_insert", "lung_residual_pct", "--protocol", "OSEM, 2i16s", "--db", str(drift_ledger)]) == 0
    out = capsys.readouterr().out
    assert "-0.0" not in out and "[%]" in out
    assert main(["ledger", "trend", "phantom", "effective_fwhm_mm", "--protocol", "OSEM, 2i16s", "--db", str(drift_ledger)]) == 0
    values = re.findall(r"│ \d{4}-\d\d-\d\d \d\d:\d\d │ +(\S+) │", capsys.readouterr().out)
    assert values and all(re.fullmatch(r"\d\.\d{2}", v) for v in values), values


# ============================================================================== series chooser
def test_series_chooser_tells_identical_series_apart(tmp_path):
    # three scans of one QC routine in one folder: same number, same description; the
    # error lists each with its date and time, file count and folder (invented dates)
    import subprocess
    from datetime import datetime, timedelta, timezone

    import numpy as np

    from phantometry.io.dicom_write import write_dicom_series
    from phantometry.volume import Volume

    tz = timezone(timedelta(hours=1))
    days = [datetime(2026, 11, 3, 10, 30, tzinfo=tz), datetime(2026, 12, 1, 9, 15, tzinfo=tz), datetime(2027, 1, 12, 14, 5, tzinfo=tz)]
    for n, when in enumerate(days):
        vol = Volume(np.full((4 + n, 8, 8), 100.0, np.float32), np.diag([2.0, 2.0, 2.0, 1.0]), acquired_at=when, nuclide="F-18")
        write_dicom_series(vol, tmp_path / "qc" / f"week{n + 1}", series_number=1, series_description="QC phantom")
    fill = tmp_path / "fill.yaml"
    fill.write_text("nuclide: F-18\nbackground:\n  concentration_kbq_ml: 5.0\n  measured_at: 2026-11-03T10:00:00+01:00\n")
    r = subprocess.run([str(SCRIPT), "measure", "qc", "--fill", "fill.yaml", "--out", "res"], capture_output=True, text=True,
                       cwd=tmp_path, timeout=120)
    assert r.returncode == 2 and r.stdout == ""
    line = r.stderr.strip()
    assert "\n" not in line and line.startswith("phantometry: error: qc: 3 PET series; choose one with --series")
    entries = line.split("or give its folder: ", 1)[1].split("; ")
    assert len(entries) == 3 and len(set(entries)) == 3
    for n, (entry, when) in enumerate(zip(entries, days)):
        assert entry.startswith("#1 'QC phantom' PT, ")
        assert when.strftime("%Y-%m-%d %H:%M") in entry and f"{4 + n} files in week{n + 1}" in entry and "UID " in entry
    assert not (tmp_path / "res").exists()


# ============================================================================== demo and titles
def test_demo_summary_names_fwhm_and_every_picture(tmp_path):
    r = _run_piped(["demo", "--out", str(tmp_path / "demo")], tmp_path)
    assert r.returncode == 0, r.stderr
    assert re.search(r"effective FWHM \d\.\d\d ± \d\.\d\d mm", r.stdout)
    said = " ".join(r.stdout.split())
    for name in ("measurements.csv", "measurements.json", "overlay.png", "recovery_curve.png"):
        assert name in said and (tmp_path / "demo" / "results" / name).exists(), name
    assert r.stderr == ""  # piped: no progress lines


def test_nifti_titles_name_the_file(tmp_path):
    from phantometry.io.nifti import load_nifti
    from phantometry.measure import measure_volume
    from phantometry.fill import FillRecord
    from phantometry.phantoms.base import series_name
    from phantometry.synth import SynthSpec, synthesize, write_synthetic
    from phantometry.templates import load_template

    res = synthesize(SynthSpec(voxel_mm=(4.0,) * 3, noise_cv=0.05, seed=2))
    paths = write_synthetic(res, tmp_path / "scan", "nifti")
    vol = load_nifti(paths["image"])
    vol.series_description = None  # a NIfTI file from elsewhere: no description in its sidecar
    assert series_name(vol) == "phantom.nii.gz"
    analysis = measure_volume(vol, load_template("iec-body"), FillRecord.from_dict(res.fill_record), uncertainties=False, resolution=False)
    title = analysis.overlay().title
    assert "phantom.nii.gz |" in title and "series  |" not in title and "|  |" not in title
