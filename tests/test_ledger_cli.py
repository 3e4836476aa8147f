"""``phantometry measure --record`` and the ``phantometry ledger`` commands, end to end (SQLite).

The store logic itself is tested on SQLite and PostgreSQL in test_ledger_store.py; here the
commands are checked for wiring, messages and exit codes. Drift rules: Western Electric
Statistical Quality Control Handbook (1956); Nelson, J Qual Technol 16:237-239 (1984).
"""

from __future__ import annotations

import csv
import json
from datetime import datetime, timedelta, timezone
from pathlib import Path


from phantometry.cli import main
from phantometry.ledger import LEDGER_CSV_COLUMNS, Ledger, default_url

T0 = datetime(2025, 1, 6, 9, 30, tzinfo=timezone.utc)  # invented scan dates


def run(capsys, *args):
    code = main([str(a) for a in args])
    out = capsys.readouterr()
    return code, out.out, out.err


def one_error_line(err: str) -> str:
    lines = [l for l in err.splitlines() if l.strip()]
    assert len(lines) == 1 and lines[0].startswith("phantometry: error:"), err
    return lines[0]


def test_measure_record_then_duplicate_then_replace(capsys, demo_scan, tmp_path, monkeypatch):
    import phantometry.measure as measure_module

    real_measure_volume, real_load_image = measure_module.measure_volume, measure_module.load_image
    cache: dict = {}
    calls = {"load_image": 0, "measure_volume": 0}

    def measure_volume_once(*a, **kw):  # the first call measures for real; later calls reuse its analysis
        calls["measure_volume"] += 1
        if "analysis" not in cache:
            cache["analysis"] = real_measure_volume(*a, **kw)
        return cache["analysis"]

    def counting_load_image(*a, **kw):
        calls["load_image"] += 1
        return real_load_image(*a, **kw)

    monkeypatch.setattr(measure_module, "measure_volume", measure_volume_once)
    monkeypatch.setattr(measure_module, "load_image", counting_load_image)
    db = tmp_path / "ledger.sqlite3"
    args = ["measure", demo_scan["image"], "--fill", demo_scan["fill"], "--out", tmp_path / "r1", "--record", "--db", db,
            "--scanner", "PET-CT 1", "--protocol", "EARL1"]
    code, out, err = run(capsys, *args)  # the real measurement, end to end
    assert code == 0, err
    assert "recorded analysis #1 (Larkspur Valley Hospital (invented) / PET-CT 1 / EARL1, " in out
    with Ledger(db) as led:
        [a] = led.analyses()
        assert (a.scanner, a.protocol, a.template) == ("PET-CT 1", "EARL1", "iec-body")
        assert a.site == "Larkspur Valley Hospital (invented)"  # from the demo fill record
        rows = led.measurements(a.id)
    written = json.loads((tmp_path / "r1" / "measurements.json").read_text())
    assert [(r.roi, r.metric, r.value) for r in rows] == [(m["roi"], m["metric"], m["value"]) for m in written["measurements"]]
    # the same result folder through `ledger add` is the same series + template + settings
    code, out, err = run(capsys, "ledger", "add", tmp_path / "r1", "--db", db, "--scanner", "PET-CT 1", "--protocol", "EARL1")
    assert code == 2 and "already recorded" in one_error_line(err) and "--replace" in err
    # measuring the same series again is refused before the image is read: nothing loaded, nothing written
    assert calls == {"load_image": 1, "measure_volume": 1}
    args[args.index("--out") + 1] = tmp_path / "r2"
    code, out, err = run(capsys, *args)
    assert code == 2 and "already recorded (analysis #1)" in one_error_line(err)
    assert calls == {"load_image": 1, "measure_volume": 1} and not (tmp_path / "r2").exists()
    # ... unless --replace (the first analysis is reused to keep the test fast)
    code, out, err = run(capsys, *args, "--replace")
    assert code == 0, err
    assert f"replaced analysis #{a.id}" in out and (tmp_path / "r2" / "measurements.json").is_file()
    with Ledger(db) as led:
        assert len(led.analyses()) == 1


def test_labels_without_record_are_refused_before_measuring(capsys, demo_scan, tmp_path):
    code, out, err = run(capsys, "measure", demo_scan["image"], "--fill", demo_scan["fill"], "--out", tmp_path / "r", "--site", "X")
    assert code == 2 and "add --record" in one_error_line(err)
    assert not (tmp_path / "r").exists()


def test_db_from_environment(capsys, tmp_path, monkeypatch):
    db = tmp_path / "env.sqlite3"
    _history(tmp_path / "hist", [0.7])
    monkeypatch.setenv("PHANTOMETRY_DB", str(db))
    code, out, err = run(capsys, "ledger", "add", tmp_path / "hist" / "m00")
    assert code == 0, err
    code, out, err = run(capsys, "ledger", "info")
    assert code == 0, err
    assert f"sqlite:///{db}" in out and "revision      0002" in out and "analyses      1" in out


def test_default_store_is_in_the_user_data_folder(tmp_path, monkeypatch):
    monkeypatch.delenv("PHANTOMETRY_DB", raising=False)
    monkeypatch.setenv("XDG_DATA_HOME", str(tmp_path / "xdg"))  # platformdirs on Linux follows the XDG base directories
    assert default_url() == f"sqlite:///{tmp_path / 'xdg' / 'phantometry' / 'ledger.sqlite3'}"


def _history(base: Path, values: list[float]) -> list[Path]:
    """Result-folder-like measurements.json files of one scanner over months (invented)."""
    paths = []
    for i, v in enumerate(values):
        when = T0 + timedelta(days=30 * i)
        doc = {
            "tool": {"name": "phantometry", "version": "0.1.0"},
            "series": {"series_uid": f"1.2.826.0.1.3680043.8.498.4242.{i}", "acquired_at": when.isoformat(),
                       "scanner": {"station": "LVH-PET2"}, "reconstruction": {"method": "OSEM", "iterations": 2, "subsets": 16}},
            "template": {"name": "iec-body"},
            "fill_record": {"nuclide": "F-18", "background": {"concentration_kbq_ml": 5.3, "measured_at": when.isoformat()},
                            "spheres": {"ratio_to_background": 4.0}, "site": "Larkspur Valley Hospital (invented)"},
            "measurements": [
                {"roi": "sphere_10mm", "metric": "rc_max", "value": v, "unit": "1", "uncertainty": 0.01,
                 "band_low": 0.5, "band_high": 0.9, "verdict": "pass" if 0.5 <= v <= 0.9 else "fail"},
                {"roi": "sphere_37mm", "metric": "rc_max", "value": 0.98 + (0.01 if i % 2 else -0.01), "unit": "1"},
            ],
        }
        p = base / f"m{i:02d}" / "measurements.json"
        p.parent.mkdir(parents=True)
        p.write_text(json.dumps(doc))
        paths.append(p.parent)
    return paths


def test_ledger_commands_end_to_end(capsys, tmp_path):
    db = tmp_path / "l.sqlite3"
    values = [0.70, 0.72, 0.71, 0.69, 0.73, 0.70, 0.72, 0.71, 0.70, 0.95]
    dirs = _history(tmp_path / "hist", values)
    code, out, err = run(capsys, "ledger", "add", *dirs, "--db", db)
    assert code == 0, err
    assert out.count("recorded analysis #") == 10
    code, out, err = run(capsys, "ledger", "list", "--db", db, "--verdict", "fail")
    assert code == 0 and "1 analyses" in out and "LVH-PET2" in out
    code, out, err = run(capsys, "ledger", "list", "--db", db, "--since", "2025-03-01", "--until", "2025-04-06")
    assert code == 0 and "2 analyses" in out  # 2025-03-07 and 2025-04-06 (the end date covers its whole day)
    code, out, err = run(capsys, "ledger", "baseline", "--db", db, "--from", "2025-01-01", "--to", "2025-08-31", "--note", "acceptance")
    assert code == 0, err
    assert "8 analyses" in out and "note: acceptance" in out
    chart = tmp_path / "charts" / "rc10.png"
    code, out, err = run(capsys, "ledger", "trend", "sphere_10mm", "rc_max", "--db", db, "--chart", chart)
    assert code == 0, err
    assert "beyond 3 sigma, above the mean" in out and "1 drift flag(s)" in out and "limits from baseline #1" in out
    assert chart.read_bytes()[:4] == b"\x89PNG"
    code, out, err = run(capsys, "ledger", "check", "--db", db)
    assert code == 0 and "1 drift flag(s) in 1 of 2 metric series checked" in out
    code, out, err = run(capsys, "ledger", "check", "--db", db, "--strict")
    assert code == 1
    code, out, err = run(capsys, "ledger", "check", "--db", db, "--since", "2026-01-01", "--strict")
    assert code == 0 and "0 drift flag(s)" in out
    # export, import elsewhere, same content
    code, out, err = run(capsys, "ledger", "export", tmp_path / "out.csv", "--db", db)
    assert code == 0 and "wrote 20 rows of 10 analyses" in out and "--since" in out
    with open(tmp_path / "out.csv", newline="") as fh:
        reader = csv.DictReader(fh)
        assert reader.fieldnames == LEDGER_CSV_COLUMNS
        rows = list(reader)
    assert {r["scanner"] for r in rows} == {"LVH-PET2"} and rows[0]["acquired_at"] == T0.isoformat()
    code, out, err = run(capsys, "ledger", "import", tmp_path / "out.csv", "--db", tmp_path / "copy.sqlite3")
    assert code == 0 and "imported 10 analyses" in out
    code, out, err = run(capsys, "ledger", "import", tmp_path / "out.csv", "--db", tmp_path / "copy.sqlite3")
    assert code == 0 and "skipped 10 already present" in out
    # errors: one line, exit 2
    for args, needle in (
        (["ledger", "trend", "sphere_10mm", "rc_max", "--scanner", "nope"], "no scanner 'nope'"),
        (["ledger", "trend", "sphere_10mm", "nope"], "no sphere_10mm nope values"),
        (["ledger", "list", "--since", "2025-01-01T00:00:00"], "has no time-zone offset"),
        (["ledger", "baseline", "--ids", "1,x"], "comma-separated analysis ids"),
        (["ledger", "import", tmp_path / "missing.csv"], "missing.csv: no such file"),
        (["ledger", "remove", "999"], "no analysis #999"),
    ):
        code, out, err = run(capsys, *args, "--db", db)
        assert code == 2 and needle in one_error_line(err), (args, err)
    code, out, err = run(capsys, "ledger", "remove", "10", "--db", db)
    assert code == 0 and "removed analysis #10" in out
