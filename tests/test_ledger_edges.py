"""The trend store's edges and what leaves it, through the installed ``phantometry`` console script.

Every case runs the executable as a subprocess, as a user would, and checks the exit code, one
``phantometry: error:`` line for a refusal, no traceback, and that nothing was created or
changed that should not be (folders compared file by file, byte for byte). SQLite stores are
temporary files; PostgreSQL comes from the server of test_ledger_store.py (skipped only outside
CI when no server can be started). Spreadsheet formula characters: OWASP "CSV Injection"
guidance. Scans are synthetic (the project's synthesizer).
"""

from __future__ import annotations

import csv
import json
import os
import subprocess
import sys
from pathlib import Path

import pydicom
import pytest
import sqlalchemy as sa

from phantometry.ledger import Ledger
from phantometry.ledger.schema import make_engine, resolve_url

from test_ledger_store import make_doc, pg_server_url, pg_url, write_doc  # noqa: F401  (fixtures)

SCRIPT = Path(sys.executable).parent / "phantometry"
READ_ONLY = [
    ["ledger", "list"],
    ["ledger", "trend", "sphere_10mm", "rc_max"],
    ["ledger", "check"],
    ["ledger", "export", "{out}"],
    ["ledger", "info"],
    ["ledger", "baseline"],
    ["ledger", "baseline", "--ids", "1,2"],
    ["ledger", "remove", "1"],
]


def run(*args, cwd: Path | None = None, env: dict | None = None, timeout: float = 600) -> subprocess.CompletedProcess:
    full_env = dict(os.environ, MPLBACKEND="Agg", COLUMNS="200")
    full_env.pop("PHANTOMETRY_DB", None)
    full_env.update(env or {})
    return subprocess.run([str(SCRIPT), *map(str, args)], capture_output=True, text=True, cwd=cwd, env=full_env, timeout=timeout)


def error_lines(r: subprocess.CompletedProcess) -> list[str]:
    assert "Traceback" not in r.stdout + r.stderr, r.stderr
    lines = [line for line in r.stderr.splitlines() if line.strip()]
    assert all(line.startswith("phantometry: error: ") for line in lines), r.stderr
    return lines


def one_error(r: subprocess.CompletedProcess) -> str:
    assert r.returncode == 2, (r.returncode, r.stdout, r.stderr)
    lines = error_lines(r)
    assert len(lines) == 1, r.stderr
    return lines[0]


def tree(root: Path) -> dict[str, bytes | None]:
    """Every file (with its bytes) and folder under ``root``."""
    return {str(p.relative_to(root)): (p.read_bytes() if p.is_file() else None) for p in sorted(root.rglob("*"))}


def pg_tables(url: str) -> list[str]:
    engine = make_engine(resolve_url(url), create=False)
    try:
        return sa.inspect(engine).get_table_names()
    finally:
        engine.dispose()


def results(base: Path, n: int, start: int = 0) -> list[Path]:
    """Result folders (measurements.json only) of ``n`` invented analyses."""
    return [write_doc(make_doc(start + i), base / f"r{start + i}" / "measurements.json").parent for i in range(n)]


# ------------------------------------------------------------------------------ read-only commands
@pytest.mark.parametrize("args", READ_ONLY, ids=lambda a: " ".join(a[1:]))
def test_read_only_commands_refuse_a_missing_sqlite_store(tmp_path, args):
    work = tmp_path / "work"
    work.mkdir()
    db = work / "typo" / "ledger.sqlite3"
    argv = [a.format(out=work / "out.csv") for a in args]
    r = run(*argv, "--db", db, cwd=work)
    line = one_error(r)
    assert "no such store" in line and str(db) in line
    assert tree(work) == {}  # no folder, no empty store, no export


def test_read_only_command_refuses_a_missing_store_from_the_environment(tmp_path):
    db = tmp_path / "typo" / "ledger.sqlite3"
    r = run("ledger", "list", cwd=tmp_path, env={"PHANTOMETRY_DB": str(db)})
    assert "no such store" in one_error(r) and tree(tmp_path) == {}


@pytest.mark.parametrize("args", READ_ONLY, ids=lambda a: " ".join(a[1:]))
def test_read_only_commands_refuse_a_database_without_ledger(pg_url, tmp_path, args):
    argv = [a.format(out=tmp_path / "out.csv") for a in args]
    r = run(*argv, "--db", pg_url, cwd=tmp_path)
    assert "no ledger in this database yet" in one_error(r)
    assert pg_tables(pg_url) == [] and tree(tmp_path) == {}
    assert "secret" not in r.stderr and pg_url.split("@")[0].split(":")[-1] not in r.stderr  # no password shown


def test_default_store_is_not_created_by_reading(tmp_path):
    xdg = tmp_path / "xdg"
    r = run("ledger", "list", env={"XDG_DATA_HOME": str(xdg)})
    assert "no such store" in one_error(r) and not xdg.exists()


# ------------------------------------------------------------------------------ ledger add
def test_add_records_every_folder_it_can_and_reports_each_refusal(tmp_path):
    db = tmp_path / "l.sqlite3"
    a, dup, b = results(tmp_path / "res", 3)
    r = run("ledger", "add", dup, "--db", db)
    assert r.returncode == 0, r.stderr
    (tmp_path / "bad").mkdir()
    (tmp_path / "bad" / "measurements.json").write_text("{not json", encoding="utf-8")
    r = run("ledger", "add", a, dup, tmp_path / "missing", b, tmp_path / "bad", "--db", db)
    assert r.returncode == 2
    lines = error_lines(r)
    assert len(lines) == 3, r.stderr  # one line per refusal, in the order given
    assert "missing" in lines[0] and "no such file" in lines[0]
    assert "bad" in lines[1] and "cannot be read as JSON" in lines[1]
    assert str(dup) in lines[2] and "already recorded" in lines[2]
    assert f"from {a} " in r.stdout and f"from {b} " in r.stdout
    with Ledger(db) as led:
        got = {x.series_uid for x in led.analyses()}
    want = {json.loads((p / "measurements.json").read_text())["series"]["series_uid"] for p in (a, dup, b)}
    assert got == want  # a, b recorded after the refusals, dup once


def test_add_of_unreadable_folders_creates_no_store(tmp_path):
    work = tmp_path / "work"
    work.mkdir()
    r = run("ledger", "add", work / "missing1", work / "missing2", "--db", work / "new" / "l.sqlite3")
    assert r.returncode == 2 and len(error_lines(r)) == 2
    assert tree(work) == {}


@pytest.mark.parametrize("backend", ["sqlite", "postgresql"])
def test_too_long_label_is_refused_the_same_way_on_both_backends(backend, request, tmp_path):
    db = str(tmp_path / "l.sqlite3") if backend == "sqlite" else request.getfixturevalue("pg_url")
    [res] = results(tmp_path / "res", 1)
    r = run("ledger", "add", res, "--scanner", "S" * 5000, "--db", db)
    line = one_error(r)
    assert "scanner label" in line and "5000 characters long; the ledger keeps at most 200" in line and len(line) < 500
    r = run("ledger", "add", res, "--scanner", "S" * 200, "--db", db)
    assert r.returncode == 0, r.stderr
    with Ledger(db) as led:
        assert [x.scanner for x in led.analyses()] == ["S" * 200]


# ------------------------------------------------------------------------------ export / import / chart
def _store_with_history(tmp_path: Path, db: Path) -> None:
    dirs = results(tmp_path / "res", 5)
    assert run("ledger", "add", *dirs, "--db", db, "--scanner", "=1+1", "--site", "@SUM(A1)", "--protocol", "-2+3").returncode == 0


def test_export_never_replaces_a_file_without_overwrite(tmp_path):
    db = tmp_path / "l.sqlite3"
    _store_with_history(tmp_path, db)
    out = tmp_path / "mine.csv"
    out.write_bytes(b"my own notes\n")
    before = tree(tmp_path)
    r = run("ledger", "export", out, "--db", db)
    line = one_error(r)
    assert str(out) in line and "--overwrite" in line
    assert tree(tmp_path) == before
    r = run("ledger", "export", tmp_path / "res", "--db", db)  # a folder
    assert "is a folder" in one_error(r) and tree(tmp_path) == before
    r = run("ledger", "export", out, "--db", db, "--overwrite")
    assert r.returncode == 0, r.stderr
    assert out.read_text(encoding="utf-8").startswith("analysis_uid,")


def test_chart_never_replaces_a_file_without_overwrite(tmp_path):
    db = tmp_path / "l.sqlite3"
    _store_with_history(tmp_path, db)
    chart = tmp_path / "chart.png"
    chart.write_bytes(b"not yet a chart")
    before = tree(tmp_path)
    r = run("ledger", "trend", "sphere_10mm", "rc_max", "--db", db, "--chart", chart)
    assert str(chart) in one_error(r) and r.stdout == ""  # refused before any output
    assert tree(tmp_path) == before
    r = run("ledger", "trend", "sphere_10mm", "rc_max", "--db", db, "--overwrite")
    assert "--chart" in one_error(r)
    r = run("ledger", "trend", "sphere_10mm", "rc_max", "--db", db, "--chart", chart, "--overwrite")
    assert r.returncode == 0, r.stderr
    assert chart.read_bytes()[:4] == b"\x89PNG"
    assert [p.name for p in tmp_path.iterdir() if p.name.startswith(".")] == []  # no temporary file left


def test_formula_labels_are_neutralised_and_survive_the_round_trip(tmp_path):
    db = tmp_path / "l.sqlite3"
    _store_with_history(tmp_path, db)
    r = run("ledger", "export", tmp_path / "a.csv", "--db", db)
    assert r.returncode == 0, r.stderr
    with open(tmp_path / "a.csv", newline="", encoding="utf-8") as fh:
        rows = list(csv.DictReader(fh))
    assert {(x["site"], x["scanner"], x["protocol"]) for x in rows} == {("'@SUM(A1)", "'=1+1", "'-2+3")}
    assert any(x["value"].startswith("-") or x["band_low"] == "" for x in rows)
    for x in rows:
        float(x["value"])  # still a number
    r = run("ledger", "import", tmp_path / "a.csv", "--db", tmp_path / "copy.sqlite3")
    assert r.returncode == 0 and "imported 5 analyses" in r.stdout, r.stderr
    with Ledger(tmp_path / "copy.sqlite3", create=False) as led:
        assert {(x.site, x.scanner, x.protocol) for x in led.analyses()} == {("@SUM(A1)", "=1+1", "-2+3")}
    r = run("ledger", "export", tmp_path / "b.csv", "--db", tmp_path / "copy.sqlite3")
    assert r.returncode == 0 and (tmp_path / "b.csv").read_bytes() == (tmp_path / "a.csv").read_bytes()


def test_baselines_survive_export_and_import(tmp_path):
    db = tmp_path / "l.sqlite3"
    dirs = results(tmp_path / "res", 6)
    assert run("ledger", "add", *dirs, "--db", db).returncode == 0
    r = run("ledger", "baseline", "--ids", "1,2,3,4", "--note", "=after service", "--db", db)
    assert r.returncode == 0, r.stderr
    assert run("ledger", "export", tmp_path / "a.csv", "--db", db).returncode == 0
    r = run("ledger", "import", tmp_path / "a.csv", "--db", tmp_path / "copy.sqlite3")
    assert r.returncode == 0 and "created 1 baseline(s)" in r.stdout, r.stderr
    r = run("ledger", "trend", "sphere_10mm", "rc_max", "--db", tmp_path / "copy.sqlite3")
    assert r.returncode == 0, r.stderr
    assert "limits from baseline #1" in r.stdout and "no baseline set" not in r.stdout
    r = run("ledger", "baseline", "--db", tmp_path / "copy.sqlite3")
    shown = " ".join(r.stdout.split())  # long lines are folded when piped
    assert "4 analyses" in shown and "note: =after service" in shown


def test_import_of_a_bad_file_creates_no_store(tmp_path):
    work = tmp_path / "work"
    work.mkdir()
    (work / "bad.csv").write_text("not,a,ledger\n1,2,3\n", encoding="utf-8")
    (work / "latin1.csv").write_bytes("analysis_uid\nM\xfcnster\n".encode("latin-1"))
    before = tree(work)
    for name, needle in (("missing.csv", "no such file"), ("bad.csv", "missing columns"), ("latin1.csv", "not UTF-8")):
        r = run("ledger", "import", work / name, "--db", work / "new.sqlite3")
        assert needle in one_error(r), name
        assert tree(work) == before


# ------------------------------------------------------------------------------ measure --record
@pytest.fixture(scope="module")
def small_scan(tmp_path_factory):
    base = tmp_path_factory.mktemp("record_scan")
    r = run("synth", base / "scan", "--voxel", "4", "--noise", "0.05")
    assert r.returncode == 0, r.stderr
    return base / "scan"


def test_measure_record_refuses_a_duplicate_before_reading_the_image(small_scan, tmp_path):
    db = tmp_path / "l.sqlite3"
    fill = small_scan / "fill.yaml"
    r = run("measure", small_scan / "dicom", "--fill", fill, "--out", tmp_path / "first", "--record", "--db", db)
    assert r.returncode == 0, r.stderr
    assert "recorded analysis #1" in r.stdout
    # the same series with damaged pixel data: reading the image would fail, so a refusal that
    # names the duplicate proves the check came first
    damaged = tmp_path / "damaged"
    damaged.mkdir()
    for f in sorted((small_scan / "dicom").iterdir()):
        ds = pydicom.dcmread(f)
        ds.PixelData = ds.PixelData[:10]
        ds.save_as(damaged / f.name)
    r = run("measure", damaged, "--fill", fill, "--out", tmp_path / "plain")
    assert r.returncode == 2 and "already recorded" not in r.stderr  # really unreadable
    work_before = tree(tmp_path)
    r = run("measure", damaged, "--fill", fill, "--out", tmp_path / "second", "--record", "--db", db, "--seg", "--report")
    line = one_error(r)
    assert "already recorded (analysis #1)" in line and "--replace" in line
    assert tree(tmp_path) == work_before  # nothing written: no folder, no picture, store unchanged
    with Ledger(db, create=False) as led:
        assert len(led.analyses()) == 1


def test_nifti_duplicate_is_refused_from_the_acquisition_time(tmp_path):
    from datetime import datetime, timezone

    from phantometry.errors import LedgerError
    from phantometry.fill import FillRecord
    from phantometry.ledger.measure_record import RecordRequest

    doc = make_doc(0)
    when = datetime(2025, 3, 1, 9, 0, tzinfo=timezone.utc)
    doc["series"]["series_uid"] = None  # NIfTI: no series UID, identified by the acquisition time
    doc["series"]["acquired_at"] = when.isoformat()
    db = tmp_path / "l.sqlite3"
    with Ledger(db) as led:
        led.record_document(doc)
    fill = FillRecord.from_dict(doc["fill_record"])
    request = RecordRequest(db)
    with pytest.raises(LedgerError, match="already recorded"):  # the file is never opened
        request.check_inputs(tmp_path / "never-read.nii.gz", acquired_at=when, template="iec-body", fill=fill)
    RecordRequest(db).check_inputs(tmp_path / "never-read.nii.gz", acquired_at=when.replace(hour=10), template="iec-body", fill=fill)
    # no store yet: nothing to refuse, and nothing created
    RecordRequest(tmp_path / "none" / "l.sqlite3").check_inputs(tmp_path / "x.nii", acquired_at=when, template="iec-body", fill=fill)
    assert not (tmp_path / "none").exists()


# ------------------------------------------------------------------------------ driver noise
def test_driver_log_records_stay_off_stderr():
    # psycopg logs "error ignored terminating <psycopg.Pipeline ...>" as a warning; without a
    # handler Python's last resort prints it on stderr (first run shows the test can tell)
    code = "import logging; {setup}; logging.getLogger('psycopg').warning('error ignored terminating <psycopg.Pipeline>')"
    bare = subprocess.run([sys.executable, "-c", code.format(setup="pass")], capture_output=True, text=True)
    assert "error ignored terminating" in bare.stderr
    quiet = subprocess.run([sys.executable, "-c", code.format(setup="from phantometry.cli.ledger import quiet_driver_logs; quiet_driver_logs()")],
                           capture_output=True, text=True)
    assert quiet.returncode == 0 and quiet.stderr == ""


# ------------------------------------------------------------------------------ many writers, as users run them
@pytest.mark.parametrize("backend", ["sqlite", "postgresql"])
def test_eight_console_scripts_record_into_a_brand_new_store(backend, request, tmp_path):
    db = str(tmp_path / "new" / "ledger.sqlite3") if backend == "sqlite" else request.getfixturevalue("pg_url")
    dirs = results(tmp_path / "res", 8)
    env = dict(os.environ, MPLBACKEND="Agg", COLUMNS="200")
    procs = [subprocess.Popen([str(SCRIPT), "ledger", "add", str(d), "--db", db], stdout=subprocess.PIPE, stderr=subprocess.PIPE,
                              text=True, env=env) for d in dirs]
    outs = [p.communicate(timeout=600) for p in procs]
    for p, (out, err) in zip(procs, outs):
        assert p.returncode == 0 and err == "", err
        assert "recorded analysis #" in out
    with Ledger(db, create=False) as led:
        got = [a.series_uid for a in led.analyses()]
    want = [json.loads((d / "measurements.json").read_text())["series"]["series_uid"] for d in dirs]
    assert sorted(got) == sorted(want)  # all stored, none twice


def test_concurrent_replace_on_postgresql_prints_no_driver_noise(pg_url, tmp_path):
    [res] = results(tmp_path / "res", 1)
    assert run("ledger", "add", res, "--db", pg_url).returncode == 0
    env = dict(os.environ, MPLBACKEND="Agg", COLUMNS="200")
    procs = [subprocess.Popen([str(SCRIPT), "ledger", "add", str(res), "--replace", "--db", pg_url], stdout=subprocess.PIPE,
                              stderr=subprocess.PIPE, text=True, env=env) for _ in range(5)]
    outs = [p.communicate(timeout=600) for p in procs]
    for p, (out, err) in zip(procs, outs):
        assert p.returncode == 0 and err == "", err  # formerly "error ignored terminating <psycopg.Pipeline ...>"
        assert "replaced analysis #1" in out
    with Ledger(pg_url, create=False) as led:
        [a] = led.analyses()
        assert len(led.measurements(a.id)) == 51
