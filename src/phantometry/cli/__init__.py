"""Command line of phantometry: thin wiring over library functions.

Each command calls one importable function (``phantometry.measure.measure``,
``phantometry.synth.synthesize`` ...). Expected errors (:class:`PhantometryError`) become one
line on stderr and exit code 2; ``--debug`` shows the traceback. Anything else is a bug:
exit code 1 with a short message.
"""

from __future__ import annotations

import sys
import traceback
from typing import Optional

import typer

from ..errors import PhantometryError

#: Options shared by every typer app of the command line: plain click-style usage errors (a
#: usage line and one error line), no rich tracebacks (errors are turned into one line by main).
APP_SETTINGS: dict = {"rich_markup_mode": None, "pretty_exceptions_enable": False}

app = typer.Typer(
    add_completion=False,
    no_args_is_help=True,
    **APP_SETTINGS,
    help="Quantitative image-quality analysis of PET phantom scans. Results support, and do not "
    "replace, a qualified medical physicist; follow local regulations and the scanner maker's "
    "acceptance procedures.",
)
templates_app = typer.Typer(no_args_is_help=True, help="List, show and check ROI templates.", **APP_SETTINGS)
app.add_typer(templates_app, name="templates")

_state = {"debug": False}


def _print_version(value: bool) -> None:
    """Eager ``--version``: print and stop before any command is required."""
    if value:
        from .. import __version__

        typer.echo(f"phantometry {__version__}")
        raise typer.Exit(0)


@app.callback()
def _root(
    debug: bool = typer.Option(False, "--debug", help="Show tracebacks of errors."),
    version: bool = typer.Option(False, "--version", help="Print the version and exit.", is_eager=True, callback=_print_version),
) -> None:
    _state["debug"] = debug


from . import commands  # noqa: E402,F401  (registers the commands)
from . import bands as _bands  # noqa: E402,F401
from . import ledger as _ledger  # noqa: E402,F401
from . import compare as _compare  # noqa: E402,F401
from . import harmonise as _harmonise  # noqa: E402,F401


def command():
    """The click command tree of the app, with plain placeholders in its help pages
    (:func:`phantometry.cli.helptext.plain_help`)."""
    import typer.main

    from .helptext import plain_help

    return plain_help(typer.main.get_command(app))


def main(argv: Optional[list[str]] = None) -> int:
    """Entry point of the ``phantometry`` console script; returns the exit code.

    The app runs in typer's standalone mode, so usage errors (missing or unknown options, a
    value of the wrong type) are printed by the command-line library itself: a usage line and
    one error line, exit code 2. Only public typer names are used here.
    """
    args = list(sys.argv[1:] if argv is None else argv)
    debug = "--debug" in args
    try:
        command().main(args=args, prog_name="phantometry", standalone_mode=True)
    except SystemExit as exc:  # normal end, typer.Exit, usage errors (already printed)
        if exc.code is None:
            return 0
        if isinstance(exc.code, int):
            return exc.code
        print(f"phantometry: error: {exc.code}", file=sys.stderr)
        return 1
    except PhantometryError as exc:
        if debug:
            traceback.print_exc()
        msg = " ".join(str(exc).split("\n"))
        print(f"phantometry: error: {msg}", file=sys.stderr)
        return 2
    except KeyboardInterrupt:
        print("phantometry: interrupted", file=sys.stderr)
        return 130
    except Exception as exc:  # a bug: say so briefly
        if debug:
            traceback.print_exc()
        print(
            f"phantometry: internal error ({type(exc).__name__}: {exc}); rerun with --debug and report it",
            file=sys.stderr,
        )
        return 1
    return 0


if __name__ == "__main__":  # pragma: no cover
    sys.exit(main())
