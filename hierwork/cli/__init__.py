"""Command-line interface: ``hierwork COMMAND ...``.

Thin by design: each command lives in its own module with ``register(subparsers)``
and calls the public API. User errors (:class:`~hierwork.errors.HierworkError`)
print one line and exit 2; anything else is a bug (exit 1, with a traceback).
"""
from __future__ import annotations

import argparse
import importlib
import re
import sys

# Command modules, in the order ``--help`` lists them.
COMMANDS = ("check", "fit", "demo", "schema", "batch", "status", "report", "compare", "predict", "poststratify")

EXIT_OK, EXIT_BUG, EXIT_INPUT, EXIT_GATE = 0, 1, 2, 3
#: Control characters other than tab and newline (escape sequences start with one).
_CONTROL = re.compile(r"[\x00-\x08\x0b-\x1f\x7f-\x9f]")


def printable(text, one_line: bool = False) -> str:
    """Text for the terminal: control characters from user strings (titles, labels, file names)
    shown as ``\\xNN`` instead of acting on the terminal; with ``one_line``, line breaks as ``\\n``."""
    text = _CONTROL.sub(lambda m: f"\\x{ord(m.group()):02x}", str(text))
    return text.replace("\n", "\\n") if one_line else text


class _Parser(argparse.ArgumentParser):
    """Usage mistakes are bad input too: one line, exit 2."""

    def error(self, message):
        print(printable(f"hierwork: error: {message} (see '{self.prog} --help')", one_line=True), file=sys.stderr)
        raise SystemExit(EXIT_INPUT)


def build_parser() -> argparse.ArgumentParser:
    parser = _Parser(prog="hierwork", description="Bayesian multilevel models from a YAML spec: "
                     "check, fit with a convergence gate, and report partial pooling beside its baselines.")
    from hierwork import __version__

    parser.add_argument("--version", action="version", version=f"hierwork {__version__}")
    sub = parser.add_subparsers(dest="command", metavar="COMMAND", parser_class=_Parser)
    for name in COMMANDS:
        importlib.import_module(f"hierwork.cli.{name}").register(sub)
    return parser


def _quiet_libraries() -> None:
    """Keep library chatter (import notices, sampler start-up lines) off the user's screen.

    PyMC adds a console handler of its own at import unless the root logger has
    one; a null handler there keeps every library's log records off the terminal.
    """
    import logging
    import warnings

    warnings.filterwarnings("ignore", message=".*ArviZ is undergoing a major refactor.*")
    warnings.filterwarnings("ignore", message=".*could not link to a BLAS.*")
    warnings.filterwarnings("ignore", category=RuntimeWarning)
    if not logging.root.handlers:
        logging.root.addHandler(logging.NullHandler())
    for name in ("pymc", "pytensor", "arviz"):
        logging.getLogger(name).setLevel(logging.ERROR)


def main(argv=None) -> int:
    _quiet_libraries()
    parser = build_parser()
    args = parser.parse_args(argv)
    if not getattr(args, "func", None):
        parser.print_help()
        return EXIT_INPUT
    from hierwork.errors import HierworkError
    from hierwork.interrupts import Interrupted

    try:
        return int(args.func(args) or 0)
    except Interrupted as stop:
        print(f"hierwork: stopped by {stop.name}; {stop.outcome}", file=sys.stderr)
        import gc

        gc.freeze()  # exit now: collecting the half-built sampler's objects at shutdown takes seconds
        return stop.exit_code
    except HierworkError as exc:
        print(printable(f"hierwork: error: {exc}", one_line=True), file=sys.stderr)
        return EXIT_INPUT
    except BrokenPipeError:
        # Output piped into a program that stopped reading (e.g. `| head`): not an error.
        sys.stderr.close()
        return EXIT_OK
    except KeyboardInterrupt:
        print("hierwork: interrupted; no run folder was written", file=sys.stderr)
        return 130
