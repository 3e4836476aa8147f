"""The README's Python example runs as printed and measures what it says."""

from __future__ import annotations

import contextlib
import io
import re
from pathlib import Path

README = Path(__file__).resolve().parents[1] / "README.md"


def _python_block() -> str:
    text = README.read_text(encoding="utf-8")
    section = text[text.index("## Python\n"):]
    section = section[: section.index("\n## ", 1)]
    blocks = re.findall(r"```python\n(.*?)```", section, flags=re.S)
    assert len(blocks) == 1, "the README's Python section holds one example"
    return blocks[0]


def test_readme_python_example_runs_and_prints_rc_max_per_sphere():
    out = io.StringIO()
    with contextlib.redirect_stdout(out):
        exec(compile(_python_block(), "README.md (Python section)", "exec"), {})
    lines = [ln.split() for ln in out.getvalue().splitlines()]
    # the six hot spheres of the body phantom, each with an RC max and a verdict of the band set
    assert [ln[0] for ln in lines] == [f"sphere_{d}mm" for d in (10, 13, 17, 22, 28, 37)]
    rc = [float(ln[1]) for ln in lines]
    # noise-free, 6 mm FWHM: RC max rises with sphere size (partial-volume effect, common practice)
    assert rc == sorted(rc) and 0.3 < rc[0] < rc[-1] <= 1.05
    assert all(ln[2] in ("pass", "fail") for ln in lines)


def test_readme_python_names_exist():
    """Every dotted name the Python section shows can be imported."""
    import importlib

    text = README.read_text(encoding="utf-8")
    section = text[text.index("## Python\n"):]
    section = section[: section.index("\n## ", 1)]
    names = set(re.findall(r"`(phantometry(?:\.\w+)+)", section))
    assert len(names) >= 10
    for name in sorted(names):
        module, _, attr = name.rpartition(".")
        try:
            mod = importlib.import_module(name)
        except ModuleNotFoundError:
            mod = importlib.import_module(module)
            assert hasattr(mod, attr), name
