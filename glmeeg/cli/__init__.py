"""The command line. This module is the ``glmeeg`` command's entry point and is kept free of
imports, so that an interrupt (Ctrl-C) during start-up, while the command line's libraries load,
is one line and exit code 130; the commands themselves are in :mod:`glmeeg.cli.commands`."""

from __future__ import annotations

import sys

INTERRUPTED = "interrupted; no results were written"


def main() -> None:
    """Run the command line (``glmeeg ...`` and ``python -m glmeeg ...``)."""
    try:
        from .commands import app

        app()
    except KeyboardInterrupt:
        sys.stderr.write(f"{INTERRUPTED}\n")
        sys.exit(130)


def __getattr__(name: str):
    if name == "app":  # the typer application, loaded on first use
        from .commands import app

        return app
    raise AttributeError(f"module 'glmeeg.cli' has no attribute {name!r}")
