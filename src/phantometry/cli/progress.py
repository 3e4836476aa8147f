"""Progress lines on stderr while a long command works: only when someone is watching.

``measure`` takes 15-20 s on a full-size scan; a silent terminal for that long looks stuck.
:func:`step_printer` gives the library's ``progress`` callable: each step as it starts, one
line on stderr with the time since the command began (``phantometry: [ 3.1 s] locating the
phantom``). When stderr is not a terminal (piped, redirected, a script) or ``--quiet`` is
given, there is no callable and nothing is printed, so logs and pipelines see only results
and errors.
"""

from __future__ import annotations

import sys
import time
from typing import Callable, Optional, TextIO

QUIET_HELP = "No progress lines on stderr (they appear only when stderr is a terminal)."


def interactive(stream: Optional[TextIO] = None) -> bool:
    """Whether ``stream`` (default: stderr) is a terminal someone watches."""
    stream = sys.stderr if stream is None else stream
    try:
        return bool(stream.isatty())
    except (AttributeError, ValueError):  # replaced or closed stream
        return False


def step_printer(quiet: bool, stream: Optional[TextIO] = None) -> Optional[Callable[[str], None]]:
    """The ``progress`` callable for a command: None when quiet or not interactive.

    Parameters
    ----------
    quiet : the command's ``--quiet``.
    stream : where to print (default: stderr, read when each line is printed).
    """
    if quiet or not interactive(stream):
        return None
    start = time.perf_counter()

    def step(text: str) -> None:
        out = sys.stderr if stream is None else stream
        print(f"phantometry: [{time.perf_counter() - start:5.1f} s] {text}", file=out, flush=True)

    return step


__all__ = ["QUIET_HELP", "interactive", "step_printer"]
