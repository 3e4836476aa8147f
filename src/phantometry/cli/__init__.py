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

app = typer.Typer(
    add_completion=False,
    no_args_is_help=True,
    help="Quantitative image-quality analysis of PET phantom scans. Results support, and do not "
    "replace, a qualified medical physicist; follow local regulations and the scanner maker's "
    "acceptance procedures.",
)
templates_app = typer.Typer(no_args_is_help=True, help="List, show and check ROI templates.")
app.add_typer(templates_app, name="templates")

_state = {"debug": False}


@app.callback()
def _root(
    debug: bool = typer.Option(False, "--debug", help="Show tracebacks of errors."),
    version: bool = typer.Option(False, "--version", help="Print the version and exit.", is_eager=True),
) -> None:
    _state["debug"] = debug
    if version:
        from .. import __version__

        typer.echo(f"phantometry {__version__}")
        raise typer.Exit(0)


from . import commands  # noqa: E402,F401  (registers the commands)
from . import bands as _bands  # noqa: E402,F401
from . import ledger as _ledger  # noqa: E402,F401
from . import compare as _compare  # noqa: E402,F401


def main(argv: Optional[list[str]] = None) -> int:
    """Entry point of the ``phantometry`` console script."""
    args = list(sys.argv[1:] if argv is None else argv)
    debug = "--debug" in args
    try:
        rc = app(args=args, prog_name="phantometry", standalone_mode=False)
    except PhantometryError as exc:
        if debug:
            traceback.print_exc()
        msg = str(exc).replace("\n", " ")
        print(f"phantometry: error: {msg}", file=sys.stderr)
        return 2
    except typer.Exit as exc:
        return int(exc.exit_code or 0)
    except SystemExit as exc:  # click usage errors already printed
        code = exc.code if isinstance(exc.code, int) else 2
        return code
    except KeyboardInterrupt:
        print("phantometry: interrupted", file=sys.stderr)
        return 130
    except Exception as exc:  # a bug: say so briefly
        import click

        if isinstance(exc, click.exceptions.ClickException):
            exc.show()
            return exc.exit_code
        if isinstance(exc, click.exceptions.Abort):
            return 1
        if debug:
            traceback.print_exc()
        print(
            f"phantometry: internal error ({type(exc).__name__}: {exc}); rerun with --debug and report it",
            file=sys.stderr,
        )
        return 1
    # with standalone_mode=False click returns the exit code of typer.Exit / ctx.exit
    return rc if isinstance(rc, int) else 0


if __name__ == "__main__":  # pragma: no cover
    sys.exit(main())
