"""Where a result comes from: versions, platform, time stamp and the SHA-256 of every input."""

from __future__ import annotations

import os
import platform
from datetime import datetime, timezone
from pathlib import Path

import numpy as np
import pandas as pd

from ..errors import GlmeegError
from .models import Provenance


def _created() -> str:
    """When the run was made (UTC, ISO 8601), or ``SOURCE_DATE_EPOCH`` when that is set: the
    reproducible-builds convention, which makes two runs on the same inputs byte-identical."""
    fixed = os.environ.get("SOURCE_DATE_EPOCH")
    if fixed is not None:
        try:
            when = datetime.fromtimestamp(int(fixed), timezone.utc)
        except (ValueError, OverflowError, OSError):
            raise GlmeegError(f"SOURCE_DATE_EPOCH: {fixed!r} is not a number of seconds since "
                              "1970-01-01") from None
    else:
        when = datetime.now(timezone.utc)
    return when.isoformat(timespec="seconds")


def provenance(*, design_file: Path | None = None, inputs: dict[str, Path] | None = None) -> Provenance:
    """Versions, time and SHA-256 of the design file and every input file."""
    import patsy
    import scipy

    from .._version import __version__
    from .ownership import file_digest

    hashes = {}
    if design_file is not None:
        hashes["design"] = file_digest(design_file)
    for label, path in (inputs or {}).items():
        hashes[label] = file_digest(path)
    return Provenance(glmeeg_version=__version__, python_version=platform.python_version(),
                      numpy_version=np.__version__, scipy_version=scipy.__version__,
                      pandas_version=pd.__version__, patsy_version=patsy.__version__,
                      platform=platform.platform(),
                      created=_created(),
                      design_file=str(design_file) if design_file else None, input_sha256=hashes)
