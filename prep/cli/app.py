"""The ``beatmill`` command object and what every command shares: logging, the error line.

Diagnostics and progress go to stderr, results to stdout. Exit codes (README, "Exit codes"):
0 all records ok; 1 some records failed but a dataset was written; 2 usage or configuration error;
3 no record could be used; 4 the dataset could not be written (space, permissions).
"""
from __future__ import annotations

import logging
import sys

import typer
import typer.core


def _plain_argument_help() -> None:
    """Show arguments as their metavar (``INPUTS...``), without typer's ``{...}`` and type
    labels; display only, and skipped where a typer version lacks these hooks."""
    arg = typer.core.TyperArgument
    if hasattr(arg, "_usage_display_name") and hasattr(arg, "display_type_rich"):
        arg._usage_display_name = lambda self: (self.metavar or self.name.upper()) + (
            "..." if self.nargs != 1 else "")
        arg.display_type_rich = lambda self, ctx: None


_plain_argument_help()

app = typer.Typer(add_completion=False, no_args_is_help=True, rich_markup_mode=None,
                  pretty_exceptions_enable=False,
                  context_settings={"help_option_names": ["-h", "--help"],
                                    "max_content_width": 100},
                  help="Turn raw ECG records into clean, fixed-length, normalized beat tensors "
                       "with a provenance manifest.\n\nExample:\n\n"
                       "  beatmill run demo_records --out runs/demo\n\n"
                       "Research use only: not a medical device, not for diagnosis.")

log = logging.getLogger("prep")


def _version(value: bool) -> None:
    if value:
        from prep import __version__
        typer.echo(f"beatmill {__version__}")
        raise typer.Exit()


@app.callback()
def _root(version: bool = typer.Option(False, "--version", callback=_version, is_eager=True,
                                       help="Print the version and exit.")) -> None:
    """Turn raw ECG records into clean, fixed-length, normalized beat tensors with a provenance
    manifest.

    Example:

      beatmill run demo_records --out runs/demo

    Research use only: not a medical device, not for diagnosis.
    """


def _setup_logging(verbose: int, quiet: bool) -> None:
    level = logging.ERROR if quiet else logging.DEBUG if verbose > 1 else \
        logging.INFO if verbose == 1 else logging.WARNING
    handler = logging.StreamHandler(sys.stderr)
    handler.setFormatter(logging.Formatter("beatmill: %(message)s"))
    log.handlers[:] = [handler]
    log.setLevel(level)


def _fail(msg: str, code: int = 2) -> None:
    typer.echo(f"beatmill: error: {msg}", err=True)
    raise typer.Exit(code)
