"""Shared fixtures and the suite's environment. The study builder and the other helpers are
public, in :mod:`glmeeg.testing`: import them from there (this file is pytest's, not a module to
import).

Invented data for synthetic tests only; every reference value the tests compare against comes
from an outside source named beside the check.
"""

from __future__ import annotations

import os

# numba's thread pool is GNU OpenMP's here, whose idle threads spin for the others at the end of
# every parallel loop. On a loaded machine the other thread is often descheduled, and each of
# those waits lasts a time slice: beside one CPU-bound process, tests of many small maps ran 5
# to 10 times slower (test_fwer: 2.5 s alone, 7 to 34 s loaded; 2.7 to 2.9 s with this). Idle
# threads sleep instead; results do not depend on the threads (bitwise, DEVELOPERS.md). Set
# before numba starts its threads; the processes and Dask workers the tests start inherit it.
os.environ.setdefault("OMP_WAIT_POLICY", "PASSIVE")

from pathlib import Path  # noqa: E402

import pytest  # noqa: E402

from glmeeg.testing import write_study  # noqa: E402


@pytest.fixture
def study(tmp_path: Path) -> Path:
    """Design file of a default small study with a planted condition-b effect."""
    return write_study(tmp_path / "study", effect=1.5, seed=1)
