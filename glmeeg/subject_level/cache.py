"""The cache of finished subject fits, kept in the run's output folder.

Each fit is one file ``OUT/subject-fits/<key>.npz``, ``key`` being the SHA-256 of every input of
the fit (:attr:`glmeeg.subject_level.jobs.SubjectJob.key`). A fit is written to a temporary file in the
same folder and renamed into place, so an entry is either whole or absent: a run killed at any
moment leaves only complete entries, and the next run takes them instead of refitting.
:func:`glmeeg.results.write_run` carries the folder over when it replaces a run; once the new
results are written, the entries the new run did not use are removed (:meth:`FitCache.prune`).
A run that fails on an input error removes the entries it added, so the output folder is left
as it was; a run that is killed, interrupted or loses its workers keeps them.

An entry is an uncompressed ``np.savez`` archive of two members, ``betas.npy`` (little-endian
float64, C order) and ``meta.npy`` (a JSON object: the key, the subject, the fit's facts, the
betas' shape, dtype and SHA-256), and a third, ``unusable.npy`` (sorted point indices, with
their SHA-256 in the metadata), when the subject has points whose data are constant or fitted
exactly. :meth:`FitCache.load` checks an entry before using it: sizes
against the shape the job implies before anything is read (compressed members are refused, so
nothing is inflated), the ``.npy`` headers, every metadata field and its type, the digest and
that every beta is finite. An entry that cannot be read or fails a check is refitted, with one
line logged. The digest guards against accidents (a damaged disk, a truncated copy, a stray
file), not against someone who forges an entry together with its digest.
"""

from __future__ import annotations

import hashlib
import json
import logging
import math
import os
import re
import stat
import struct
import tempfile
import warnings
import zipfile
from pathlib import Path

import numpy as np
from numpy.lib import format as npy_format

from ..errors import GlmeegError
from .jobs import FIT_FORMAT, SubjectFit

__all__ = ["CACHE_FOLDER", "FitCache"]

CACHE_FOLDER = "subject-fits"

log = logging.getLogger("glmeeg")

_BETAS, _META, _UNUSABLE = "betas.npy", "meta.npy", "unusable.npy"
_INDEX = "<i8"  # the unusable points' indices on disk
_DTYPE = "<f8"  # the betas on disk, whatever the machine's byte order
# numpy writes a 2-d array's .npy header in 128 bytes (magic, length, dict padded to 64); the
# bound leaves room for other numpy versions' padding and nothing like a payload.
_NPY_HEADER_MAX = 1024
_META_MAX = 64 * 1024  # the JSON takes about 1.5 kB as a numpy unicode string
_ZIP_OVERHEAD_MAX = 4096  # local headers, central directory and end records of two members
_META_FIELDS = frozenset({"format", "subject", "key", "df_resid", "robust_iterations_max",
                          "robust_unconverged_points", "sha256", "shape", "dtype",
                          "unusable_points", "unusable_sha256"})
# Names of the cache's files: entries, and the temporary files of their writes.
CACHE_ENTRY = re.compile(r"[0-9a-f]{64}\.npz|\.[0-9a-f]{16}\.[A-Za-z0-9_]{1,16}\.partial")
_HEX64 = re.compile(r"[0-9a-f]{64}")

# What reading a damaged or foreign file can raise (json's and unicode errors are ValueErrors;
# RecursionError: deeply nested JSON; UserWarning: numpy's Python 2 header fallback, made an error).
_READ_ERRORS = (OSError, EOFError, zipfile.BadZipFile, zipfile.LargeZipFile, ValueError, KeyError,
                TypeError, OverflowError, struct.error, json.JSONDecodeError, UnicodeDecodeError,
                RecursionError, UserWarning)


class _Refused(Exception):
    """An entry that was read but fails a check; the message is the reason."""


def _one_line(text: str, limit: int = 160) -> str:
    """``text`` as one short printable line (reasons may quote bytes from a foreign file)."""
    text = "".join(c if c.isprintable() else "?" for c in " ".join(str(text).split()))
    return text if len(text) <= limit else text[:limit - 3] + "..."


def _is_int(value) -> bool:
    return type(value) is int  # JSON integers only: bool is an int subclass, not a count


def _unique_keys(pairs):
    keys = [k for k, _ in pairs]
    if len(set(keys)) != len(keys):
        raise _Refused("metadata repeats a field")
    return dict(pairs)


def _npy_header(fh, name: str):
    """``(shape, fortran_order, dtype)`` of the .npy member open in ``fh`` (versions 1 and 2)."""
    version = npy_format.read_magic(fh)
    with warnings.catch_warnings():
        warnings.simplefilter("error", UserWarning)  # a header only Python 2 could write: refuse
        if version == (1, 0):
            return npy_format.read_array_header_1_0(fh, max_header_size=_NPY_HEADER_MAX)
        if version == (2, 0):
            return npy_format.read_array_header_2_0(fh, max_header_size=_NPY_HEADER_MAX)
    raise _Refused(f"{name}: .npy format version {version[0]}.{version[1]}")


def _read_exactly(fh, n: int, name: str) -> bytes:
    """The next ``n`` bytes of a member, which must then end (reading to its end checks its CRC)."""
    data = fh.read(n)
    if len(data) != n:
        raise _Refused(f"{name}: {len(data)} bytes of data, {n} expected")
    if fh.read(1):
        raise _Refused(f"{name}: bytes after the data")
    return data


def _check_meta(meta, *, key: str, subject: str, shape: tuple[int, int]) -> None:
    """Every field present, flat, of its type and agreeing with the job."""
    if not isinstance(meta, dict):
        raise _Refused(f"metadata is a JSON {type(meta).__name__}, not an object")
    if set(meta) != _META_FIELDS:
        odd = sorted(set(meta) ^ _META_FIELDS)
        raise _Refused(f"metadata fields missing or unexpected: {', '.join(map(repr, odd[:4]))}")
    for name, value in meta.items():
        flat = (isinstance(value, list) and len(value) == 2 and all(map(_is_int, value))
                if name == "shape" else value is None or isinstance(value, str) or _is_int(value))
        if not flat:
            raise _Refused(f"metadata field {name!r} holds a {type(value).__name__}")
    expected = {"format": FIT_FORMAT, "subject": subject, "key": key, "shape": list(shape), "dtype": _DTYPE}
    for name, value in expected.items():
        if meta[name] != value or type(meta[name]) is not type(value):
            raise _Refused(f"metadata {name} {meta[name]!r}, expected {value!r}")
    if not _is_int(meta["df_resid"]) or meta["df_resid"] < 0:
        raise _Refused(f"metadata df_resid {meta['df_resid']!r}, expected a count")
    robust = (meta["robust_iterations_max"], meta["robust_unconverged_points"])
    if robust != (None, None) and not all(_is_int(v) and v >= 0 for v in robust):
        raise _Refused(f"metadata robust fields {robust!r}, expected two counts or none")
    if robust[1] is not None and robust[1] > shape[1]:
        raise _Refused(f"metadata robust_unconverged_points {robust[1]}, more than the {shape[1]} points")
    if not (isinstance(meta["sha256"], str) and _HEX64.fullmatch(meta["sha256"])):
        raise _Refused("metadata sha256 is not a SHA-256 digest")
    count, digest = meta["unusable_points"], meta["unusable_sha256"]
    if not (_is_int(count) and 0 <= count <= shape[1]):
        raise _Refused(f"metadata unusable_points {count!r}, expected a count of at most {shape[1]}")
    if (digest is None) != (count == 0) or (digest is not None and not (isinstance(digest, str)
                                                                        and _HEX64.fullmatch(digest))):
        raise _Refused("metadata unusable_sha256 does not fit unusable_points")


class FitCache:
    """Subject fits stored by key in one folder.

    Parameters
    ----------
    folder : str or Path
        Usually ``OUT/subject-fits``; created on the first :meth:`store`.
    """

    def __init__(self, folder: str | Path):
        self.folder = Path(folder)

    def _path(self, key: str) -> Path:
        if len(key) != 64 or any(c not in "0123456789abcdef" for c in key):
            raise ValueError(f"not a fit key: {key!r}")
        return self.folder / f"{key}.npz"

    def load(self, key: str, *, subject: str, shape: tuple[int, int]) -> SubjectFit | None:
        """The cached fit of ``key`` once it passes every check, else None.

        The checks, in order: a regular file no larger than ``shape`` allows; a zip archive
        of exactly ``betas.npy`` and ``meta.npy``, both stored uncompressed, unencrypted and
        within their size bounds (so nothing is inflated and nothing large is allocated); the
        metadata, a 0-d unicode array holding a flat JSON object whose fields have their types
        and agree with ``key``, ``subject`` and ``shape``; the betas' header (float64
        little-endian, C order, ``shape``) and exactly their bytes; their SHA-256 against the
        metadata's; every beta finite.

        Parameters
        ----------
        key : str
            The job's key (:attr:`glmeeg.subject_level.jobs.SubjectJob.key`).
        subject : str
        shape : tuple of int
            The betas' expected ``(n_columns, n_points)``: the job's design columns and points.

        Returns
        -------
        SubjectFit or None
            None when there is no entry, or (with one warning line on the ``glmeeg`` logger
            naming the subject and the reason) when the entry cannot be read or fails a check;
            the caller then refits and :meth:`store` replaces it.
        """
        path = self._path(key)
        shape = (int(shape[0]), int(shape[1]))
        try:
            return self._verified(path, key=key, subject=subject, shape=shape)
        except FileNotFoundError:
            return None
        except _Refused as e:
            why = f"failed verification ({e})"
        except _READ_ERRORS as e:
            why = f"unreadable ({type(e).__name__}: {e})"
        log.warning("subject %s: cached fit %s %s; refitting", subject, key[:12], _one_line(why))
        return None

    def _verified(self, path: Path, *, key: str, subject: str, shape: tuple[int, int]) -> SubjectFit:
        n_bytes = 8 * math.prod(shape)
        bound = {_BETAS: _NPY_HEADER_MAX + n_bytes, _META: _META_MAX,
                 _UNUSABLE: _NPY_HEADER_MAX + 8 * shape[1]}
        # O_NONBLOCK: a FIFO put in an entry's place must not hang the run (no effect on files).
        with open(path, "rb", opener=lambda p, flags: os.open(p, flags | getattr(os, "O_NONBLOCK", 0))) as fh:
            st = os.fstat(fh.fileno())
            if not stat.S_ISREG(st.st_mode):
                raise _Refused("not a regular file")
            limit = sum(bound.values()) + _ZIP_OVERHEAD_MAX
            if st.st_size > limit:
                raise _Refused(f"file of {st.st_size} bytes, at most {limit} expected")
            with zipfile.ZipFile(fh) as zf:
                infos = zf.infolist()
                names = sorted(info.filename for info in infos)
                if names not in (sorted(bound), sorted((_BETAS, _META))):
                    raise _Refused(f"members {names!r}, expected {sorted((_BETAS, _META))!r} "
                                   f"(and {_UNUSABLE!r})")
                for info in infos:
                    # Only glmeeg's own layout: stored members (compressed ones, deflate bombs
                    # included, are never inflated) no larger than the shape implies.
                    if info.compress_type != zipfile.ZIP_STORED:
                        raise _Refused(f"{info.filename} is compressed (method {info.compress_type})")
                    if info.flag_bits & 0x1:
                        raise _Refused(f"{info.filename} is encrypted")
                    if info.file_size > bound[info.filename] or info.compress_size != info.file_size:
                        raise _Refused(f"{info.filename} declares {info.file_size} bytes, at most "
                                       f"{bound[info.filename]} expected")
                with zf.open(_META) as m:
                    mshape, fortran, mdtype = _npy_header(m, _META)
                    if mshape != () or fortran is not False or mdtype.kind != "U":
                        raise _Refused(f"{_META}: {mdtype.str} array of shape {mshape}, expected a string")
                    raw = _read_exactly(m, mdtype.itemsize, _META)
                # Decoded here, not by numpy, which fails with SystemError on invalid code points.
                text = raw.decode("utf-32-be" if mdtype.str[0] == ">" else "utf-32-le").rstrip("\x00")
                meta = json.loads(text, object_pairs_hook=_unique_keys)
                _check_meta(meta, key=key, subject=subject, shape=shape)
                with zf.open(_BETAS) as b:
                    bshape, fortran, bdtype = _npy_header(b, _BETAS)
                    if bdtype != np.dtype(_DTYPE) or fortran is not False or bshape != shape:
                        raise _Refused(f"{_BETAS}: {bdtype.str} array of shape {bshape}"
                                       f"{' (Fortran order)' if fortran else ''}, expected {_DTYPE} of "
                                       f"shape {shape}")
                    data = _read_exactly(b, n_bytes, _BETAS)
                count = meta["unusable_points"]
                if (_UNUSABLE in names) != (count > 0):
                    raise _Refused(f"{_UNUSABLE} {'present' if _UNUSABLE in names else 'absent'}, "
                                   f"with {count} unusable points in the metadata")
                unusable = np.empty(0, dtype=np.int64)
                if count:
                    with zf.open(_UNUSABLE) as u:
                        ushape, fortran, udtype = _npy_header(u, _UNUSABLE)
                        if udtype != np.dtype(_INDEX) or ushape != (count,):
                            raise _Refused(f"{_UNUSABLE}: {udtype.str} array of shape {ushape}, "
                                           f"expected {_INDEX} of shape ({count},)")
                        raw_index = _read_exactly(u, 8 * count, _UNUSABLE)
                    if hashlib.sha256(raw_index).hexdigest() != meta["unusable_sha256"]:
                        raise _Refused("digest mismatch of the unusable points")
                    unusable = np.frombuffer(raw_index, dtype=_INDEX).astype(np.int64)
                    if unusable[0] < 0 or unusable[-1] >= shape[1] or np.any(np.diff(unusable) <= 0):
                        raise _Refused("unusable points out of range or out of order")
        if hashlib.sha256(data).hexdigest() != meta["sha256"]:
            raise _Refused("digest mismatch")
        betas = np.frombuffer(data, dtype=_DTYPE).reshape(shape)
        finite = np.isfinite(betas)
        if not finite.all():
            raise _Refused(f"{betas.size - np.count_nonzero(finite)} betas are NaN or infinite")
        return SubjectFit(subject=subject, betas=betas.astype(np.float64),  # native, writable copy
                          df_resid=meta["df_resid"], robust_iterations_max=meta["robust_iterations_max"],
                          robust_unconverged_points=meta["robust_unconverged_points"], unusable=unusable)

    def store(self, key: str, fit: SubjectFit) -> Path:
        """Write one fit atomically (temporary file in the folder, fsync, then rename).

        The metadata carries ``key``, the fit's facts and the betas' shape, dtype and SHA-256
        (over their little-endian float64 bytes in C order), which :meth:`load` checks.
        """
        path = self._path(key)
        betas = np.ascontiguousarray(fit.betas, dtype=_DTYPE)
        meta = {"format": FIT_FORMAT, "subject": fit.subject, "key": key, "df_resid": int(fit.df_resid),
                "robust_iterations_max": fit.robust_iterations_max,
                "robust_unconverged_points": fit.robust_unconverged_points,
                "sha256": hashlib.sha256(betas.data).hexdigest(), "shape": list(betas.shape),
                "dtype": _DTYPE}
        unusable = np.ascontiguousarray(fit.unusable, dtype=_INDEX)
        meta["unusable_points"] = int(unusable.size)
        meta["unusable_sha256"] = hashlib.sha256(unusable.data).hexdigest() if unusable.size else None
        members = {"betas": betas, "meta": np.array(json.dumps(meta, sort_keys=True))}
        if unusable.size:
            members["unusable"] = unusable
        tmp = None
        try:
            self.folder.mkdir(parents=True, exist_ok=True)
            fd, tmp = tempfile.mkstemp(prefix=f".{key[:16]}.", suffix=".partial", dir=self.folder)
            umask = os.umask(0)
            os.umask(umask)
            os.fchmod(fd, 0o666 & ~umask)  # mkstemp makes the file private; give it the usual mode
            with os.fdopen(fd, "wb") as fh:
                # np.savez stores its members uncompressed, the only layout load accepts.
                np.savez(fh, **members)
                fh.flush()
                os.fsync(fh.fileno())
            os.replace(tmp, path)
        except OSError as e:
            if tmp is not None:
                Path(tmp).unlink(missing_ok=True)
            raise GlmeegError(f"{self.folder}: cannot store the fit of subject {fit.subject} "
                              f"({e.strerror or e})") from None
        except BaseException:
            if tmp is not None:
                Path(tmp).unlink(missing_ok=True)
            raise
        return path

    def keys(self) -> set[str]:
        """Keys of the entries present."""
        if not self.folder.is_dir():
            return set()
        return {p.stem for p in self.folder.glob("*.npz")}

    def prune(self, keep: set[str]) -> None:
        """Remove every entry (and leftover temporary file) whose key is not in ``keep``."""
        if not self.folder.is_dir():
            return
        for p in self.folder.iterdir():
            # Only names the cache gives its entries and their temporary files: never anything else.
            if (CACHE_ENTRY.fullmatch(p.name) and p.is_file() and not p.is_symlink()
                    and (p.name.endswith(".partial") or p.stem not in keep)):
                p.unlink(missing_ok=True)

    def rollback(self, keep: set[str]) -> None:
        """Remove the entries added since ``keep`` was taken (and the folder, if left empty).

        Used when a run fails on an input error: the output folder is left as it was.
        """
        self.prune(keep)
        try:
            self.folder.rmdir()
        except OSError:  # absent, or not empty: earlier entries stay
            pass
