"""Files the ledger commands write (CSV export, control chart): never replaced unasked, written atomically."""

from __future__ import annotations

import os
import tempfile
from pathlib import Path
from typing import IO, Any, Callable

from ..errors import InputError


def check_output_file(target: Path, overwrite: bool, what: str) -> None:
    """Refuse to replace an existing file without ``overwrite``, and refuse a folder.

    Raises
    ------
    InputError
        One line naming the path: it is a folder, or it exists and ``overwrite`` is False.
    """
    if target.is_dir():
        raise InputError(f"{target}: is a folder; {what} writes a file, give a file name")
    if (target.exists() or target.is_symlink()) and not overwrite:
        raise InputError(f"{target}: exists; give --overwrite to replace it")


def _temporary_beside(target: Path, suffix: str) -> tuple[int, Path]:
    try:
        target.parent.mkdir(parents=True, exist_ok=True)
        fd, name = tempfile.mkstemp(prefix=f".{target.name}.", suffix=suffix, dir=target.parent)
    except OSError as exc:
        raise InputError(f"{target}: cannot be written ({exc.strerror or exc})") from None
    return fd, Path(name)


def write_text_atomically(target: Path, write: Callable[[IO[str]], Any]) -> None:
    """Write a UTF-8 text file through a temporary file beside it, then move it into place.

    ``write(fh)`` fills the open file. On any failure the temporary file is removed and
    ``target`` is untouched; a system error (no space, no permission) becomes one
    :class:`InputError` line naming the path and the system's reason.
    """
    fd, tmp = _temporary_beside(target, ".tmp")
    try:
        with os.fdopen(fd, "w", newline="", encoding="utf-8") as fh:
            write(fh)
        os.replace(tmp, target)
    except OSError as exc:
        raise InputError(f"{target}: cannot be written ({exc.strerror or exc})") from None
    finally:
        tmp.unlink(missing_ok=True)


def save_figure_atomically(fig: Any, target: Path) -> None:
    """Save a matplotlib figure as PNG through a temporary file beside ``target``."""
    fd, tmp = _temporary_beside(target, ".tmp.png")
    os.close(fd)
    try:
        fig.savefig(tmp, format="png")
        os.replace(tmp, target)
    except OSError as exc:
        raise InputError(f"{target}: cannot be written ({exc.strerror or exc})") from None
    finally:
        tmp.unlink(missing_ok=True)


__all__ = ["check_output_file", "save_figure_atomically", "write_text_atomically"]
