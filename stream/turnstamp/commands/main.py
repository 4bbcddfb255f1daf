"""``turnstamp``: the command line, assembled from one module per command.

Each command module of this package exposes ``add_parser(subparsers)``, which
declares its options and imports nothing heavy, and ``run(args) -> int``, which
imports what the command needs when it runs; so ``turnstamp --help`` and small
commands start fast. This module builds the parser from them and holds the one
error handler: bad input from outside (``InputError``, an unreadable file, a
report that cannot be built, a file system refusal) ends with one line on stderr
naming the command (exit status 2), Ctrl-C with status 130, and our own bugs keep
their traceback.
"""

from __future__ import annotations

import argparse
import functools
import gc
import logging
import os
import sys

from .. import __version__
from ..errors import ArrowFileError, InputError, ReportError
from . import (
    bench,
    check,
    clock,
    demo,
    inspect_output,
    model,
    report,
    retag,
    run,
    schemas,
    simulate,
    stack,
    table,
    tag,
    template,
    watch,
)
from .common import HelpFormatter

__all__ = ["COMMANDS", "build_parser", "main", "console"]

COMMANDS = (demo, run, check, simulate, tag, retag, clock, model, table, inspect_output, report,
            watch, stack, template, bench, schemas)
"""Command modules, in the order ``turnstamp --help`` lists them."""


def build_parser() -> argparse.ArgumentParser:
    """The whole command line: global options and one subparser per command."""
    parser = argparse.ArgumentParser(
        prog="turnstamp",
        description="Barycentric phase tagging and live periodicity monitoring for "
                    "photon-counting telescopes.")
    parser.add_argument("--version", action="version", version=f"turnstamp {__version__}")
    parser.add_argument("-v", "--verbose", action="store_true", help="log more")
    subparsers = parser.add_subparsers(  # every command's help states its defaults
        dest="command", required=True, metavar="COMMAND",
        parser_class=functools.partial(argparse.ArgumentParser, formatter_class=HelpFormatter))
    for command in COMMANDS:
        command.add_parser(subparsers)
    return parser


def main(argv: list[str] | None = None) -> int:
    """Run one command; returns its exit status (2: bad input, 130: interrupted)."""
    args = build_parser().parse_args(argv)
    logging.basicConfig(level=logging.INFO if args.verbose else logging.WARNING,
                        format="%(asctime)s %(levelname)s %(name)s: %(message)s")
    try:
        return args.run(args)
    except BrokenPipeError:  # a reader such as `head` closed our stdout: stop quietly
        # (the Python manual's recipe: point stdout at devnull so the exit flush is silent)
        os.dup2(os.open(os.devnull, os.O_WRONLY), sys.stdout.fileno())
        return 1
    except (InputError, ArrowFileError, ReportError, OSError) as exc:  # theirs, not ours
        print(f"turnstamp {args.command}: {exc}", file=sys.stderr)
        return 2
    except KeyboardInterrupt:
        return 130


def console(argv: list[str] | None = None) -> None:
    """The ``turnstamp`` program: ``main``, then exit with its status. What is still
    alive is freed with the process, not traced by the interpreter's last garbage
    collections first (a tenth of a second after ``tag`` on 10^7 events); every
    output is closed before ``main`` returns."""
    # numpy's BLAS starts a thread per CPU that spins for a while after the import
    # (a tenth of a second of CPU taken from the work); nothing here multiplies
    # matrices large enough to want them
    os.environ.setdefault("OPENBLAS_NUM_THREADS", "1")
    status = main(argv)
    gc.freeze()
    sys.exit(status)


if __name__ == "__main__":
    console()
