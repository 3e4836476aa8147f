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
