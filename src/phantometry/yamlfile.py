"""Reading the project's YAML files (templates, band sets, fill records) with one-line errors."""

from __future__ import annotations

import os
from pathlib import Path
from typing import Any

import yaml

from .errors import PhantometryError


def read_yaml_file(path: str | os.PathLike, error: type[PhantometryError], what: str, missing_hint: str | None = None) -> Any:
    """Parse a YAML file, raising ``error`` with a message that names the file.

    Parameters
    ----------
    error : the exception class to raise (e.g. ``TemplateError``).
    what : what the file is, for messages ("template", "band set", "fill record").
    missing_hint : said after "no such {what}" when the file does not exist.
    """
    p = Path(path)
    try:
        text = p.read_text(encoding="utf-8")
    except FileNotFoundError:
        hint = f"; {missing_hint}" if missing_hint else ""
        raise error(f"{p}: no such {what}{hint}") from None
    except OSError as exc:
        raise error(f"{p}: cannot read {what} ({exc.strerror or exc})") from None
    try:
        return yaml.safe_load(text)
    except yaml.YAMLError as exc:
        mark = getattr(exc, "problem_mark", None)
        at = f" at line {mark.line + 1}, column {mark.column + 1}" if mark else ""
        raise error(f"{p}: not valid YAML{at}: {getattr(exc, 'problem', None) or exc}; fix the syntax") from None
