"""``compare`` without bands: no ranking, each setting's key numbers by label; folders reached
through symbolic links are followed (and a link loop does not trap the search)."""

from __future__ import annotations

import csv
import json
import os
import re
import subprocess
import sys
from pathlib import Path

import pytest

from phantometry import ranking as rk
from phantometry.compare import discover_jobs
from phantometry.compare.discover import files_under
from phantometry.synth import write_synthetic_family

SCRIPT = Path(sys.executable).parent / "phantometry"
ENV = dict(os.environ, MPLBACKEND="Agg", COLUMNS="80")
FWHMS = (12.0, 5.0, 8.0)  # discovery order differs from label order


@pytest.fixture(scope="module")
def linked(tmp_path_factory):
    """Three reconstructions kept elsewhere, reached from the input folder only through
    symbolic links, one of them twice; plus a link back up the tree (a loop)."""
    root = tmp_path_factory.mktemp("unranked")
    fam = write_synthetic_family(root / "store", [{"fwhm_mm": f, "noise_cv": 0.15 * (5.0 / f) ** 1.5, "filter": f"Gauss {f:g}mm"}
                                                  for f in FWHMS], voxel_mm=4.0)
    inp = root / "in"
    (inp / "site").mkdir(parents=True)
    for n, folder in enumerate(fam["series"]):
        (inp / "site" / f"link{n}").symlink_to(folder, target_is_directory=True)
    (inp / "again").symlink_to(fam["series"][0], target_is_directory=True)  # the same series a second time
    (inp / "site" / "loop").symlink_to(inp, target_is_directory=True)  # a loop back to the top
    return {**fam, "root": root, "input": inp}


def test_files_under_follows_links_once_each(linked):
    files = files_under([linked["input"]])
    reals = [os.path.realpath(f) for f in files]
    assert len(reals) == len(set(reals))  # each real file once, the loop and the second link add nothing
    expected = sum(len(list(Path(s).iterdir())) for s in linked["series"])
    assert len(files) == expected
    assert all(str(f).startswith(str(linked["input"])) for f in files)  # named by the path that reached them
    jobs, _ = discover_jobs(linked["input"])
    assert len(jobs) == 3 and all("link" in j.where or "again" in j.where for j in jobs)


def test_compare_without_bands_lists_key_numbers_by_label(linked, tmp_path):
    out = tmp_path / "cmp"
    r = subprocess.run([str(SCRIPT), "compare", str(linked["input"]), "--fill", str(linked["fill"]), "--out", str(out),
                        "--workers", "2", "--report"], capture_output=True, text=True, env=ENV, timeout=900)
    assert r.returncode == 0, r.stderr
    text = r.stdout
    assert "not ranked: ranking needs acceptance bands" in " ".join(text.split())
    assert "rank " not in text and "no bands" not in text and "0/0" not in text
    # the terminal: every key-number table lists the settings by label (5, 8, 12 mm: digits as numbers)
    # (settings 1, 2, 3 were blurred 12, 5, 8 mm: by label 2, 3, 1; a long label wraps, its row
    # starts with the setting's number)
    numbers = [int(m.group(1)) for m in re.finditer(r"^\s*(\d+)\s+OSEM", text, re.M)]
    assert numbers == [2, 3, 1] * 4, numbers  # RC max, RC mean, RC peak, per setting
    for line in text.splitlines():  # no value is cut short to fit the terminal
        assert "…" not in line, line
    for heading in ("RC max", "RC mean", "RC peak", "effective", "FWHM", "activity", "residual", "contrast"):
        assert heading in text, heading
    # the files: no ranking.csv; key_numbers.csv by label with the one-number metrics
    assert not (out / "ranking.csv").exists()
    rows = list(csv.DictReader(open(out / "key_numbers.csv", encoding="utf-8")))
    assert [row["label"].split()[-1] for row in rows] == ["5mm", "8mm", "12mm"]
    fwhm = [float(row["phantom.effective_fwhm_mm"]) for row in rows]
    assert fwhm == sorted(fwhm) and abs(fwhm[0] - 5.0) < 0.8 and abs(fwhm[2] - 12.0) < 1.5  # the PSF each was blurred with
    for column in ("lung_insert.lung_residual_pct", "background.activity_recovery", "sphere_10mm.percent_contrast",
                   "sphere_10mm.background_variability_pct", "sphere_37mm.rc_peak", "phantom.effective_fwhm_mm.u"):
        assert all(row[column] for row in rows), column
    assert abs(float(rows[1]["background.activity_recovery"]) - 1.0) < 0.03
    summary = json.loads((out / "summary.json").read_text())
    assert summary["ranked"] is False and summary["ranking"] == [] and "needs acceptance bands" in summary["ranking_note"]
    assert [s["label"] for s in summary["key_numbers"]["settings"]] == [row["label"] for row in rows]
    assert {"phantom.effective_fwhm_mm", "lung_insert.lung_residual_pct", "background.activity_recovery"} <= {
        n["column"] for n in summary["key_numbers"]["numbers"]}
    # the report: no ranking table, a note instead; tables of the one-number metrics, rows by label
    html = (out / "report.html").read_text(encoding="utf-8")
    assert 'id="not-ranked"' in html and '<table id="ranking">' not in html
    for table in ("per-setting", "matrix-rc-max", "matrix-rc-mean", "matrix-rc-peak"):
        body = re.search(f'<table id="{table}">.*?<tbody>(.*?)</tbody>', html, re.S).group(1)
        assert re.findall(r"Gauss (\d+)mm", body) == ["5", "8", "12"], table
    # the one-number metrics side by side, a value (with its uncertainty) for every setting
    per_setting = re.search('<table id="per-setting">(.*?)</table>', html, re.S).group(1)
    for metric, heading in (("effective_fwhm_mm", "effective FWHM (mm)"), ("lung_residual_pct", "insert residual (%)"),
                            ("activity_recovery", "activity recovery"), ("percent_contrast", "10mm"),
                            ("background_variability_pct", "10mm")):
        assert re.search(f'<th class="num" data-metric="{metric}"[^>]*>[^<]*{re.escape(heading)}', per_setting), metric
        cells = re.findall(f'<td class="num" data-metric="{metric}">([^<]*)</td>', per_setting)
        assert len(cells) == 3 and all("&plusmn;" in c for c in cells), (metric, cells)
    fwhm_cells = re.findall('<td class="num" data-metric="effective_fwhm_mm">([0-9.]+)', per_setting)
    assert len(fwhm_cells) == 3 and all(abs(float(c) - f) < 0.006 for c, f in zip(fwhm_cells, fwhm))  # as in key_numbers.csv
    said = " ".join(text.split())
    assert "key_numbers.csv" in said and "ranking.csv" not in said


def test_by_label_and_natural_order():
    def outcome(n, label, error=None):
        return rk.SeriesOutcome(job=rk.SeriesJob(n, "nifti", (f"/x/{n}.nii",)), label=label, error=error)

    outs = [outcome(1, "OSEM 4i, Gauss 12mm"), outcome(2, "OSEM 4i, Gauss 5mm"), outcome(3, "BSREM b=350"),
            outcome(4, "OSEM 2i"), outcome(5, "zzz", error="boom")]
    assert [o.job.number for o in rk.by_label(outs)] == [3, 4, 2, 1]  # failed settings are not listed
    assert rk.natural_key("a10") > rk.natural_key("a9") and rk.natural_key("B") == rk.natural_key("b")


def test_files_under_survives_every_kind_of_loop(tmp_path):
    # a/ and b/ link to each other, c links to itself (a link loop the system refuses to
    # resolve), d is dangling, e links to the folder above the input: each real folder is
    # searched once and the search ends
    top = tmp_path / "top"
    inp = top / "input"
    (inp / "a").mkdir(parents=True)
    (inp / "b").mkdir()
    (inp / "a" / "one.dcm").write_bytes(b"1")
    (inp / "b" / "two.dcm").write_bytes(b"2")
    (top / "outside.dcm").write_bytes(b"3")  # reached only through the link to the folder above
    (inp / "a" / "to_b").symlink_to(inp / "b", target_is_directory=True)
    (inp / "b" / "to_a").symlink_to(inp / "a", target_is_directory=True)
    (inp / "c").symlink_to(inp / "c")
    (inp / "d").symlink_to(tmp_path / "nowhere")
    (inp / "e").symlink_to(top, target_is_directory=True)
    link_to_input = tmp_path / "input_link"
    link_to_input.symlink_to(inp, target_is_directory=True)
    for root in (inp, link_to_input):
        files = files_under([root])
        assert sorted(f.name for f in files) == ["one.dcm", "outside.dcm", "two.dcm"], files
        assert all(str(f).startswith(str(root)) for f in files)
    # a file given twice (itself and through a link) is listed once
    (tmp_path / "one_link.dcm").symlink_to(inp / "a" / "one.dcm")
    assert len(files_under([inp / "a" / "one.dcm", tmp_path / "one_link.dcm"])) == 1


def test_metric_headings_in_words():
    assert rk.metric_heading("max_deviation_pct") == "max deviation (%)"
    assert rk.metric_heading("voxel_cv_pct") == "voxel CV (%)" and rk.metric_heading("effective_fwhm_mm") == "effective FWHM (mm)"


def test_narrow_terminal_splits_the_columns_never_cuts_a_value(monkeypatch):
    import io

    from rich.console import Console

    from phantometry.cli import compare as cli_compare

    buf = io.StringIO()
    monkeypatch.setattr(cli_compare, "console", Console(file=buf, width=50, highlight=False))
    settings = [rk.SeriesOutcome(job=rk.SeriesJob(n, "nifti", (f"/x/{n}.nii",)), label=f"OSEM 4i, Gauss {n}mm, a long label")
                for n in (1, 12)]
    columns = [(f"metric number {k} (%)", [f"{1000 * k + n}.25" for n in (1, 2)]) for k in range(1, 7)]
    cli_compare._print_settings_tables("per setting", settings, columns)
    text = buf.getvalue()
    assert all(len(line) <= 50 for line in text.splitlines()) and "…" not in text
    assert text.count("per setting (continued)") >= 1  # more tables, each within the width
    for _, cells in columns:  # every value whole
        assert all(c in text for c in cells)
