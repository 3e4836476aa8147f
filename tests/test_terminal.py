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


def _run_piped(args, cwd):
    import os
    import subprocess

    env = dict(os.environ, MPLBACKEND="Agg", COLUMNS="100")
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
