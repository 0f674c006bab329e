"""The ``rawproof`` command (entry point ``app.cli:main``).

Sub-commands: ``analyse`` (headless report), ``sampling`` (effective sampling
rate), ``serve``, ``worker``, ``users``, ``demo``, ``backup``, ``restore``; one
module each, listed in :data:`app.cli.commands.COMMANDS`. This module only
re-exports.
"""

from app.cli.commands import COMMANDS, build_parser, main
from app.cli.common import EXIT_BAD_INPUT, EXIT_OK, RAWPROOF_ARGV

__all__ = ["COMMANDS", "EXIT_BAD_INPUT", "EXIT_OK", "RAWPROOF_ARGV", "build_parser", "main"]
