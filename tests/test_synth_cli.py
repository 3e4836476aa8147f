"""``phantometry synth`` as a user runs it: truth in the results' frame, scan date, user templates."""

from __future__ import annotations

import json
import os
import shutil
import subprocess
import sys
from pathlib import Path

import numpy as np
import pytest
import yaml

from phantometry.synth import SynthSpec, synthesize, truth_in_frame
from phantometry.templates import builtin_template_dir

SCRIPT = Path(sys.executable).parent / "phantometry"
ENV = dict(os.environ, MPLBACKEND="Agg", COLUMNS="100")
#: a pose whose x and y are far from zero, so LPS and RAS centres differ by tens of mm
POSE = ["--voxel", "3", "--noise", "0.05", "--shift", "25,-30,8", "--rotate", "2,-1,35"]


def run(*args: str, cwd: Path) -> subprocess.CompletedProcess:
    return subprocess.run([str(SCRIPT), *args], capture_output=True, text=True, cwd=cwd, env=ENV, timeout=600)


def _measured_centres(results: Path) -> dict[str, np.ndarray]:
    doc = json.loads((results / "measurements.json").read_text())
    out: dict[str, dict[str, float]] = {}
    for m in doc["measurements"]:
        if m["metric"].startswith("centre_"):
            out.setdefault(m["roi"], {})[m["metric"][7]] = m["value"]
    return {roi: np.array([v["x"], v["y"], v["z"]]) for roi, v in out.items()}


@pytest.mark.parametrize("fmt, frame", [("dicom", "LPS"), ("nifti", "RAS")])
def test_measured_centres_match_truth_json_as_written(tmp_path, fmt, frame):
    # the truth file is in the frame the results use (DICOM patient LPS; NIfTI scanner RAS)
    # and says so: a user compares the two files directly
    r = run("synth", "scan", "--format", fmt, *POSE, cwd=tmp_path)
    assert r.returncode == 0, r.stderr
    image = tmp_path / "scan" / ("dicom" if fmt == "dicom" else "phantom.nii.gz")
    r = run("measure", str(image), "--fill", "scan/fill.yaml", "--out", "res", "--quiet", cwd=tmp_path)
    assert r.returncode == 0, r.stderr
    truth = json.loads((tmp_path / "scan" / "truth.json").read_text())
    assert truth["frame"] == frame
    measured = _measured_centres(tmp_path / "res")
    assert len(measured) == 6
    for roi, centre in measured.items():
        assert np.linalg.norm(centre - np.array(truth["inserts"][roi]["centre_mm"])) < 1.0, roi
    # the body centre and axis follow the same frame (the axis points along +-z either way)
    assert abs(truth["body"]["centre_mm"][0]) > 10 and abs(truth["body"]["centre_mm"][1]) > 10


def test_truth_in_frame_flips_positions_and_directions():
    res = synthesize(SynthSpec(voxel_mm=(4.0,) * 3, shift_mm=(10, -20, 5), rotation_deg=(3, 0, 30)))
    lps = res.truth
    ras = truth_in_frame(lps, "RAS")
    assert lps["frame"] == "LPS" and ras["frame"] == "RAS" and lps is not ras
    flip = np.array([-1.0, -1.0, 1.0])
    for name, ins in lps["inserts"].items():
        np.testing.assert_allclose(ras["inserts"][name]["centre_mm"], flip * np.array(ins["centre_mm"]))
        np.testing.assert_allclose(ras["inserts"][name]["axis"], flip * np.array(ins["axis"]))
        assert ras["inserts"][name]["diameter_mm"] == ins["diameter_mm"]
    # rotation and translation still map template mm to world mm, now RAS
    rot, t = np.array(ras["rotation"]), np.array(ras["translation_mm"])
    ins = res.template.inserts[0]
    np.testing.assert_allclose(rot @ np.asarray(ins.centre_mm, float) + t, ras["inserts"][ins.name]["centre_mm"], atol=1e-9)
    plain = json.loads(json.dumps(lps))  # the file's content (tuples become lists)
    assert truth_in_frame(ras, "LPS") == plain  # x and y flipped twice: exact
    assert truth_in_frame(lps, "LPS") == plain


def test_acquired_at_sets_the_scan_date_and_the_fill_record_follows(tmp_path):
    r = run("synth", "scan", "--voxel", "4", "--acquired-at", "2027-03-09T14:05:00+01:00", cwd=tmp_path)
    assert r.returncode == 0, r.stderr
    truth = json.loads((tmp_path / "scan" / "truth.json").read_text())
    assert truth["acquired_at"] == "2027-03-09T14:05:00+01:00"
    fill = yaml.safe_load((tmp_path / "scan" / "fill.yaml").read_text())
    assert str(fill["background"]["measured_at"]).startswith("2027-03-09")
    r = run("measure", "scan/dicom", "--fill", "scan/fill.yaml", "--out", "res", "--quiet", cwd=tmp_path)
    assert r.returncode == 0, r.stderr
    doc = json.loads((tmp_path / "res" / "measurements.json").read_text())
    assert doc["series"]["acquired_at"] == "2027-03-09T14:05:00+01:00"
    # background recovered: the fill record's decay correction agrees with the new date
    rec = next(m for m in doc["measurements"] if m["metric"] == "activity_recovery")
    assert rec["value"] == pytest.approx(1.0, abs=0.03)


@pytest.mark.parametrize("value, said", [("2027-03-09", "time-zone offset"), ("next tuesday", "ISO 8601")])
def test_acquired_at_refused_without_offset_or_unreadable(tmp_path, value, said):
    r = run("synth", "scan", "--acquired-at", value, cwd=tmp_path)
    assert r.returncode == 2 and r.stdout == ""
    lines = r.stderr.strip().splitlines()
    assert len(lines) == 1 and lines[0].startswith("phantometry: error: --acquired-at") and said in lines[0]
    assert not (tmp_path / "scan").exists()


def test_templates_folder_names_a_user_template(tmp_path):
    folder = tmp_path / "mine"
    folder.mkdir()
    text = (builtin_template_dir() / "examples" / "site-rod-cylinder.yaml").read_text()
    (folder / "ward-cylinder.yaml").write_text(text.replace("name: site-rod-cylinder", "name: ward-cylinder"))
    assert "name: ward-cylinder" in (folder / "ward-cylinder.yaml").read_text()
    r = run("synth", "scan", "--phantom", "ward-cylinder", "--voxel", "4", cwd=tmp_path)
    assert r.returncode == 2 and "unknown template 'ward-cylinder'" in r.stderr  # not found without the folder
    r = run("synth", "scan", "--phantom", "ward-cylinder", "--templates", "mine", "--voxel", "4", cwd=tmp_path)
    assert r.returncode == 0, r.stderr
    truth = json.loads((tmp_path / "scan" / "truth.json").read_text())
    assert truth["template"] == "ward-cylinder" and (tmp_path / truth["template_source"]).parent == folder
    r = run("synth", "other", "--templates", "absent", cwd=tmp_path)
    assert r.returncode == 2 and r.stderr.strip() == "phantometry: error: --templates absent: no such folder"
    assert not (tmp_path / "other").exists()
    shutil.rmtree(tmp_path / "scan")
