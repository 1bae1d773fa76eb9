"""Which files glmeeg wrote: the only files it may replace or remove.

glmeeg never deletes or overwrites a file it did not write. Three kinds of place are written:

* **Result folders** (``glmeeg run --out DIR``). ``DIR/run.json`` lists every file of the run
  with the SHA-256 of its bytes (``files``); a folder is an earlier result, and may be replaced
  as a whole, only when its ``run.json`` is glmeeg's (a JSON object with the result schema
  version, the provenance and the file list), every listed file still has the bytes glmeeg
  wrote, and the folder holds nothing else: no file, folder or link that is not on the list,
  apart from the subject-fit cache (``subject-fits/``, whose entries have glmeeg's own names).
  :func:`unowned_entries` finds what is not glmeeg's. Like the cache's digests, the list guards
  against accidents and mistakes, not against someone who forges it together with its digests.
* **Demo folders** (``glmeeg demo DIR``), listed in ``DIR/demo.json`` the same way.
* **Single output files** (``--out FILE``, ``--csv``, ``--plot``, netCDF exports). An existing
  file is replaced only when it carries glmeeg's mark: a report's ``generator`` tag, the
  schema's ``$id``, a PNG's ``Software`` text, a netCDF file's ``glmeeg_version`` attribute.
  A CSV table carries no mark, so an existing one is never replaced (:func:`check_replaceable`).
"""

from __future__ import annotations

import hashlib
import json
import os
import re
import stat
from pathlib import Path

from ..errors import GlmeegError
from ..subject_level.cache import CACHE_ENTRY  # the names the cache gives its files

__all__ = ["CACHE_ENTRY", "GENERATOR", "check_replaceable", "describe", "digests", "file_digest",
           "foreign_entries", "read_file_list", "relative_files", "png_is_glmeeg", "unowned_entries"]

# The report's <head> tag and the PNG text glmeeg writes (see report.py and results.py).
GENERATOR = "glmeeg"
_DIGEST = re.compile(r"[0-9a-f]{64}")  # a SHA-256 in hex, as file lists hold them
GENERATOR_TAG = '<meta name="generator" content="glmeeg'


# A file list is only read from a run.json of at most this size; a folder is examined up to
# this many entries (a result folder holds a few per test), so a hostile folder costs little.
_MAX_LIST_BYTES = 64 * 2**20
_MAX_ENTRIES = 200_000
_SHOWN = 5


def _safe_relative(name) -> bool:
    if not isinstance(name, str) or not name or len(name) > 4096 or "\\" in name or "\x00" in name:
        return False
    parts = name.split("/")
    return not name.startswith("/") and all(p not in ("", ".", "..") for p in parts)


def file_digest(path: Path) -> str:
    """SHA-256 of a file's bytes (read in pieces)."""
    h = hashlib.sha256()
    with open(path, "rb") as fh:
        for chunk in iter(lambda: fh.read(1 << 20), b""):
            h.update(chunk)
    return h.hexdigest()


def read_file_list(path: Path, *, schema_version: int, kind: str) -> dict[str, str] | None:
    """The ``files`` of a glmeeg-written ``run.json`` (or ``demo.json``): relative path ->
    SHA-256 of the file as glmeeg wrote it. None when the file is not glmeeg's: not a JSON
    object, another schema version, no provenance, no file list, or a list holding a name that
    is not a plain relative path or a value that is not a digest."""
    try:
        if path.is_symlink() or not path.is_file() or path.stat().st_size > _MAX_LIST_BYTES:
            return None
        meta = json.loads(path.read_bytes().decode("utf-8"))
    except (OSError, UnicodeDecodeError, ValueError, RecursionError):
        return None
    if not isinstance(meta, dict) or meta.get("written_by") != kind:
        return None
    if meta.get("schema_version") != schema_version or isinstance(meta.get("schema_version"), bool):
        return None
    prov = meta.get("provenance")
    if not isinstance(prov, dict) or not isinstance(prov.get("glmeeg_version"), str):
        return None
    files = meta.get("files")
    if not isinstance(files, dict) or not all(_safe_relative(f) and isinstance(d, str)
                                              and _DIGEST.fullmatch(d) for f, d in files.items()):
        return None
    return dict(files)


def digests(folder: Path, names) -> dict[str, str]:
    """``{name: SHA-256}`` of files under ``folder`` (the list a writer records)."""
    return {n: file_digest(folder / n) for n in sorted(names)}


def relative_files(folder: Path, *, exclude: tuple[str, ...] = ()) -> list[str]:
    """Every file under ``folder`` as a sorted list of ``/``-separated relative paths."""
    out = []
    for dirpath, _, names in os.walk(folder):
        rel = Path(dirpath).relative_to(folder)
        out += [(rel / n).as_posix() for n in names]
    return sorted(f for f in out if f not in exclude)


def unowned_entries(folder: Path, files: dict[str, str] | None, *, listing: str,
                    cache: str | None = None, delegated: tuple[str, ...] = ()) -> list[str]:
    """What in ``folder`` glmeeg may not replace: entries not on the list ``files``
    (:func:`foreign_entries`; ``listing``, the file holding the list, counts as listed when
    the list was read) and listed files whose bytes are no longer those glmeeg wrote (an
    edited report, a table opened and saved by a spreadsheet). At most a few names."""
    owned = set() if files is None else set(files) | {listing}
    files = files or {}
    found = foreign_entries(folder, owned, cache=cache, delegated=delegated)
    for name, digest in sorted(files.items()):
        if len(found) >= _SHOWN:
            break
        p = folder / name
        try:
            if p.is_file() and not p.is_symlink() and file_digest(p) != digest:
                found.append(f"{name} (changed since glmeeg wrote it)")
        except OSError:
            found.append(name)
    return found


def foreign_entries(folder: Path, owned: set[str], *, cache: str | None = None,
                    delegated: tuple[str, ...] = ()) -> list[str]:
    """Entries under ``folder`` that glmeeg did not write: files, links and other entries not in
    ``owned`` (relative paths), and folders that hold none of ``owned``. ``cache`` names a
    sub-folder whose entries must have the cache's names (:data:`CACHE_ENTRY`). Links are never
    followed. ``delegated`` names top-level folders that another writer checks itself (they
    are not examined). At most a few are returned (enough for a message).

    Raises
    ------
    GlmeegError
        The folder holds more entries than a glmeeg folder could.
    """
    parents = {p for f in owned for p in _parents(f)}
    found: list[str] = []
    seen = 0
    stack = [""]
    while stack and len(found) < _SHOWN:
        rel = stack.pop()
        try:
            entries = sorted(os.scandir(folder / rel) if rel else os.scandir(folder), key=lambda e: e.name)
        except OSError as e:
            raise GlmeegError(f"{folder / rel}: cannot be read ({e.strerror or e})") from None
        for entry in entries:
            seen += 1
            if seen > _MAX_ENTRIES:
                raise GlmeegError(f"{folder}: holds more than {_MAX_ENTRIES} entries; it is not a "
                                  "glmeeg result folder")
            name = f"{rel}/{entry.name}" if rel else entry.name
            mode = entry.stat(follow_symlinks=False).st_mode
            if not rel and entry.name in delegated and stat.S_ISDIR(mode):
                continue
            if cache is not None and rel == cache:
                ok = stat.S_ISREG(mode) and CACHE_ENTRY.fullmatch(entry.name) is not None
            elif stat.S_ISDIR(mode):
                ok = name in parents or (cache is not None and name == cache)
                if ok:
                    stack.append(name)
            else:
                ok = stat.S_ISREG(mode) and name in owned
            if not ok:
                found.append(name + ("/" if stat.S_ISDIR(mode) else ""))
                if len(found) >= _SHOWN:
                    break
    return found


def _parents(rel: str):
    parts = rel.split("/")
    for i in range(1, len(parts)):
        yield "/".join(parts[:i])


def describe(found: list[str]) -> str:
    shown = ", ".join(found[:_SHOWN - 1])
    return shown + (", ..." if len(found) >= _SHOWN else "")


def png_is_glmeeg(head: bytes) -> bool:
    """Whether PNG bytes (the file's start) carry glmeeg's ``Software`` text chunk."""
    return head.startswith(b"\x89PNG\r\n\x1a\n") and b"tEXtSoftware\x00" + GENERATOR.encode() in head


def _is_glmeeg_file(path: Path, kind: str) -> bool:
    try:
        if kind == "html":
            with open(path, "rb") as fh:
                return GENERATOR_TAG.encode() in fh.read(4096)
        if kind == "png":
            with open(path, "rb") as fh:
                return png_is_glmeeg(fh.read(4096))
        if kind == "schema":
            if path.stat().st_size > 2**20:
                return False
            doc = json.loads(path.read_bytes().decode("utf-8"))
            return isinstance(doc, dict) and str(doc.get("$id", "")).startswith("urn:glmeeg:schema:")
        if kind == "run-summary":
            from .models import SCHEMA_VERSION
            from .store import RUN_LIST

            return read_file_list(path, schema_version=SCHEMA_VERSION, kind=RUN_LIST) is not None
        if kind == "netcdf":
            with open(path, "rb") as fh:
                if fh.read(8) != b"\x89HDF\r\n\x1a\n":
                    return False
            import h5py

            with h5py.File(path, "r") as f:
                return "glmeeg_version" in f.attrs
    except (OSError, UnicodeDecodeError, ValueError, RecursionError, ImportError):
        return False
    return False  # tables carry no mark


def check_replaceable(path: Path, *, kind: str, label: str) -> None:
    """Refuse to replace an existing file that glmeeg did not write.

    ``kind`` is ``"html"``, ``"png"``, ``"schema"``, ``"netcdf"``, ``"run-summary"`` (a
    ``run.json``) or ``"table"``.

    Raises
    ------
    GlmeegError
        ``path`` is a link, or exists and does not carry glmeeg's mark (tables never do).
    """
    try:
        if path.is_symlink():
            raise GlmeegError(f"{label}: {path} is a symbolic link; give the path of a new file")
        if not path.exists() or path.is_dir():
            return
        regular = path.is_file()
    except OSError as e:  # a name too long, a loop of links, no permission
        raise GlmeegError(f"{label}: {path} cannot be examined ({e.strerror or e})") from None
    if not regular:  # a FIFO or a device: opening it could block or read forever
        raise GlmeegError(f"{label}: {path} exists and is not a regular file; glmeeg does not "
                          "replace it (choose another file name)")
    if not _is_glmeeg_file(path, kind):
        what = ("a table glmeeg cannot tell it wrote" if kind == "table"
                else "a file glmeeg did not write")
        raise GlmeegError(f"{label}: {path} exists and is {what}; glmeeg does not replace it "
                          "(remove it or choose another file name)")
