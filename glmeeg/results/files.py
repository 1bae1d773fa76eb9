"""Writing single output files safely: under a new random name, flushed, renamed into place,
only over a file that carries glmeeg's mark; CSV cells that spreadsheets would evaluate are
written as text."""

from __future__ import annotations

import os
import tempfile
from pathlib import Path

import pandas as pd

from ..errors import GlmeegError


def _need(module: str, what: str, extra: str):
    """Import an optional package, or say which extra installs it."""
    import importlib

    try:
        return importlib.import_module(module)
    except ImportError:
        raise GlmeegError(f"{what} needs {module}: pip install 'glmeeg[{extra}]'") from None


def _write_atomically(path: Path, write, *, label: str, kind: str) -> Path:
    """Call ``write(tmp)`` on a temporary file beside ``path``, then rename it into place.

    ``kind`` says how an existing file is recognised as glmeeg's (``"html"``, ``"png"``,
    ``"schema"``, ``"netcdf"``; ``"table"``: never): any other existing file is left alone
    (:func:`glmeeg.results.ownership.check_replaceable`).

    Raises
    ------
    GlmeegError
        ``path`` is a folder, its folder does not exist, it cannot be written, or it is a file
        that glmeeg did not write.
    """
    from .ownership import check_replaceable

    check_replaceable(path, kind=kind, label=label)
    if path.is_dir():
        raise GlmeegError(f"{label}: {path} is a folder; expected a file name")
    if not path.absolute().parent.is_dir():
        raise GlmeegError(f"{label}: {path} cannot be written (folder {path.absolute().parent} "
                          "does not exist)")
    tmp = None
    try:
        # A new file of a random name (created exclusively): never a file or link of anyone else.
        fd, name = tempfile.mkstemp(prefix=f".{path.name[:64]}.", suffix=".partial",
                                    dir=path.absolute().parent)
        os.close(fd)
        tmp = Path(name)
        umask = os.umask(0)
        os.umask(umask)
        os.chmod(tmp, 0o666 & ~umask)  # mkstemp makes the file private; give it the usual mode
        write(tmp)
        tmp.replace(path)
    except OSError as e:
        if tmp is not None:
            tmp.unlink(missing_ok=True)
        raise GlmeegError(f"{label}: {path} cannot be written ({e.strerror or e})") from None
    except BaseException:
        if tmp is not None:
            tmp.unlink(missing_ok=True)
        raise
    return path


def write_table(frame: pd.DataFrame, path: str | Path, *, label: str | None = None) -> Path:
    """Write a table as CSV atomically (a temporary file beside it, then a rename).

    Raises
    ------
    GlmeegError
        ``path`` is a folder or cannot be written; ``label`` (default: the path) names it.
    """
    path = Path(path)
    return _write_atomically(path, lambda tmp: csv_safe(frame).to_csv(tmp, index=False, float_format="%.10g"),
                             label=label or str(path), kind="table")


def write_figure(fig, path: str | Path, *, label: str | None = None, dpi: int = 150) -> Path:
    """Save a matplotlib figure as PNG atomically (see :func:`write_text`)."""
    path = Path(path)
    return _write_atomically(path, lambda tmp: fig.savefig(tmp, format="png", dpi=dpi,
                                                           metadata=png_metadata()),
                             label=label or str(path), kind="png")


def write_text(text: str, path: str | Path, *, kind: str, label: str | None = None) -> Path:
    """Write text (UTF-8) atomically: a temporary file beside ``path``, then a rename.

    ``kind`` (``"html"`` for a report, ``"schema"`` for the JSON Schema) says how an existing
    file at ``path`` is recognised as glmeeg's; any other existing file is refused.

    Raises
    ------
    GlmeegError
        ``path`` is a folder, cannot be written or is a file glmeeg did not write; ``label``
        (default: the path) names it.
    """
    path = Path(path)
    return _write_atomically(path, lambda tmp: tmp.write_text(text, encoding="utf-8"),
                             label=label or str(path), kind=kind)


def png_metadata() -> dict:
    """Text chunks of the PNG files glmeeg writes: ``Software`` marks them as glmeeg's, so a
    later run may replace them (:mod:`glmeeg.results.ownership`)."""
    from .._version import __version__

    return {"Software": f"glmeeg {__version__}"}


# Cells a spreadsheet would evaluate as a formula (OWASP, "CSV Injection").
_FORMULA_START = ("=", "+", "-", "@", "\t", "\r")


def csv_safe(frame: pd.DataFrame) -> pd.DataFrame:
    """``frame`` with every text cell that starts like a spreadsheet formula (``=``, ``+``,
    ``-``, ``@``, tab, carriage return) prefixed with ``'``, so that spreadsheet programs show
    it as text instead of evaluating it. Numbers are untouched; glmeeg's table reader removes
    the prefix again (:func:`glmeeg.study.read_table`).

    References
    ----------
    OWASP Foundation, "CSV Injection" (owasp.org/www-community/attacks/CSV_Injection).
    """
    out = None
    for col in frame.columns:
        if frame[col].dtype != object and not pd.api.types.is_string_dtype(frame[col]):
            continue
        values = frame[col]
        risky = values.map(lambda v: isinstance(v, str) and v.startswith(_FORMULA_START))
        if risky.any():
            out = frame.copy() if out is None else out
            out[col] = values.where(~risky, "'" + values.astype(str))
    return frame if out is None else out
