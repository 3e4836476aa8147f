"""A phantom that cannot be placed: the message names the likely cause, as the image shows it,
and says how to place the phantom by hand."""

from __future__ import annotations

import os
import subprocess
import sys
from pathlib import Path

import numpy as np
import pytest
import yaml

from phantometry.errors import PhantomNotFound, PhantomNotPlaced
from phantometry.fill import FillRecord
from phantometry.locate import LOW_CONTRAST_CNR, contrast_seen, find_body, image_edges_reached, likely_cause
from phantometry.measure import measure_volume
from phantometry.synth import SynthSpec, synthesize
from phantometry.templates import builtin_template_dir, load_template

SCRIPT = Path(sys.executable).parent / "phantometry"
ENV = dict(os.environ, MPLBACKEND="Agg", COLUMNS="100")
TPL = load_template("iec-body")


def run(*args: str, cwd: Path) -> subprocess.CompletedProcess:
    return subprocess.run([str(SCRIPT), *args], capture_output=True, text=True, cwd=cwd, env=ENV, timeout=600)


def _one_error_line(r: subprocess.CompletedProcess) -> str:
    assert r.returncode == 2, r.stdout + r.stderr
    lines = r.stderr.strip().splitlines()
    assert len(lines) == 1 and lines[0].startswith("phantometry: error: "), r.stderr
    assert "Traceback" not in r.stderr and r.stdout == ""
    return lines[0]


def test_low_ratio_scan_names_low_contrast(tmp_path):
    # a 1.15:1 fill in a noisy image: the spheres are about as strong as the noise
    r = run("synth", "scan", "--voxel", "3", "--ratio", "1.15", "--noise", "0.15", "--seed", "1", cwd=tmp_path)
    assert r.returncode == 0, r.stderr
    line = _one_error_line(run("measure", "scan/dicom", "--fill", "scan/fill.yaml", "--out", "res", cwd=tmp_path))
    assert "scan/dicom: " in line
    assert "likely cause: contrast too low for the fill record's 1.15:1 ratio" in line
    assert "noise SDs" in line and "outside the field of view" not in line
    assert "--centre NAME=x,y,z" in line and "sphere_37mm" in line
    assert not (tmp_path / "res").exists()


def test_scan_shifted_out_of_the_field_names_the_edges(tmp_path):
    # a 258 mm field of view cuts the 300 mm wide body, and the phantom is moved 70 mm down the bed
    r = run("synth", "scan", "--voxel", "3", "--matrix", "86,86,66", "--shift", "0,0,-70", cwd=tmp_path)
    assert r.returncode == 0, r.stderr
    line = _one_error_line(run("measure", "scan/dicom", "--fill", "scan/fill.yaml", "--out", "res", cwd=tmp_path))
    assert "likely cause: phantom partly outside the field of view" in line
    assert "the first slice" in line and "contrast too low" not in line
    assert "--centre NAME=x,y,z" in line
    assert not (tmp_path / "res").exists()


def test_spheres_colder_than_the_fill_record_says():
    # every sphere filled with water, but the fill record says they are hot at 4:1: the
    # hottest spot is far below the 300 % the record implies
    res = synthesize(SynthSpec(voxel_mm=(3.0,) * 3, noise_cv=0.1, cold=[s.name for s in TPL.spheres]))
    fill = {k: v for k, v in res.fill_record.items() if k != "cold"}
    with pytest.raises(PhantomNotPlaced) as err:
        measure_volume(res.volume, TPL, FillRecord.from_dict(fill), uncertainties=False, resolution=False)
    text = str(err.value)
    assert "likely cause: contrast too low for the fill record's 4:1 ratio" in text
    assert "where that ratio gives about 300 %" in text and "check the fill record" in text


def test_clear_contrast_in_another_phantom_names_the_template(tmp_path):
    # a variant phantom: the sphere ring at 55 % of its radius; the image is clear and whole,
    # so the template is what does not fit
    raw = yaml.safe_load((builtin_template_dir() / "iec-body.yaml").read_text())
    for ins in raw["inserts"]:
        if ins["name"].startswith("sphere"):
            x, y, z = ins["centre_mm"]
            ins["centre_mm"] = [0.55 * x, 0.55 * y, z]
    variant = tmp_path / "variant.yaml"
    variant.write_text(yaml.safe_dump(raw))
    res = synthesize(SynthSpec(phantom=str(variant), voxel_mm=(3.0,) * 3, noise_cv=0.1))
    with pytest.raises(PhantomNotPlaced) as err:
        measure_volume(res.volume, TPL, FillRecord.from_dict(res.fill_record), uncertainties=False, resolution=False)
    text = str(err.value)
    assert "likely cause: wrong template" in text and "check --template" in text
    assert "contrast too low" not in text and "outside the field of view" not in text


def test_what_the_diagnosis_sees():
    clear = synthesize(SynthSpec(voxel_mm=(3.0,) * 3, noise_cv=0.1, seed=4))
    body = find_body(clear.volume, "x")
    assert image_edges_reached(body) == []
    seen = contrast_seen(body, 1.0)
    # the 18 mm average in the 37 mm sphere of a 4:1 fill: most of the 300 % contrast
    assert 200 < seen.percent < 320 and seen.cnr > 5 * LOW_CONTRAST_CNR
    flat = synthesize(SynthSpec(voxel_mm=(3.0,) * 3, noise_cv=0.1, sphere_ratio=1.0001, seed=4))
    noise_only = contrast_seen(find_body(flat.volume, "x"), 1.0)
    assert noise_only.cnr < LOW_CONTRAST_CNR  # the maximum of the noise alone stays below the limit
    # no body of the template's size: no cause is guessed (the size message says it all)
    data = np.zeros((40, 60, 60), np.float32)
    z, y, x = np.indices(data.shape)
    data[((x - 30) ** 2 + (y - 30) ** 2) < 15**2] = 5000.0
    from phantometry.volume import Volume

    assert likely_cause(Volume(data, np.diag([2.0, 2.0, 2.0, 1.0])), TPL) is None


def test_a_size_mismatch_keeps_its_own_message():
    from phantometry.volume import Volume
    from phantometry.synth import DEMO_SCAN_TIME

    data = np.zeros((40, 60, 60), np.float32)
    z, y, x = np.indices(data.shape)
    data[((x - 30) ** 2 + (y - 30) ** 2) < 15**2] = 5000.0
    vol = Volume(data, np.diag([2.0, 2.0, 2.0, 1.0]), acquired_at=DEMO_SCAN_TIME, nuclide="F-18")
    fill = FillRecord.from_dict(synthesize(SynthSpec(voxel_mm=(6.0,) * 3)).fill_record)
    with pytest.raises(PhantomNotFound) as err:
        measure_volume(vol, TPL, fill, uncertainties=False, resolution=False)
    assert not isinstance(err.value, PhantomNotPlaced) and "likely cause" not in str(err.value)


def test_a_body_cut_by_the_field_of_view_is_named_as_such(tmp_path):
    # the phantom moved 120 mm along the bed in a 200 mm long field of view: the part left in
    # the image is too short for the template, and it reaches the last slice
    r = run("synth", "scan", "--voxel", "4", "--matrix", "80,80,50", "--shift", "0,0,120", cwd=tmp_path)
    assert r.returncode == 0, r.stderr
    line = _one_error_line(run("measure", "scan/dicom", "--fill", "scan/fill.yaml", "--out", "res", cwd=tmp_path))
    assert "the object found measures" in line and "it reaches the last slice of the image" in line
    assert "likely cause: phantom partly outside the field of view" in line and "scan it whole" in line
    assert not (tmp_path / "res").exists()


def test_a_question_is_answered_by_the_cause_not_repeated():
    # a uniform cylinder longer than the field of view, measured as the body phantom: no axis
    # insert; the message gives the cause instead of asking whether the template is right
    from phantometry.synth import DEMO_SCAN_TIME
    from phantometry.volume import Volume

    shape = (50, 75, 75)
    _, y, x = np.indices(shape)
    data = np.where((x - 37) ** 2 + (y - 37) ** 2 < 30**2, 5300.0, 0.0).astype(np.float32)
    aff = np.diag([4.0, 4.0, 4.0, 1.0])
    aff[:3, 3] = [-148, -148, -100]
    vol = Volume(data=data, affine=aff, acquired_at=DEMO_SCAN_TIME, nuclide="F-18")
    fill = FillRecord.from_dict(synthesize(SynthSpec(voxel_mm=(6.0,) * 3)).fill_record)
    with pytest.raises(PhantomNotPlaced) as err:
        measure_volume(vol, TPL, fill, uncertainties=False, resolution=False)
    text = str(err.value)
    assert "no cold axis insert" in text and "?" not in text
    assert "likely cause: phantom partly outside the field of view" in text and "--centre NAME=x,y,z" in text
