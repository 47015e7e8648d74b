"""The `recipe` console script: the command line's own imports (click, the CLI module) run
inside a Ctrl-C guard, so an interrupt in the first moments prints one line and exits 130
instead of a traceback. Only the standard library is imported before the guard."""

from __future__ import annotations

import sys

__all__ = ["main"]


def main() -> None:
    try:
        from runner.cli.app import main as cli_main
    except KeyboardInterrupt:
        sys.stderr.write("\nInterrupted before anything ran.\n")
        sys.exit(130)
    cli_main()
