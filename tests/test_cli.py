"""The command line: thin wiring, one-line errors with exit code 2, no tracebacks."""

import subprocess
import sys

import pytest

from phantometry.cli import main


def run(capsys, *args):
    code = main(list(args))
    out = capsys.readouterr()
    return code, out.out, out.err


def test_console_script_help():
    r = subprocess.run([sys.executable, "-m", "phantometry", "--help"], capture_output=True, text=True)
    assert r.returncode == 0 and "measure" in r.stdout and "demo" in r.stdout


def test_measure_command(capsys, demo_scan, tmp_path):
    code, out, err = run(capsys, "measure", str(demo_scan["image"]), "--fill", str(demo_scan["fill"]), "--out", str(tmp_path / "r"))
    assert code == 0, err
    assert "sphere_37mm" in out and "RC max" in out and "qualified medical" in out.replace("\n", " ")
    assert (tmp_path / "r" / "measurements.csv").exists()


@pytest.mark.parametrize(
    "args, needle",
    [
        (["measure", "{empty}", "--fill", "{fill}", "--out", "{out}"], "no DICOM"),
        (["measure", "{missing}", "--fill", "{fill}", "--out", "{out}"], "no such file"),
        (["measure", "{image}", "--fill", "{badfill}", "--out", "{out}"], "badfill.yaml"),
        (["measure", "{image}", "--fill", "{fill}", "--out", "{out}", "--template", "{badtpl}"], "badtpl.yaml"),
        (["measure", "{image}", "--fill", "{fill}", "--out", "{out}", "--template", "nope"], "unknown template"),
        (["measure", "{image}", "--fill", "{fill}", "--out", "{out}", "--centre", "lung=1,2,3"], "no insert 'lung'"),
        (["templates", "check", "{badtpl}"], "badtpl.yaml"),
    ],
)
def test_bad_input_one_line_exit_2(capsys, demo_scan, tmp_path, args, needle):
    (tmp_path / "empty").mkdir()
    (tmp_path / "badfill.yaml").write_text("nuclide: F-18\nbackground:\n  concentration_kbq_ml: -5\n  measured_at: 2026-11-03T10:00:00+01:00\n")
    (tmp_path / "badtpl.yaml").write_text("phantometry_template: 1\nname: x\n")
    subs = {
        "empty": str(tmp_path / "empty"),
        "missing": str(tmp_path / "missing"),
        "fill": str(demo_scan["fill"]),
        "badfill": str(tmp_path / "badfill.yaml"),
        "badtpl": str(tmp_path / "badtpl.yaml"),
        "image": str(demo_scan["image"]),
        "out": str(tmp_path / "out"),
    }
    code, out, err = run(capsys, *[a.format(**subs) for a in args])
    assert code == 2
    lines = [l for l in err.splitlines() if l.strip()]
    assert len(lines) == 1 and lines[0].startswith("phantometry: error:"), err
    assert needle in lines[0]
    assert "Traceback" not in err
    assert not (tmp_path / "out").exists()


def test_debug_shows_traceback(capsys, tmp_path):
    (tmp_path / "empty").mkdir()
    code, out, err = run(capsys, "--debug", "info", str(tmp_path / "empty"))
    assert code == 2 and "Traceback" in err


def test_templates_list_and_check(capsys):
    from phantometry.templates import builtin_template_dir

    code, out, _ = run(capsys, "templates", "list")
    assert code == 0 and "iec-body" in out
    code, out, _ = run(capsys, "templates", "check", str(builtin_template_dir() / "iec-body.yaml"))
    assert code == 0 and "valid" in out


def test_synth_nifti_and_measure(capsys, tmp_path):
    code, _, err = run(capsys, "synth", str(tmp_path / "s"), "--format", "nifti", "--voxel", "4", "--noise", "0.05", "--rotate", "0,0,120", "--flip")
    assert code == 0, err
    code, out, err = run(capsys, "measure", str(tmp_path / "s" / "phantom.nii.gz"), "--fill", str(tmp_path / "s" / "fill.yaml"), "--out", str(tmp_path / "r"))
    assert code == 0, err
    assert "sphere_10mm" in out


def test_demo_runs_offline(capsys, tmp_path):
    code, out, err = run(capsys, "demo", "--out", str(tmp_path / "demo"))
    assert code == 0, err
    assert (tmp_path / "demo" / "results" / "measurements.csv").exists()
