"""Smoke test of the installed console script, as a user runs it.

CI runs this module twice: in the normal environment (newest releases) and in a second one
installed at the lowest versions pyproject.toml allows (.ci/run), so a dependency bound that is
declared is also tested. Every case drives the ``phantometry`` executable as a subprocess.
"""

from __future__ import annotations

import os
import re
import subprocess
import sys
from pathlib import Path

import pytest

SCRIPT = Path(sys.executable).parent / "phantometry"

COMMANDS = [
    [],
    ["measure"],
    ["synth"],
    ["info"],
    ["demo"],
    ["compare"],
    ["templates"],
    ["templates", "list"],
    ["templates", "show"],
    ["templates", "check"],
    ["bands"],
    ["bands", "list"],
    ["bands", "show"],
    ["ledger"],
    ["ledger", "add"],
    ["ledger", "list"],
    ["ledger", "trend"],
    ["ledger", "baseline"],
    ["ledger", "check"],
    ["ledger", "export"],
    ["ledger", "import"],
    ["ledger", "info"],
    ["ledger", "remove"],
]


def run(*args: str, cwd: Path | None = None, timeout: float = 300) -> subprocess.CompletedProcess:
    env = dict(os.environ, MPLBACKEND="Agg", COLUMNS="100")
    return subprocess.run([str(SCRIPT), *args], capture_output=True, text=True, cwd=cwd, env=env, timeout=timeout)


def test_console_script_is_installed():
    assert SCRIPT.exists(), f"{SCRIPT} not found: install the project (pip install -e .)"


@pytest.mark.parametrize("command", COMMANDS, ids=lambda c: " ".join(c) or "(root)")
def test_help_of_every_command(command):
    r = run(*command, "--help")
    assert r.returncode == 0, r.stderr
    assert r.stdout.startswith("Usage: phantometry"), r.stdout[:200]
    assert "Traceback" not in r.stdout + r.stderr
    # placeholders in words (DIR, NAME|FILE), never Python types such as <list[Path]> or <bool>
    assert not re.search(r"<[a-z][A-Za-z_\[\]., |]*>", r.stdout), r.stdout
    assert "{" not in r.stdout.splitlines()[0], r.stdout.splitlines()[0]


def test_version():
    from phantometry import __version__

    r = run("--version")
    assert r.returncode == 0 and r.stdout.strip() == f"phantometry {__version__}", (r.stdout, r.stderr)


@pytest.mark.parametrize(
    "args, needle",
    [
        (["measure", "scan", "--out", "r"], "--fill"),  # a required option missing
        (["measure", "scan", "--fill", "f.yaml", "--out", "r", "--no-such-option"], "--no-such-option"),
        (["synth", "out", "--voxel", "abc"], "--voxel"),  # a value of the wrong type
        (["no-such-command"], "no-such-command"),
    ],
    ids=["missing-option", "unknown-option", "bad-number", "unknown-command"],
)
def test_usage_errors(tmp_path, args, needle):
    r = run(*args, cwd=tmp_path)
    assert r.returncode == 2, (r.stdout, r.stderr)
    assert "Traceback" not in r.stdout + r.stderr
    lines = [line for line in r.stderr.splitlines() if line.strip()]
    assert lines[0].startswith("Usage: phantometry"), r.stderr
    errors = [line for line in lines if line.startswith("Error:")]
    assert len(errors) == 1 and needle in errors[0], r.stderr
    assert list(tmp_path.iterdir()) == []  # nothing written


def test_bare_command_shows_help_without_traceback():
    r = run()
    assert "Usage: phantometry" in r.stdout + r.stderr
    assert "Traceback" not in r.stdout + r.stderr
    assert r.returncode in (0, 2)  # click versions differ: 0 (older) or 2 (8.2 and newer)


def test_measure_a_small_synthetic_scan(tmp_path):
    r = run("synth", str(tmp_path / "scan"), "--voxel", "4", "--noise", "0.05", "--ratio", "4")
    assert r.returncode == 0, r.stderr
    r = run("measure", str(tmp_path / "scan" / "dicom"), "--fill", str(tmp_path / "scan" / "fill.yaml"), "--out", str(tmp_path / "res"))
    assert r.returncode == 0, r.stderr
    assert "sphere_37mm" in r.stdout
    assert (tmp_path / "res" / "measurements.csv").read_text(encoding="utf-8").startswith("series_uid,")
