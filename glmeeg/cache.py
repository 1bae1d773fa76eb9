"""The cache of finished subject fits, kept in the run's output folder.

Each fit is one file ``OUT/subject-fits/<key>.npz``, ``key`` being the SHA-256 of every input of
the fit (:attr:`glmeeg.subject_jobs.SubjectJob.key`). A fit is written to a temporary file in the
same folder and renamed into place, so an entry is either whole or absent: a run killed at any
moment leaves only complete entries, and the next run takes them instead of refitting. An
entry that cannot be read (a damaged disk, a foreign file) is ignored and refitted.
:func:`glmeeg.results.write_run` carries the folder over when it replaces a run; once the new
results are written, the entries the new run did not use are removed (:meth:`FitCache.prune`).
A run that fails on an input error removes the entries it added, so the output folder is left
as it was; a run that is killed, interrupted or loses its workers keeps them.
"""

from __future__ import annotations

import json
import logging
import os
import tempfile
import zipfile
from pathlib import Path

import numpy as np

from .errors import GlmeegError
from .subject_jobs import FIT_FORMAT, SubjectFit

__all__ = ["CACHE_FOLDER", "FitCache"]

CACHE_FOLDER = "subject-fits"

log = logging.getLogger("glmeeg")


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

    def load(self, key: str, *, subject: str) -> SubjectFit | None:
        """The cached fit of ``key``, or None when there is none or it cannot be read."""
        path = self._path(key)
        if not path.is_file():
            return None
        try:
            with np.load(path, allow_pickle=False) as z:
                meta = json.loads(str(z["meta"][()]))
                betas = np.array(z["betas"], dtype=np.float64)
            if meta.get("format") != FIT_FORMAT or meta.get("subject") != subject:
                return None
            return SubjectFit(subject=subject, betas=betas, df_resid=int(meta["df_resid"]),
                              robust_iterations_max=meta.get("robust_iterations_max"),
                              robust_unconverged_points=meta.get("robust_unconverged_points"))
        except (OSError, ValueError, KeyError, TypeError, EOFError, zipfile.BadZipFile) as e:
            log.warning("subject %s: cached fit %s unreadable (%s); refitting", subject, path.name, e)
            return None

    def store(self, key: str, fit: SubjectFit) -> Path:
        """Write one fit atomically (temporary file in the folder, then rename)."""
        path = self._path(key)
        meta = {"format": FIT_FORMAT, "subject": fit.subject, "df_resid": fit.df_resid,
                "robust_iterations_max": fit.robust_iterations_max,
                "robust_unconverged_points": fit.robust_unconverged_points}
        tmp = None
        try:
            self.folder.mkdir(parents=True, exist_ok=True)
            fd, tmp = tempfile.mkstemp(prefix=f".{key[:16]}.", suffix=".partial", dir=self.folder)
            umask = os.umask(0)
            os.umask(umask)
            os.fchmod(fd, 0o666 & ~umask)  # mkstemp makes the file private; give it the usual mode
            with os.fdopen(fd, "wb") as fh:
                np.savez(fh, betas=fit.betas, meta=np.array(json.dumps(meta, sort_keys=True)))
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
            if p.is_file() and (p.name.endswith(".partial") or (p.suffix == ".npz" and p.stem not in keep)):
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
