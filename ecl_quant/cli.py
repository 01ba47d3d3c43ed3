"""Command-line interface: thin subcommands over the public API.

``main(argv=None) -> int`` so tests call it directly. Exit codes: 0 ok, 1 partial
(a batch with failed recordings), 2 bad input or usage. Deliberate errors print one
line on stderr; ``--debug`` shows the traceback too.

Each subcommand has an ``_add_<name>(sub)`` that declares its options and a
``_run_<name>(args) -> int`` that calls the API. Keep them short: logic belongs in the
stage modules.
"""

from __future__ import annotations

import argparse
import sys
import traceback
import warnings
from collections.abc import Callable, Sequence

from . import __version__
from .errors import EclQuantError, EclQuantWarning

__all__ = ["main", "build_parser"]

# (name, add-parser function) in the order shown by --help; filled below.
_COMMANDS: list[tuple[str, Callable[[argparse._SubParsersAction], None]]] = []


def _command(func: Callable[[argparse._SubParsersAction], None]) -> Callable[..., None]:
    _COMMANDS.append((func.__name__.removeprefix("_add_"), func))
    return func


def _common(p: argparse.ArgumentParser) -> None:
    p.add_argument("--quiet", action="store_true", help="print nothing but errors")
    p.add_argument("--debug", action="store_true", help="show tracebacks on errors")


# ---------------------------------------------------------------- subcommands
# Each block: @_command def _add_<name>(sub) ... p.set_defaults(run=_run_<name>)
# --- BEGIN COMMANDS ---
# --- END COMMANDS ---


def build_parser() -> argparse.ArgumentParser:
    """The argparse parser with every subcommand."""
    parser = argparse.ArgumentParser(
        prog="ecl-quant",
        description="Turn camera recordings of electrochemiluminescence into "
        "concentrations with uncertainty.",
    )
    parser.add_argument("--version", action="version", version=f"ecl-quant {__version__}")
    sub = parser.add_subparsers(dest="command", metavar="COMMAND")
    for _name, add in _COMMANDS:
        add(sub)
    return parser


def main(argv: Sequence[str] | None = None) -> int:
    """Run the CLI; return the exit code."""
    parser = build_parser()
    try:
        args = parser.parse_args(argv)
    except SystemExit as exc:  # argparse: usage errors exit 2, --help/--version exit 0
        return int(exc.code or 0)
    if not getattr(args, "run", None):
        parser.print_help(sys.stderr)
        return 2
    debug = getattr(args, "debug", False)
    quiet = getattr(args, "quiet", False)

    def _show_warning(message, category, filename, lineno, file=None, line=None):  # type: ignore[no-untyped-def]
        if not quiet:
            print(f"warning: {message}", file=sys.stderr)

    with warnings.catch_warnings():
        warnings.simplefilter("default", EclQuantWarning)
        if not debug:
            warnings.showwarning = _show_warning
        try:
            return int(args.run(args))
        except EclQuantError as err:
            if debug:
                traceback.print_exc()
            print(f"error: {err}", file=sys.stderr)
            return 2
        except KeyboardInterrupt:
            print("error: interrupted", file=sys.stderr)
            return 130
