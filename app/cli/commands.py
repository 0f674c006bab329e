"""The ``rawproof`` command: the written list of its sub-commands, the parser, ``main``.

A new sub-command is one module of ``app/cli`` that defines a
:class:`~app.cli.common.Command`, and one line in :data:`COMMANDS`.
"""

from __future__ import annotations

import argparse
import os
import sys

import app
from app.cli.analyse import ANALYSE
from app.cli.backup import BACKUP, RESTORE
from app.cli.common import EXIT_BAD_INPUT, Command
from app.cli.demo import DEMO
from app.cli.probe import CROP, PROBE
from app.cli.sampling import SAMPLING
from app.cli.serve import CHECK, SERVE, WORKER
from app.cli.users import USERS
from app.errors import InputError

#: Every sub-command, in the order ``rawproof --help`` lists them.
COMMANDS: dict[str, Command] = {c.name: c for c in (
    ANALYSE,
    SAMPLING,
    PROBE,
    CROP,
    SERVE,
    WORKER,
    CHECK,
    USERS,
    DEMO,
    BACKUP,
    RESTORE,
)}


def build_parser() -> argparse.ArgumentParser:
    """The argument parser of ``rawproof`` with every sub-command of :data:`COMMANDS`."""
    parser = argparse.ArgumentParser(
        prog="rawproof",
        description="Find traces of hidden processing in candidate MRI datasets. " + app.CAUTION,
    )
    parser.add_argument("--version", action="version", version=f"rawproof {app.__version__}")
    sub = parser.add_subparsers(dest="command", required=True)
    for command in COMMANDS.values():
        command.add_arguments(sub.add_parser(command.name, help=command.help))
    return parser


def main(argv: list[str] | None = None) -> int:
    """Run ``rawproof`` with ``argv`` (default: the process's arguments); the exit code."""
    parser = build_parser()
    args = parser.parse_args(argv)
    try:
        return int(COMMANDS[args.command].run(args) or 0)
    except InputError as exc:
        print(f"rawproof: {exc.message}", file=sys.stderr)
        return EXIT_BAD_INPUT
    except KeyboardInterrupt:
        return 130
    except BrokenPipeError:
        # the reader of stdout went away (for example `| head`): not an error of ours
        os.dup2(os.open(os.devnull, os.O_WRONLY), sys.stdout.fileno())
        return 0
