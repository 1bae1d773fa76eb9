"""The ``glmeeg`` command's entry point, kept free of imports so that an interrupt (Ctrl-C)
during start-up, while the command line's libraries load, is one line and exit code 130."""

from __future__ import annotations

import sys

INTERRUPTED = "interrupted; no results were written"


def main() -> None:
    """Run the command line (``glmeeg ...`` and ``python -m glmeeg ...``)."""
    try:
        from .cli import app

        app()
    except KeyboardInterrupt:
        sys.stderr.write(f"{INTERRUPTED}\n")
        sys.exit(130)
