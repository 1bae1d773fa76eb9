"""glmeeg's version (kept apart so that no module imports the package root for it)."""

__version__ = "0.1.0"
