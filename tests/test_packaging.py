"""Packaging: every sub-package is listed for the wheel, and the templates ship inside it."""

import tomllib
from pathlib import Path

ROOT = Path(__file__).resolve().parents[1]


def test_all_subpackages_listed_in_pyproject():
    cfg = tomllib.loads((ROOT / "pyproject.toml").read_text())
    listed = set(cfg["tool"]["setuptools"]["packages"])
    found = {
        ".".join(p.parent.relative_to(ROOT / "src").parts)
        for p in (ROOT / "src" / "phantometry").rglob("__init__.py")
    }
    assert found <= listed, f"add to pyproject.toml packages: {sorted(found - listed)}"
    assert "phantometry.roi_templates" in listed
    assert cfg["tool"]["setuptools"]["package-dir"]["phantometry.roi_templates"] == "roi_templates"


def test_wheel_carries_templates(tmp_path):
    # build the wheel the way pip installs it and look inside: data files must ship in it
    import shutil
    import subprocess
    import sys
    import zipfile

    src = tmp_path / "src_copy"  # build from a copy so no build/ folder lands in the checkout
    shutil.copytree(ROOT, src, ignore=shutil.ignore_patterns(".git", "build", "*.egg-info", "__pycache__", ".pytest_cache"))
    r = subprocess.run(
        [sys.executable, "-m", "pip", "wheel", "--no-deps", "-q", "-w", str(tmp_path), str(src)],
        capture_output=True,
        text=True,
    )
    assert r.returncode == 0, r.stderr[-2000:]
    wheel = next(tmp_path.glob("phantometry-*.whl"))
    names = zipfile.ZipFile(wheel).namelist()
    assert "phantometry/roi_templates/iec-body.yaml" in names
    assert "phantometry/cli/commands.py" in names
