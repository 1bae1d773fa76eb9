"""Saving and loading results: ``result.npz`` per test, run folders written all or nothing and
swapped into place, recovery of interrupted writes, and the run summary ``run.json``."""

from __future__ import annotations

import json
import os
import shutil
import tempfile
import warnings
import zipfile
from pathlib import Path

import numpy as np
from pydantic import ValidationError

from ..errors import GlmeegError
from .files import csv_safe, write_text
from .models import (_ARRAYS, _MAPS, _OPTIONAL_ARRAYS, SCHEMA_VERSION, Provenance, RunResult,
                     SubjectSummary, TestResult, _plain)

# Zip entries carry a time stamp; a fixed one keeps result.npz byte-identical across runs.
_ZIP_TIME = (1980, 1, 1, 0, 0, 0)


def _write_npz(fh, arrays: dict) -> None:
    """``numpy.savez`` with fixed entry times and modes (read back by ``numpy.load``)."""
    with zipfile.ZipFile(fh, "w", compression=zipfile.ZIP_STORED, allowZip64=True) as zf:
        for name, value in arrays.items():
            info = zipfile.ZipInfo(f"{name}.npy", date_time=_ZIP_TIME)
            info.external_attr = 0o644 << 16
            with zf.open(info, "w", force_zip64=True) as f:
                np.lib.format.write_array(f, np.asanyarray(value), allow_pickle=False)


def load_result(path: str | Path) -> TestResult:
    """Read a saved test (its folder or its ``result.npz``) back, bit for bit."""
    path = Path(path)
    if path.is_dir():
        path = path / "result.npz"
    if not path.is_file():
        raise GlmeegError(f"{path}: no saved glmeeg result here")
    try:
        # The file is opened here so that it is closed even when numpy cannot parse it.
        with open(path, "rb") as fh:
            size = os.fstat(fh.fileno()).st_size
            with zipfile.ZipFile(fh) as zf:
                for info in zf.infolist():
                    # glmeeg stores its members uncompressed: nothing is inflated, and no member
                    # can claim more bytes than the file holds (a forged archive costs nothing).
                    if info.compress_type != zipfile.ZIP_STORED or info.file_size > size:
                        raise GlmeegError(f"{path}: not a glmeeg result file (member {info.filename!r} "
                                          "is compressed or larger than the file)")
            fh.seek(0)
            with np.load(fh, allow_pickle=False) as z:
                meta = json.loads(str(z["meta"]))
                arrays = {k: z[k] for k in _ARRAYS}
                arrays.update({k: z[k] for k in _OPTIONAL_ARRAYS if k in z.files})
    except (OSError, ValueError, KeyError, EOFError, zipfile.BadZipFile, AttributeError, TypeError,
            RecursionError) as e:
        if isinstance(e, GlmeegError):
            raise
        raise GlmeegError(f"{path}: not a glmeeg result file ({_first_line(e)})") from None
    if not isinstance(meta, dict):
        raise GlmeegError(f"{path}: not a glmeeg result file (settings are not a JSON object)")
    try:
        result = TestResult.model_validate({**meta, **arrays})
    except ValidationError as e:
        err = e.errors()[0]
        where = ".".join(map(str, err["loc"])) or "(top level)"
        raise GlmeegError(f"{path}: not a valid glmeeg result ({where}: {err['msg']})") from None
    P = result.axes.n_points
    for name in _MAPS:
        value = getattr(result, name, None)
        if value is not None and np.asarray(value).shape[-1:] != (P,):
            raise GlmeegError(f"{path}: not a valid glmeeg result ({name} has shape "
                              f"{np.asarray(value).shape}; the axes have {P} points)")
    return result


def _first_line(e: BaseException) -> str:
    text = str(e).strip()
    return text.splitlines()[0] if text else type(e).__name__


_MAX_RUN_SUMMARY = 64 * 2**20  # bytes of a run.json that is read at all


RUN_LIST = "glmeeg run"  # run.json's ``written_by``: what marks a result folder as glmeeg's


# First file of a folder being written, removed just before it is swapped in: what marks a
# leftover folder as one of glmeeg's writes (with the writer's host and process).
WRITING_MARK = ".glmeeg-writing"


_NAME_IN_TEMP = 100  # characters of the output folder's name in its temporary folders' names


def check_output_folder(out: str | Path) -> Path:
    """Refuse an output folder that :func:`write_run` must not replace; return it as an
    absolute path.

    A folder may be replaced only when it is empty, holds only the subject-fit cache, or is an
    earlier glmeeg result: its ``run.json`` is glmeeg's (result schema, provenance, the list of
    the files the run wrote with their SHA-256), every listed file still has those bytes and
    the folder holds nothing that is not on the list (:mod:`glmeeg.results.ownership`). A symbolic
    link is resolved: the results go where it points, and the link stays as it is. Called
    before any fitting, so a wrong ``--out`` costs nothing; :func:`write_run` checks again just
    before it swaps the new results in.

    Raises
    ------
    GlmeegError
        ``out`` exists and is not a folder, is a dangling link or a loop of links, its name is
        too long, or it holds files glmeeg did not write or that changed since (named in the
        message); or it cannot be created.
    """
    from ..subject_level.cache import CACHE_FOLDER
    from .ownership import describe, read_file_list, unowned_entries

    try:
        out = Path(os.path.abspath(out))  # '.' and '..' by their real names
    except FileNotFoundError:
        raise GlmeegError(f"{out}: the working folder no longer exists (an earlier run replaced "
                          "it); change into the folder again") from None
    try:
        if out.is_symlink():
            target = out.resolve(strict=False)
            if not target.exists():
                raise GlmeegError(f"{out}: is a symbolic link to {target}, which does not exist; "
                                  "give a folder path")
            out = target
        if len(os.fsencode(out.name)) > 255:
            raise GlmeegError(f"{out.name[:40]}...: a folder name of more than 255 bytes")
        exists = out.exists()
    except (OSError, RuntimeError) as e:  # RuntimeError: pathlib's "Symlink loop"
        raise GlmeegError(f"{out}: cannot be used as the output folder ({getattr(e, 'strerror', None) or e})") from None
    if exists:
        if not out.is_dir():
            raise GlmeegError(f"{out}: exists and is not a folder; expected a new folder or an "
                              "earlier glmeeg result folder")
        owned = read_file_list(out / "run.json", schema_version=SCHEMA_VERSION, kind=RUN_LIST)
        unowned = unowned_entries(out, owned, listing="run.json", cache=CACHE_FOLDER)
        if unowned:
            why = ("its run.json was not written by this version of glmeeg"
                   if owned is None and (out / "run.json").exists() else "glmeeg replaces only its own "
                   "result folders")
            raise GlmeegError(f"{out}: holds files glmeeg did not write ({describe(unowned)}); {why}: "
                              "choose a new or empty output folder, or move those files away")
    parent = out.parent
    while not parent.exists() and parent != parent.parent:
        parent = parent.parent
    if not parent.is_dir():
        raise GlmeegError(f"{out}: cannot be created, {parent} is a file; expected a folder path")
    if not os.access(parent, os.W_OK | os.X_OK):
        raise GlmeegError(f"{out}: cannot be created, no permission to write in {parent}")
    return out


def _exchange(a: Path, b: Path) -> bool:
    """Swap two folders in one atomic step (Linux ``renameat2(RENAME_EXCHANGE)``); False where
    the system or the file system cannot."""
    import ctypes
    import errno
    import sys

    if not sys.platform.startswith("linux"):
        return False
    try:
        libc = ctypes.CDLL(None, use_errno=True)
        fn = libc.renameat2
    except (OSError, AttributeError):
        return False
    fn.argtypes = (ctypes.c_int, ctypes.c_char_p, ctypes.c_int, ctypes.c_char_p, ctypes.c_uint)
    at_fdcwd, rename_exchange = -100, 2
    if fn(at_fdcwd, os.fsencode(a), at_fdcwd, os.fsencode(b), rename_exchange) == 0:
        return True
    err = ctypes.get_errno()
    if err in (errno.EINVAL, errno.ENOSYS, errno.EOPNOTSUPP):
        return False
    raise OSError(err, os.strerror(err), str(b))


def _pid_alive(pid: int) -> bool:
    if os.name != "posix":  # os.kill(pid, 0) would signal the process on Windows
        return True
    try:
        os.kill(pid, 0)
    except ProcessLookupError:
        return False
    except PermissionError:
        return True
    return True


def _writer_gone(folder: Path, pid: int) -> bool:
    """Whether the writer of a leftover folder has stopped: its mark names this host and a
    process that no longer runs (a folder of another host's writer is left alone)."""
    import socket

    try:
        mark = json.loads((folder / WRITING_MARK).read_text(encoding="utf-8"))
    except (OSError, ValueError, UnicodeDecodeError, RecursionError):
        mark = None
    if isinstance(mark, dict) and mark.get("host") != socket.gethostname():
        return False
    return pid != os.getpid() and not _pid_alive(pid)


def _is_glmeeg_write(folder: Path) -> bool:
    """A leftover folder is glmeeg's when it still carries the mark of the write, or it is a
    whole earlier result (swapped out, or between the two renames of the fallback swap)."""
    from ..subject_level.cache import CACHE_FOLDER
    from .ownership import read_file_list, unowned_entries

    if (folder / WRITING_MARK).is_file() and not (folder / WRITING_MARK).is_symlink():
        return True
    owned = read_file_list(folder / "run.json", schema_version=SCHEMA_VERSION, kind=RUN_LIST)
    return owned is not None and not unowned_entries(folder, owned, listing="run.json", cache=CACHE_FOLDER)


def _leftovers(out: Path):
    """Folders a killed :func:`write_run` of ``out`` left beside it, with the writer's pid:
    ``.NAME.PID.XXXXXXXX.partial`` (results being written, or the earlier ones after the swap)
    and ``.NAME.PID.old`` (the earlier results between the two renames of the fallback swap).
    Only glmeeg's own folders: the name's pattern and the mark of the write or a whole result."""
    import re

    name = re.escape(out.name[:_NAME_IN_TEMP])
    # mkdtemp's random part: 8 characters of [a-z0-9_].
    pattern = re.compile(rf"\.{name}\.(\d+)\.(old|[a-z0-9_]{{8}}\.partial)")
    try:
        entries = list(out.parent.iterdir())
    except OSError:
        return
    for p in entries:
        m = pattern.fullmatch(p.name)
        if m and p.is_dir() and not p.is_symlink() and _is_glmeeg_write(p):
            yield p, int(m.group(1)), m.group(2) == "old"


def recover_results(out: str | Path) -> None:
    """Repair what a killed :func:`write_run` left: put the earlier results back when the kill
    fell between the two renames of the fallback swap (``out`` missing), and remove glmeeg's
    folders of writers that are no longer running. Called before writing and loading."""
    out = Path(os.path.abspath(out))
    for p, pid, old in list(_leftovers(out)):
        if not _writer_gone(p, pid):
            continue
        if old and not (out.exists() or out.is_symlink()):
            os.replace(p, out)
        else:
            shutil.rmtree(p, ignore_errors=True)


def _fsync_tree(folder: Path) -> None:
    """Flush every file under ``folder`` and the folders themselves to disk, so that the swap
    never exposes a folder whose files a crash of the machine could still lose."""
    for dirpath, _, files in os.walk(folder):
        for name in files:
            fd = os.open(os.path.join(dirpath, name), os.O_RDONLY)
            try:
                os.fsync(fd)
            finally:
                os.close(fd)
        _fsync_dir(Path(dirpath))


def _fsync_dir(folder: Path) -> None:
    try:
        fd = os.open(folder, os.O_RDONLY)
    except OSError:
        return
    try:
        os.fsync(fd)
    except OSError:
        pass
    finally:
        os.close(fd)


def write_run(run: RunResult, out: str | Path, *, report: str | None = None) -> Path:
    """Write a run into folder ``out`` atomically (with ``report.html`` when ``report`` is given).

    Everything is written into a temporary folder next to ``out``, flushed to disk and swapped
    into place in one step (``renameat2(RENAME_EXCHANGE)`` on Linux; elsewhere two renames, and
    a kill between them is repaired by :func:`recover_results` on the next write or load).
    So a run that fails or is killed leaves the earlier result at ``out`` complete and
    loadable, and never a partial folder under its name. The subject-fit cache
    ``out/subject-fits`` is carried over. ``run.json`` lists every file written with its
    SHA-256 (:mod:`glmeeg.results.ownership`).

    Raises
    ------
    GlmeegError
        ``out`` exists and holds files glmeeg did not write (see :func:`check_output_folder`),
        or the results cannot be written there.
    """
    import socket

    from ..subject_level.cache import CACHE_FOLDER
    from .ownership import digests, relative_files

    out = check_output_folder(out)  # resolves a link: the results go where it points
    recover_results(out)
    tmp = None
    try:
        out.parent.mkdir(parents=True, exist_ok=True)
        tmp = Path(tempfile.mkdtemp(prefix=f".{out.name[:_NAME_IN_TEMP]}.{os.getpid()}.",
                                    suffix=".partial", dir=out.parent))
        (tmp / WRITING_MARK).write_text(json.dumps({"host": socket.gethostname(), "pid": os.getpid()}))
        umask = os.umask(0)
        os.umask(umask)
        os.chmod(tmp, 0o777 & ~umask)  # mkdtemp makes the folder private; give it the usual mode
        for t in run.tests:
            t.save(tmp / t.name)
        if report is not None:
            (tmp / "report.html").write_text(report, encoding="utf-8")
        written = relative_files(tmp, exclude=(WRITING_MARK,))
        _write_run_summary(run, tmp, digests(tmp, written))
        (tmp / WRITING_MARK).unlink()  # whole now: run.json accounts for every file
        _fsync_tree(tmp)
        check_output_folder(out)  # again: nothing of anyone else's may have arrived meanwhile
        if out.exists():
            if (out / CACHE_FOLDER).is_dir():  # the subject-fit cache stays with the results
                os.replace(out / CACHE_FOLDER, tmp / CACHE_FOLDER)
            if not _exchange(tmp, out):
                old = out.with_name(f".{out.name[:_NAME_IN_TEMP]}.{os.getpid()}.old")
                os.replace(out, old)
                try:
                    os.replace(tmp, out)
                except BaseException:
                    os.replace(old, out)
                    raise
                tmp = old
        else:
            os.replace(tmp, out)
            tmp = None
        _fsync_dir(out.parent)
    except BaseException as e:
        if tmp is not None and tmp.exists():
            if (tmp / CACHE_FOLDER).is_dir() and out.is_dir() and not (out / CACHE_FOLDER).exists():
                os.replace(tmp / CACHE_FOLDER, out / CACHE_FOLDER)  # the cache goes back
            shutil.rmtree(tmp, ignore_errors=True)
        if isinstance(e, OSError):
            raise GlmeegError(f"{out}: the results cannot be written ({e.strerror or e})") from None
        raise
    if tmp is not None:
        shutil.rmtree(tmp, ignore_errors=True)  # the earlier results, swapped out
    return out


def _write_run_summary(run: RunResult, folder: Path, files: dict[str, str]) -> None:
    """``run.json``: the run's summary, marked as glmeeg's, with the SHA-256 of every other
    file of the run (run.json, the list itself, is glmeeg's when the list is)."""
    doc = {**run.run_summary(), "written_by": RUN_LIST, "files": dict(sorted(files.items()))}
    (folder / "run.json").write_text(json.dumps(doc, indent=2, default=_plain) + "\n")


def write_report(folder: str | Path, html: str, *, out: str | Path | None = None) -> Path:
    """Write a run's report: into its result folder (``report.html``, added to the folder's
    file list with its digest) or, with ``out``, into that file. An existing file is replaced
    only when it is a glmeeg report.

    Raises
    ------
    GlmeegError
        The target cannot be written or is a file glmeeg did not write.
    """
    from .ownership import file_digest, read_file_list

    if out is not None:
        return write_text(html, out, kind="html", label="--out")
    folder = Path(folder).resolve()
    path = write_text(html, folder / "report.html", kind="html", label="report")
    listed = read_file_list(folder / "run.json", schema_version=SCHEMA_VERSION, kind=RUN_LIST)
    if listed is not None:
        doc = json.loads((folder / "run.json").read_text(encoding="utf-8"))
        doc["files"] = dict(sorted({**listed, "report.html": file_digest(path)}.items()))
        write_text(json.dumps(doc, indent=2, default=_plain) + "\n", folder / "run.json",
                   kind="run-summary", label="run.json")
    return path


def load_run_folder(folder: str | Path) -> RunResult:
    """Read a whole run folder back as a :class:`RunResult` (``run.json`` and every test)."""
    folder = Path(folder)
    if not folder.exists():
        recover_results(folder)
    path = folder / "run.json"
    if not path.is_file():
        raise GlmeegError(f"{folder}: not a glmeeg run folder (no run.json)")
    tests = tuple(load_test_results(folder))
    try:
        meta = json.loads(path.read_text())
        return RunResult(design=meta["design"], subject_formula=meta["subject_formula"],
                         subject_columns=tuple(meta["subject_columns"]),
                         subjects=tuple(SubjectSummary.model_validate(s) for s in meta["subjects"]),
                         tests=tests, warnings=tuple(meta.get("warnings", ())),
                         provenance=Provenance.model_validate(meta["provenance"]),
                         example_design_subject=meta.get("example_design_subject"),
                         example_design=(None if meta.get("example_design") is None
                                         else np.asarray(meta["example_design"], dtype=np.float64)))
    except (ValueError, KeyError, TypeError, RecursionError) as e:  # pydantic's ValidationError is a ValueError
        raise GlmeegError(f"{path}: unreadable run summary ({_first_line(e)})") from None


def load_test_results(folder: str | Path) -> list[TestResult]:
    """Load every test of a run folder (or the single test of a test folder)."""
    folder = Path(folder)
    if not folder.exists():
        recover_results(folder)
    if (folder / "result.npz").is_file():
        return [load_result(folder)]
    run = folder / "run.json"
    if not run.is_file():
        raise GlmeegError(f"{folder}: not a glmeeg result folder (no run.json or result.npz)")
    if run.stat().st_size > _MAX_RUN_SUMMARY:
        raise GlmeegError(f"{run}: unreadable run summary (larger than {_MAX_RUN_SUMMARY // 2**20} MiB)")
    try:
        names = json.loads(run.read_text())["tests"]
    except (ValueError, KeyError, TypeError, RecursionError) as e:
        raise GlmeegError(f"{run}: unreadable run summary ({_first_line(e)})") from None
    if not isinstance(names, list) or not all(isinstance(n, str) and n not in ("", ".", "..")
                                              and Path(n).name == n for n in names):
        raise GlmeegError(f"{run}: unreadable run summary ('tests' must list the test folder names)")
    return [load_result(folder / n) for n in names]


def save_result(result: TestResult, folder: str | Path) -> None:
    """Write ``result.npz``, ``points.csv`` and ``summary.json`` into ``folder``."""
    folder = Path(folder)
    folder.mkdir(parents=True, exist_ok=True)
    meta = result.model_dump(mode="json", exclude=set(_ARRAYS) | set(_OPTIONAL_ARRAYS))
    arrays = {k: np.asarray(getattr(result, k)) for k in _ARRAYS + _OPTIONAL_ARRAYS
              if getattr(result, k) is not None}
    with open(folder / "result.npz", "wb") as fh:
        _write_npz(fh, {"meta": np.array(json.dumps(meta)), **arrays})
    csv_safe(result.to_frame()).to_csv(folder / "points.csv", index=False, float_format="%.10g")
    if result.resampling is not None:
        csv_safe(result.clusters_frame()).to_csv(folder / "clusters.csv", index=False,
                                               float_format="%.10g")
    (folder / "summary.json").write_text(json.dumps(result.summary(), indent=2, default=_plain) + "\n")


def load_run(folder: str | Path) -> list[TestResult]:
    """Deprecated name of :func:`load_test_results` (kept for one release)."""
    warnings.warn("glmeeg.load_run is now glmeeg.load_test_results (the tests of a run folder); "
                  "the old name goes in the next release", DeprecationWarning, stacklevel=2)
    return load_test_results(folder)


def load_run_result(folder: str | Path) -> RunResult:
    """Deprecated name of :func:`load_run_folder` (kept for one release)."""
    warnings.warn("glmeeg.results.load_run_result is now glmeeg.load_run_folder (the whole run); "
                  "the old name goes in the next release", DeprecationWarning, stacklevel=2)
    return load_run_folder(folder)
