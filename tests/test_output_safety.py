"""Output folders never destroy what the user owns (issue 13, section 1; output errors of section 4).

Every case drives the installed ``phantometry`` console script as a subprocess (except the
in-process fault injections, which need to reach inside the process) and asserts the exit code,
exactly one ``phantometry: error:`` line naming the path, no traceback, and that the user's
files survive byte for byte (a hash of the whole tree before and after).
"""

from __future__ import annotations

import errno
import hashlib
import json
import os
import pathlib
import resource
import shutil
import signal
import stat
import subprocess
import sys
import time
from pathlib import Path

import numpy as np
import pytest

from phantometry.outputs import MARKER_NAME, png_is_ours, temp_prefix

SCRIPT = Path(sys.executable).parent / "phantometry"
USER_BYTES = b"my own notes \x00\xff, not phantometry's\n"


# ============================================================================== helpers
def run(*args: str, cwd: Path | None = None, preexec=None, env: dict | None = None, timeout: float = 600) -> subprocess.CompletedProcess:
    full_env = dict(os.environ, MPLBACKEND="Agg", COLUMNS="120", **(env or {}))
    return subprocess.run([str(SCRIPT), *map(str, args)], capture_output=True, text=True, cwd=cwd, env=full_env,
                          preexec_fn=preexec, timeout=timeout)


def tree(root: Path) -> dict[str, str]:
    """Every entry under ``root``: sha256 of files, 'dir' for folders, the target of links."""
    out: dict[str, str] = {}
    for dirpath, dirs, files in os.walk(root, followlinks=False):
        for d in dirs:
            p = Path(dirpath, d)
            out[str(p.relative_to(root))] = f"link:{os.readlink(p)}" if p.is_symlink() else "dir"
        for f in files:
            p = Path(dirpath, f)
            rel = str(p.relative_to(root))
            out[rel] = f"link:{os.readlink(p)}" if p.is_symlink() else hashlib.sha256(p.read_bytes()).hexdigest()
    return out


def assert_error(r: subprocess.CompletedProcess, *fragments: str) -> str:
    """Exit 2, exactly one ``phantometry: error:`` line holding every fragment, no traceback."""
    assert r.returncode == 2, (r.returncode, r.stdout[-2000:], r.stderr[-2000:])
    assert "Traceback" not in r.stdout + r.stderr
    lines = [ln for ln in r.stderr.splitlines() if ln.strip()]
    assert len(lines) == 1, r.stderr
    line = lines[0]
    assert line.startswith("phantometry: error: "), line
    for f in fragments:
        assert f in line, (f, line)
    return line


def measure_args(scan: Path, out: Path | str, *extra: str) -> list[str]:
    return ["measure", scan / "dicom", "--fill", scan / "fill.yaml", "--out", out, *extra]


# ============================================================================== fixtures
@pytest.fixture(scope="module")
def scan_source(tmp_path_factory) -> Path:
    """A small synthetic body scan, made once by the console script."""
    root = tmp_path_factory.mktemp("output_safety") / "scan"
    r = run("synth", root, "--voxel", "4", "--noise", "0.05")
    assert r.returncode == 0, r.stderr
    return root


@pytest.fixture()
def work(tmp_path, scan_source) -> Path:
    """A fresh working folder holding a copy of the scan (``work/scan``) and a user file."""
    shutil.copytree(scan_source, tmp_path / "scan")
    (tmp_path / "notes.txt").write_bytes(USER_BYTES)
    return tmp_path


@pytest.fixture(scope="module")
def first_results(tmp_path_factory, scan_source) -> Path:
    """A results folder written by ``measure --report`` (copied by tests that replace it)."""
    out = tmp_path_factory.mktemp("first") / "res"
    r = run(*measure_args(scan_source, out, "--report"))
    assert r.returncode == 0, r.stderr
    return out


# ============================================================================== refusals
def test_out_is_a_folder_with_a_users_file(work):
    mine = work / "mine"
    mine.mkdir()
    (mine / "thesis.txt").write_bytes(USER_BYTES)
    before = tree(work)
    for extra in ((), ("--overwrite",)):  # never replaced, even with --overwrite
        r = run(*measure_args(work / "scan", mine, *extra))
        assert_error(r, str(mine), "was not written by phantometry")
        assert tree(work) == before


def test_out_is_the_input_dicom_folder(work):
    before = tree(work)
    for extra in ((), ("--overwrite",)):
        r = run(*measure_args(work / "scan", work / "scan" / "dicom", *extra))
        assert_error(r, str(work / "scan" / "dicom"), "input")
        assert tree(work) == before


def test_out_is_the_parent_of_the_inputs(work):
    before = tree(work)
    # the scan folder holds a marker (synth wrote it), so only the input rule protects it
    assert (work / "scan" / MARKER_NAME).exists()
    for extra in ((), ("--overwrite",)):
        r = run(*measure_args(work / "scan", work / "scan", *extra))
        assert_error(r, str(work / "scan"), "contains the input")
        assert tree(work) == before


def test_out_inside_the_input_folder(work):
    before = tree(work)
    r = run(*measure_args(work / "scan", work / "scan" / "dicom" / "res"))
    assert_error(r, str(work / "scan" / "dicom" / "res"), "inside the input folder")
    assert tree(work) == before


def test_out_is_the_fill_record_or_a_template_file(work):
    from phantometry.templates import list_templates

    tpl = work / "my-template.yaml"
    shutil.copy(list_templates([])["iec-body"], tpl)
    before = tree(work)
    r = run(*measure_args(work / "scan", work / "scan" / "fill.yaml"))
    assert_error(r, str(work / "scan" / "fill.yaml"), "input")
    r = run(*measure_args(work / "scan", work, "--template", tpl))
    assert_error(r, str(work), "contains the input")
    assert tree(work) == before


def test_out_through_a_symlink_to_the_inputs(work):
    (work / "link").symlink_to(work / "scan")
    before = tree(work)
    r = run(*measure_args(work / "scan", work / "link" / "dicom"))
    assert_error(r, "input")
    r = run(*measure_args(work / "scan", work / "link"))
    assert_error(r, str(work / "link"))
    assert tree(work) == before


def test_out_is_a_symlink_elsewhere(work):
    (work / "target").mkdir()
    (work / "link").symlink_to(work / "target")
    before = tree(work)
    r = run(*measure_args(work / "scan", work / "link", "--overwrite"))
    assert_error(r, str(work / "link"), "symbolic link")
    assert tree(work) == before


def test_out_inside_the_inputs_seen_through_a_bind_mount(work):
    """Another path to the same folder (no symbolic link to resolve): caught by file identity."""
    view = work / "view"
    view.mkdir()
    if os.geteuid() != 0 or subprocess.run(["mount", "--bind", str(work / "scan"), str(view)], capture_output=True).returncode != 0:
        pytest.skip("needs mount --bind (root, mount permitted)")
    try:
        before = tree(work / "scan")
        r = run(*measure_args(work / "scan", view / "dicom" / "res"))
        assert_error(r, str(view / "dicom" / "res"), "inside the input folder")
        r = run(*measure_args(work / "scan", view / "dicom"))
        assert_error(r, str(view / "dicom"), "this is the input")
        assert tree(work / "scan") == before
    finally:
        subprocess.run(["umount", str(view)], check=True)


def test_out_is_an_existing_file(work):
    before = tree(work)
    for extra in ((), ("--overwrite",)):
        r = run(*measure_args(work / "scan", work / "notes.txt", *extra))
        assert_error(r, str(work / "notes.txt"), "existing file")
        assert tree(work) == before
    assert (work / "notes.txt").read_bytes() == USER_BYTES


def test_out_dot_in_the_folder_holding_the_inputs(work):
    scan = work / "scan"
    before = tree(work)
    r = run("measure", "dicom", "--fill", "fill.yaml", "--out", ".", cwd=scan)
    assert_error(r, str(scan), "contains the input")
    r = run("measure", "dicom", "--fill", "fill.yaml", "--out", ".", "--overwrite", cwd=scan)
    assert_error(r, str(scan), "contains the input")
    assert tree(work) == before


@pytest.mark.parametrize("with_file", [True, False], ids=["cwd-with-a-file", "cwd-empty"])
def test_out_dot_in_a_folder_without_the_inputs(work, with_file):
    cwd = work / "elsewhere"
    cwd.mkdir()
    if with_file:
        (cwd / "keep.txt").write_bytes(USER_BYTES)
    before = tree(work)
    r = run(*measure_args(work / "scan", "."), cwd=cwd)
    assert_error(r, str(cwd), "current folder")
    assert tree(work) == before


def test_file_used_as_a_parent_folder(work):
    before = tree(work)
    r = run(*measure_args(work / "scan", work / "notes.txt" / "res"))
    assert_error(r, str(work / "notes.txt"), "is a file, not a folder")
    assert tree(work) == before


def test_unreadable_marker_is_not_trusted(work):
    fake = work / "fake"
    fake.mkdir()
    (fake / MARKER_NAME).write_text("{not json", encoding="utf-8")
    (fake / "data.txt").write_bytes(USER_BYTES)
    before = tree(work)
    r = run(*measure_args(work / "scan", fake, "--overwrite"))
    assert_error(r, str(fake), "not written by phantometry")
    assert tree(work) == before


# ============================================================================== earlier results
def test_earlier_results_refused_without_overwrite(work, first_results):
    res = work / "res"
    shutil.copytree(first_results, res)
    before = tree(work)
    r = run(*measure_args(work / "scan", res))
    assert_error(r, str(res), "--overwrite")
    assert tree(work) == before


def test_earlier_results_replaced_whole_with_overwrite(work, first_results):
    res = work / "res"
    shutil.copytree(first_results, res)
    assert (res / "report.html").exists()
    old_marker = json.loads((res / MARKER_NAME).read_text())
    assert old_marker["kind"] == "measure" and "report.html" in old_marker["entries"]
    r = run(*measure_args(work / "scan", res, "--overwrite"))
    assert r.returncode == 0, r.stderr
    assert "Traceback" not in r.stdout + r.stderr
    said = " ".join(r.stdout.split())
    assert f"replaced the earlier measure results folder {res}" in said
    assert "report.html" in said  # the earlier report is named, not silently dropped
    assert not (res / "report.html").exists()
    new_marker = json.loads((res / MARKER_NAME).read_text())
    assert sorted(new_marker["entries"]) == sorted(p.name for p in res.iterdir() if p.name != MARKER_NAME)
    # nothing left beside it: no temporary or old folders
    assert sorted(p.name for p in work.iterdir()) == ["notes.txt", "res", "scan"]


def test_earlier_results_with_a_users_file_added_are_refused(work, first_results):
    res = work / "res"
    shutil.copytree(first_results, res)
    (res / "my-comments.txt").write_bytes(USER_BYTES)
    before = tree(work)
    r = run(*measure_args(work / "scan", res, "--overwrite"))
    assert_error(r, str(res), "my-comments.txt", "did not write")
    assert tree(work) == before


def test_empty_folder_is_filled_and_kept(work):
    empty = work / "empty"
    empty.mkdir()
    os.chmod(empty, 0o2770)  # a shared folder: set-group-id, no access for others
    inode = empty.stat().st_ino
    r = run(*measure_args(work / "scan", empty))
    assert r.returncode == 0, r.stderr
    assert (empty / "measurements.csv").exists() and (empty / MARKER_NAME).exists()
    assert empty.stat().st_ino == inode and stat.S_IMODE(empty.stat().st_mode) == 0o2770  # the user's folder itself
    assert sorted(p.name for p in work.iterdir()) == ["empty", "notes.txt", "scan"]


# ============================================================================== temp folders
def _dead_pid() -> int:
    """The PID of a process that has ended (started, waited for)."""
    p = subprocess.Popen([sys.executable, "-c", "pass"])
    p.wait()
    return p.pid


def test_stale_temp_folder_of_a_killed_run_is_removed_and_nothing_else(work):
    res = work / "res"
    dead = _dead_pid()
    stale = work / f"{temp_prefix(res)}{dead}-0a1b2c3d"
    alive = work / f"{temp_prefix(res)}{os.getpid()}-0a1b2c3e"  # this test's own process: alive
    other_host = work / f".res.phantometry-tmp-some-other-host-{dead}-0a1b2c3f"
    near_misses = [work / ".res.mine", work / f"{temp_prefix(res)}{dead}-0a1b2c3d-keep", work / f"{temp_prefix(res)}{dead}-XYZ"]
    for d in (stale, alive, other_host, *near_misses):
        d.mkdir()
        (d / "inside.txt").write_bytes(USER_BYTES)
    before = tree(work)
    r = run(*measure_args(work / "scan", res))
    assert r.returncode == 0, r.stderr
    assert not stale.exists()
    after = tree(work)
    kept = {k: v for k, v in before.items() if not k.startswith(stale.name)}
    assert {k: v for k, v in after.items() if k in kept} == kept  # everything else untouched
    assert all(d.exists() for d in (alive, other_host, *near_misses))


def test_killed_run_leaves_a_temp_folder_the_next_run_removes(work):
    """A real kill -9 while the run writes (as soon as its temporary folder appears)."""
    res = work / "res"
    proc = subprocess.Popen([str(SCRIPT), *map(str, measure_args(work / "scan", res))], env=dict(os.environ, MPLBACKEND="Agg"),
                            stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL)
    prefix = temp_prefix(res)
    found = None
    try:
        for _ in range(60000):
            found = [p for p in work.iterdir() if p.name.startswith(prefix)]
            if found or proc.poll() is not None:
                break
            time.sleep(0.002)
    finally:
        proc.kill()
        proc.wait()
    leftovers = [p for p in work.iterdir() if p.name.startswith(prefix)]
    if not leftovers:  # conditional: the kill came after the folder was moved into place
        pytest.skip("the run finished writing before it could be killed")
    r = run(*measure_args(work / "scan", res, "--overwrite") if res.exists() else measure_args(work / "scan", res))
    assert r.returncode == 0, r.stderr
    assert not any(p.exists() for p in leftovers)
    assert not [p for p in work.iterdir() if p.name.startswith(prefix)]


# ============================================================================== umask
def _umask(mask: int):
    def pre():
        os.umask(mask)

    return pre


def test_measure_folder_follows_the_umask(work):
    res = work / "res"
    r = run(*measure_args(work / "scan", res, "--report"), preexec=_umask(0o027))
    assert r.returncode == 0, r.stderr
    assert stat.S_IMODE(res.stat().st_mode) == 0o750
    files = [p for p in res.rglob("*") if p.is_file()]
    assert files and all(stat.S_IMODE(p.stat().st_mode) == 0o640 for p in files), [(p.name, oct(p.stat().st_mode)) for p in files]


def test_synth_folder_follows_the_umask(tmp_path):
    out = tmp_path / "s"
    r = run("synth", out, "--voxel", "6", "--noise", "0", preexec=_umask(0o022))
    assert r.returncode == 0, r.stderr
    dirs = [out, *[p for p in out.rglob("*") if p.is_dir()]]
    files = [p for p in out.rglob("*") if p.is_file()]
    assert all(stat.S_IMODE(d.stat().st_mode) == 0o755 for d in dirs)
    assert files and all(stat.S_IMODE(p.stat().st_mode) == 0o644 for p in files)


# ============================================================================== output errors
def _no_leftovers(folder: Path, name: str) -> None:
    assert not [p.name for p in folder.iterdir() if p.name == name or p.name.startswith(f".{name}.")]


def test_file_size_limit_efbig(work):
    """A real RLIMIT_FSIZE (SIGXFSZ ignored, so the write fails with EFBIG instead of killing)."""

    def pre():
        signal.signal(signal.SIGXFSZ, signal.SIG_IGN)
        resource.setrlimit(resource.RLIMIT_FSIZE, (20000, 20000))  # measurements.json is larger

    before = tree(work)
    r = run(*measure_args(work / "scan", work / "res"), preexec=pre)
    assert_error(r, str(work / "res"), os.strerror(errno.EFBIG))
    _no_leftovers(work, "res")
    assert tree(work) == before


def _make_unwritable(folder: Path) -> tuple[int, list[str]]:
    """Make ``folder`` unwritable for this user; returns the expected error number and the undo command.

    Permission bits do not stop the super-user, so as root the folder is made immutable
    (``chattr +i``, Linux; writing in it then fails with EPERM even for root).
    """
    if os.geteuid() != 0:
        os.chmod(folder, 0o555)
        return errno.EACCES, ["chmod", "755", str(folder)]
    try:
        done = subprocess.run(["chattr", "+i", str(folder)], capture_output=True).returncode == 0
    except OSError:
        done = False
    if not done:
        pytest.skip("running as root, where permission bits do not stop writes, and chattr +i is not available here")
    return errno.EPERM, ["chattr", "-i", str(folder)]


def test_unwritable_location(work):
    ro = work / "ro"
    ro.mkdir()
    (ro / "keep.txt").write_bytes(USER_BYTES)
    expected, undo = _make_unwritable(ro)
    try:
        before = tree(work)
        r = run(*measure_args(work / "scan", ro / "res"))
        assert_error(r, str(ro / "res"), os.strerror(expected))
        r = run("synth", ro / "s", "--voxel", "8")
        assert_error(r, str(ro / "s"), os.strerror(expected))
        assert tree(work) == before
    finally:
        subprocess.run(undo, check=True)


@pytest.mark.parametrize("with_name", [True, False], ids=["open", "write"])
def test_disk_full_enospc_in_process(work, capsys, monkeypatch, with_name):
    """Fault injection: the write of measurements.json fails with ENOSPC (in this process)."""
    from phantometry.cli import main

    real = pathlib.Path.write_text

    def full(self, *a, **kw):
        if self.name == "measurements.json":
            if with_name:
                raise OSError(errno.ENOSPC, os.strerror(errno.ENOSPC), str(self))
            raise OSError(errno.ENOSPC, os.strerror(errno.ENOSPC))
        return real(self, *a, **kw)

    monkeypatch.setattr(pathlib.Path, "write_text", full)
    before = tree(work)
    code = main([str(a) for a in measure_args(work / "scan", work / "res")])
    err = capsys.readouterr().err
    assert code == 2
    lines = [ln for ln in err.splitlines() if ln.strip()]
    assert len(lines) == 1 and lines[0].startswith("phantometry: error: "), err
    assert str(work / "res") in lines[0] and os.strerror(errno.ENOSPC) in lines[0]
    assert ("measurements.json" in lines[0]) == with_name
    _no_leftovers(work, "res")
    assert tree(work) == before


def test_target_changed_during_the_run_is_rechecked(work, monkeypatch):
    """The writer checks again at the moment of replacing: a folder the user made meanwhile survives."""
    import phantometry.outputs as outputs
    from phantometry.errors import OutputRefused
    from phantometry.synth import SynthSpec, synthesize, write_synthetic

    out = work / "late"
    real = outputs.write_marker

    def user_steps_in(folder, kind):
        out.mkdir()
        (out / "theirs.txt").write_bytes(USER_BYTES)
        return real(folder, kind)

    monkeypatch.setattr(outputs, "write_marker", user_steps_in)
    with pytest.raises(OutputRefused, match="not written by phantometry"):
        write_synthetic(synthesize(SynthSpec(voxel_mm=(8.0,) * 3, noise_cv=0.0)), out)
    assert (out / "theirs.txt").read_bytes() == USER_BYTES
    assert sorted(p.name for p in out.iterdir()) == ["theirs.txt"]
    assert not [p.name for p in work.iterdir() if p.name.startswith(".late.")]  # temp folder removed


# ============================================================================== failed localisation picture
@pytest.fixture(scope="module")
def no_phantom(tmp_path_factory) -> Path:
    """A DICOM series of a plain cylinder (no spheres: localisation fails) and a fill record."""
    from phantometry.io.dicom_write import write_dicom_series
    from phantometry.synth import DEMO_SCAN_TIME
    from phantometry.volume import Volume

    root = tmp_path_factory.mktemp("nophantom")
    z, y, x = np.mgrid[0:30, 0:50, 0:50]
    data = (((x - 25) ** 2 + (y - 25) ** 2) < 15**2).astype(np.float32) * 5000
    write_dicom_series(Volume(data, np.diag([3.0, 3.0, 3.0, 1.0]), acquired_at=DEMO_SCAN_TIME, nuclide="F-18"), root / "cyl")
    (root / "fill.yaml").write_text("nuclide: F-18\nbackground:\n  concentration_kbq_ml: 5.0\n  measured_at: "
                                    "2026-11-03T10:30:00+01:00\nspheres:\n  ratio_to_background: 4\n")
    return root


def test_failed_picture_never_overwrites_a_users_file(tmp_path, no_phantom):
    args = ["measure", no_phantom / "cyl", "--fill", no_phantom / "fill.yaml", "--out", tmp_path / "res"]
    pic = tmp_path / "res.failed.png"
    r = run(*args)
    assert r.returncode == 2 and "Traceback" not in r.stderr
    assert pic.exists() and png_is_ours(pic) and not (tmp_path / "res").exists()
    first = pic.stat().st_mtime_ns
    r = run(*args)  # ours: replaced by the new picture
    assert r.returncode == 2 and png_is_ours(pic) and pic.stat().st_mtime_ns >= first
    pic.write_bytes(USER_BYTES)  # now a file of the user's with that name
    r = run(*args)
    assert r.returncode == 2 and "Traceback" not in r.stderr
    assert pic.read_bytes() == USER_BYTES
    assert sorted(p.name for p in tmp_path.iterdir()) == ["res.failed.png"]


def test_a_plain_png_is_not_ours(tmp_path):
    import matplotlib

    matplotlib.use("Agg")
    import matplotlib.pyplot as plt

    fig = plt.figure(figsize=(1, 1))
    fig.savefig(tmp_path / "x.png")
    plt.close(fig)
    assert not png_is_ours(tmp_path / "x.png")
    assert not png_is_ours(tmp_path / "missing.png")


# ============================================================================== other commands
def test_synth_refuses_a_users_folder_and_replaces_its_own_with_overwrite(tmp_path):
    mine = tmp_path / "mine"
    mine.mkdir()
    (mine / "a.txt").write_bytes(USER_BYTES)
    (tmp_path / "f.txt").write_bytes(USER_BYTES)
    before = tree(tmp_path)
    assert_error(run("synth", mine, "--voxel", "8", "--overwrite"), str(mine), "not written by phantometry")
    assert_error(run("synth", tmp_path / "f.txt", "--voxel", "8"), str(tmp_path / "f.txt"), "existing file")
    assert tree(tmp_path) == before
    s = tmp_path / "s"
    assert run("synth", s, "--voxel", "8", "--noise", "0").returncode == 0
    assert_error(run("synth", s, "--voxel", "8"), str(s), "--overwrite")
    r = run("synth", s, "--voxel", "8", "--noise", "0", "--format", "nifti", "--overwrite")
    assert r.returncode == 0, r.stderr
    assert "replaced the earlier synthetic scan" in " ".join(r.stdout.split()) and "dicom" in r.stdout
    assert not (s / "dicom").exists() and (s / "phantom.nii.gz").exists()


def test_compare_output_rules(work, first_results):
    scan = work / "scan"
    before = tree(work)
    base = ["compare", scan / "dicom", "--fill", scan / "fill.yaml", "--workers", "1", "--out"]
    assert_error(run(*base, scan / "dicom"), str(scan / "dicom"), "input")
    assert_error(run(*base, scan), str(scan), "contains the input")
    assert_error(run(*base, work / "notes.txt"), "existing file")
    labels = work / "labels.yaml"
    labels.write_text("{}\n")
    before = tree(work)
    assert_error(run(*base, work, "--labels", labels), str(work), "contains the input")
    assert tree(work) == before
    res = work / "res"
    shutil.copytree(first_results, res)  # earlier measure results: replaced with --overwrite only
    before = tree(work)
    assert_error(run(*base, res), str(res), "--overwrite")
    assert tree(work) == before
    r = run(*base, res, "--overwrite")
    assert r.returncode == 0, r.stderr
    said = " ".join(r.stdout.split())
    assert "replaced the earlier measure results" in said and "report.html" in said
    assert json.loads((res / MARKER_NAME).read_text())["kind"] == "compare"
    assert (res / "key_numbers.csv").exists() and not (res / "measurements.csv").exists()


def test_demo_refuses_a_users_folder(tmp_path):
    mine = tmp_path / "mine"
    mine.mkdir()
    (mine / "a.txt").write_bytes(USER_BYTES)
    before = tree(tmp_path)
    assert_error(run("demo", "--out", mine, "--overwrite"), str(mine), "not written by phantometry")
    assert tree(tmp_path) == before


def test_compare_disk_full_in_a_series_folder_stops_the_run(work, capsys, monkeypatch):
    """Fault injection (in this process, --workers 1): a series folder cannot be written (ENOSPC)."""
    from phantometry.cli import main

    real = pathlib.Path.write_text

    def full(self, *a, **kw):
        if self.name == "measurements.json":
            raise OSError(errno.ENOSPC, os.strerror(errno.ENOSPC))
        return real(self, *a, **kw)

    monkeypatch.setattr(pathlib.Path, "write_text", full)
    before = tree(work)
    code = main(["compare", str(work / "scan" / "dicom"), "--fill", str(work / "scan" / "fill.yaml"), "--workers", "1",
                 "--out", str(work / "cmp")])
    err = capsys.readouterr().err
    lines = [ln for ln in err.splitlines() if ln.strip()]
    assert code == 2 and len(lines) == 1 and lines[0].startswith("phantometry: error: "), err
    assert str(work / "cmp") in lines[0] and os.strerror(errno.ENOSPC) in lines[0] and "series_001" in lines[0]
    _no_leftovers(work, "cmp")
    assert tree(work) == before
