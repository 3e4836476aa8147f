"""Every command works for every shipped phantom kind: measure with bands (recorded in the
JSON), the report, compare (with its report), recording into the ledger; --seg refused with
one clear line where the kind does not export its ROIs."""

from __future__ import annotations

import csv
import json
import re
from pathlib import Path

import pytest
import yaml

from phantometry.cli import main
from phantometry.phantoms import kind_of, load_template
from phantometry.synth import SynthSpec, default_scan_settings, synthesize, write_synthetic

#: template -> (voxel mm, a band entry a scan of it has; the band set is invented, for the test)
KINDS = {
    "iec-body": (4.0, {"roi": "sphere_37mm", "metric": "rc_max", "low": 0.0, "high": 10.0}),
    "small-animal": (0.6, {"roi": "uniform_region", "metric": "activity_recovery", "low": 0.5, "high": 1.5}),
    "site-rod-cylinder": (4.0, {"roi": "reference", "metric": "activity_recovery", "low": 0.5, "high": 1.5}),
    "uniform-cylinder": (4.0, {"roi": "uniform_volume", "metric": "activity_recovery", "low": 0.5, "high": 1.5}),
}


@pytest.fixture(scope="module", params=sorted(KINDS))
def kind_scans(request, tmp_path_factory):
    """Two reconstructions (PSF FWHM) of one acquisition of the template, a band set for it."""
    name = request.param
    voxel, entry = KINDS[name]
    root = tmp_path_factory.mktemp(name)
    d = default_scan_settings(name)
    paths = []
    for i, factor in enumerate((1.0, 1.5)):
        spec = SynthSpec(phantom=name, voxel_mm=(voxel,) * 3, psf_fwhm_mm=d["psf_fwhm_mm"] * factor, background_kbq_ml=d["background_kbq_ml"],
                         noise_cv=0.05, seed=i, shift_mm=(1.0, -1.0, 0.5), rotation_deg=(0.0, 0.0, 25.0))
        paths.append(write_synthetic(synthesize(spec), root / "recons" / f"recon_{i}", "dicom"))
    bands = root / f"test-{name}.yaml"
    bands.write_text(yaml.safe_dump({"phantometry_bands": 1, "name": f"test-{name}", "title": "test limits (invented)",
                                     "source": "invented for a test", "template": name, "entries": [entry]}), encoding="utf-8")
    return {"name": name, "paths": paths, "fill": paths[0]["fill"], "bands": bands, "root": root}


def test_measure_with_bands_report_and_record(kind_scans, tmp_path, capsys):
    name = kind_scans["name"]
    out = tmp_path / "res"
    db = tmp_path / "ledger.sqlite3"
    code = main(["measure", str(kind_scans["paths"][0]["image"]), "--template", name, "--fill", str(kind_scans["fill"]),
                 "--out", str(out), "--bands", str(kind_scans["bands"]), "--report", "--record", "--db", str(db)])
    captured = capsys.readouterr()
    assert code == 0, captured.err
    doc = json.loads((out / "measurements.json").read_text(encoding="utf-8"))
    assert doc["schema_version"] >= 2
    assert [b["name"] for b in doc["bands"]] == [f"test-{name}"]  # the band sets applied are recorded
    judged = [m for m in doc["measurements"] if m["verdict"] is not None]
    assert judged and all(m["verdict"] == "pass" for m in judged)
    assert doc["template"]["analysis_kind"] == kind_of(load_template(name)).name
    html = (out / "report.html").read_text(encoding="utf-8")
    assert "data:image/png;base64," in html and "qualified medical physicist" in html
    assert "recorded analysis #1" in captured.out
    assert main(["ledger", "list", "--db", str(db)]) == 0
    assert name in capsys.readouterr().out


def test_compare_with_report(kind_scans, tmp_path, capsys):
    out = tmp_path / "cmp"
    code = main(["compare", str(kind_scans["root"] / "recons"), "--template", kind_scans["name"], "--fill", str(kind_scans["fill"]),
                 "--out", str(out), "--workers", "1", "--report", "--bands", str(kind_scans["bands"])])
    captured = capsys.readouterr()
    assert code == 0, captured.err
    ranking = list(csv.DictReader(open(out / "ranking.csv", encoding="utf-8")))
    assert len(ranking) == 2 and all(r["status"] == "measured" for r in ranking)
    assert (out / "report.html").stat().st_size > 10_000
    said = " ".join(captured.out.split())  # the files named are the ones written (the kind's charts)
    assert all(f.name in said for f in out.iterdir() if f.is_file() and not f.name.startswith("."))
    # the values by setting: a table per key metric of the kind, here the banded one, one row
    # per setting, each value inside its band marked as such
    html = (out / "report.html").read_text(encoding="utf-8")
    entry = KINDS[kind_scans["name"]][1]
    # (a metric of several ROIs has a table of its own, one of a single ROI is a column of the
    # table of key numbers per setting: either way each value cell names its metric)
    metric = entry["metric"]
    table_id = f"matrix-{metric.replace('_', '-')}" if f'id="matrix-{metric.replace("_", "-")}"' in html else "per-setting"
    body = re.search(f'<table id="{table_id}">.*?<tbody>(.*?)</tbody>', html, re.S).group(1)
    cells = re.findall(f'<td class="num[^"]*" data-metric="{metric}">(.*?)</td>', body)
    assert body.count("<tr>") == 2 and len(cells) % 2 == 0 and cells, metric
    assert sum("&#10003;" in c for c in cells) >= 2 and not any("&#10007;" in c for c in cells)
    for folder in sorted((out / "series").iterdir()):
        assert (folder / "overlay.png").exists()


def test_compare_without_bands_lists_each_kinds_key_numbers(kind_scans, tmp_path, capsys):
    out = tmp_path / "cmp"
    code = main(["compare", str(kind_scans["root"] / "recons"), "--template", kind_scans["name"], "--fill", str(kind_scans["fill"]),
                 "--out", str(out), "--workers", "1"])
    captured = capsys.readouterr()
    assert code == 0, captured.err
    said = " ".join(captured.out.split())
    assert "not ranked: ranking needs acceptance bands" in said and not (out / "ranking.csv").exists()
    rows = list(csv.DictReader(open(out / "key_numbers.csv", encoding="utf-8")))
    assert len(rows) == 2 and all(r["status"] == "measured" for r in rows)
    summary = json.loads((out / "summary.json").read_text(encoding="utf-8"))
    numbers = summary["key_numbers"]["numbers"]
    assert numbers and all(r[n["column"]] for r in rows for n in numbers)  # every key number of the kind, for both
    for title in {n["title"] for n in numbers}:  # every metric shown in the terminal (a heading may wrap)
        assert all(word in said for word in title.split()), title
    assert "…" not in captured.out  # nothing cut short in 80 columns


def test_seg_refused_where_it_does_not_apply(kind_scans, tmp_path, capsys):
    name = kind_scans["name"]
    code = main(["measure", str(kind_scans["paths"][0]["image"]), "--template", name, "--fill", str(kind_scans["fill"]),
                 "--out", str(tmp_path / "seg"), "--seg"])
    err = capsys.readouterr().err
    if kind_of(load_template(name)).supports_seg:
        assert code == 0, err
        assert (tmp_path / "seg" / "rois_seg.dcm").exists()
    else:
        assert code == 2
        lines = [line for line in err.splitlines() if line.strip()]
        assert len(lines) == 1 and lines[0].startswith("phantometry: error:") and "--seg" in lines[0]
        assert not Path(tmp_path / "seg").exists()


def test_harmonise_runs_or_is_refused_in_one_line(kind_scans, tmp_path, capsys):
    # harmonise needs a kind that re-reads its metrics on a filtered image (recovery
    # coefficients): it runs for those, and every other kind is refused with one clear line
    name = kind_scans["name"]
    out = tmp_path / "harm"
    code = main(["harmonise", str(kind_scans["paths"][0]["image"]), "--template", name, "--fill", str(kind_scans["fill"]),
                 "--bands", str(kind_scans["bands"]), "--out", str(out), "--max-fwhm", "4", "--step", "1"])
    captured = capsys.readouterr()
    if kind_of(load_template(name)).supports_reread:
        assert code == 0, captured.err
        doc = json.loads((out / "harmonisation.json").read_text(encoding="utf-8"))
        assert doc["passing_range_mm"] == [0.0, 4.0] and doc["recommended_fwhm_mm"] is not None  # invented wide band: all pass
    else:
        assert code == 2
        lines = [line for line in captured.err.splitlines() if line.strip()]
        assert len(lines) == 1 and lines[0].startswith("phantometry: error:") and name in lines[0] and "harmonise works with" in lines[0]
        assert not out.exists()
