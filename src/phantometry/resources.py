"""Finding named YAML resources (templates, band sets): one lookup for every kind of file.

A resource is found by name in a list of folders: folders the user gives (``--templates``,
``--dir``), then those of an environment variable (``os.pathsep``-separated), then the ones
shipped inside the package (``roi_templates/``, installed as ``phantometry.roi_templates``).
Earlier folders win, so a user folder can shadow a shipped file of the same name.
"""

from __future__ import annotations

import os
from pathlib import Path
from typing import Sequence


def builtin_dir() -> Path:
    """The folder of the shipped templates and band sets (inside the installed package, or the
    checkout's ``roi_templates/`` for an editable install)."""
    installed = Path(__file__).resolve().parent / "roi_templates"
    if installed.is_dir():  # a wheel install: the folder ships inside the package
        return installed
    return Path(__file__).resolve().parents[2] / "roi_templates"


def search_path(extra_dirs: Sequence[str | os.PathLike] | None, env_var: str, builtin: Sequence[Path]) -> list[Path]:
    """``extra_dirs``, then the folders of ``$env_var``, then ``builtin``."""
    dirs = [Path(d) for d in (extra_dirs or [])]
    env = os.environ.get(env_var)
    if env:
        dirs += [Path(d) for d in env.split(os.pathsep) if d]
    return dirs + list(builtin)


def list_named(dirs: Sequence[Path], skip_prefixes: tuple[str, ...] = ("_",)) -> dict[str, Path]:
    """Name (file name without ``.yaml``/``.yml``) -> file over ``dirs``, earlier folders winning;
    files whose names start with one of ``skip_prefixes`` are left out."""
    found: dict[str, Path] = {}
    for d in dirs:
        if not d.is_dir():
            continue
        for f in sorted(d.glob("*.yaml")) + sorted(d.glob("*.yml")):
            if f.name.startswith(skip_prefixes):
                continue
            found.setdefault(f.stem, f)
    return found


def is_file_reference(name_or_path: str | os.PathLike) -> bool:
    """A name given as a file (ends in ``.yaml``/``.yml`` or exists) rather than a name to find."""
    p = Path(name_or_path)
    return p.suffix in (".yaml", ".yml") or p.exists()
