"""Typed, immutable results: one test's maps and settings (:class:`TestResult`) and a whole
run (:class:`RunResult`), with the per-subject summary and provenance they carry."""

from __future__ import annotations

from pathlib import Path
from typing import Annotated, Any, Literal

import numpy as np
import pandas as pd
from pydantic import BaseModel, ConfigDict, Field, PlainSerializer, PlainValidator

from ..axes import Axes
from ..inference.corrections import Correction
from ..spec import TestSpec
from .findings import Cluster, clusters_frame
from .text import CLINICAL_CAUTION

SCHEMA_VERSION = 1


def _frozen_array(x: Any) -> np.ndarray:
    a = np.array(x, copy=True)
    a.setflags(write=False)
    return a


Array = Annotated[np.ndarray, PlainValidator(_frozen_array),
                  PlainSerializer(lambda a: a.tolist(), when_used="json")]


class _Frozen(BaseModel):
    model_config = ConfigDict(frozen=True, extra="forbid", arbitrary_types_allowed=True)


class Provenance(_Frozen):
    """What produced a result: software versions, input file hashes, time."""

    glmeeg_version: str
    python_version: str
    numpy_version: str
    scipy_version: str
    pandas_version: str
    patsy_version: str
    platform: str
    created: str
    design_file: str | None = None
    input_sha256: dict[str, str] = {}


class SubjectSummary(_Frozen):
    """How one subject entered the analysis."""

    subject: str
    epochs_in_file: int
    trials_listed: int
    trials_used: int
    rows_dropped: int
    df_resid: int
    condition_number: float
    robust_iterations_max: int | None = None
    robust_unconverged_points: int | None = None
    # Points where the subject's data are constant or fitted exactly up to rounding (no estimate).
    unusable_points: int = 0


_ARRAYS = ("estimate", "standard_error", "statistic", "p", "p_corrected", "significant",
           "effect_size", "effect_size_corrected", "subject_contrast", "group_contrast")


# Arrays present only for some corrections and options; the last two are the group test's
# inputs (for simulated power), absent from results saved by earlier versions.
_OPTIONAL_ARRAYS = ("p_permutation", "tfce", "cluster", "null_distribution", "effect_size_low",
                    "effect_size_high", "estimate_low", "estimate_high", "subject_estimates",
                    "group_design", "residual_skewness", "residual_kurtosis", "normality_p")


_MAPS = ("estimate", "standard_error", "statistic", "p", "p_corrected", "significant",
         "effect_size", "effect_size_corrected", "p_permutation", "tfce", "cluster",
         "effect_size_low", "effect_size_high", "estimate_low", "estimate_high",
         "residual_skewness", "residual_kurtosis", "normality_p")


class ResidualChecks(_Frozen):
    """Summary of the group-level residual checks of a single-contrast test.

    The maps (``residual_skewness``, ``residual_kurtosis``, ``normality_p``) are on the
    :class:`TestResult`; these numbers describe them.
    """

    normality_test: str = "D'Agostino-Pearson"
    alpha: float = 0.05
    share_rejected: float | None = Field(description="share of points where normality is rejected at "
                                         "alpha (uncorrected: about alpha expected by chance); "
                                         "None where it is not tested (fewer than 8 subjects, or no point "
                                         "with a usable residual variance)")
    median_abs_skewness: float
    median_excess_kurtosis: float
    outlying_subjects: tuple[str, ...] = ()


class Resampling(_Frozen):
    """How a permutation-based correction resampled the data."""

    scheme: Literal["sign-flip", "permute"]
    n_resamplings: int
    exhaustive: bool
    seed: int
    cluster_threshold: float | None = None


class TestResult(_Frozen):
    """One test at every point.

    Maps are flat arrays of length ``axes.n_points`` (``estimate`` has one row per contrast row);
    :meth:`map` returns them with the axes' shape, :meth:`to_frame` as a tidy table.
    """

    schema_version: int = SCHEMA_VERSION
    name: str
    spec: TestSpec
    kind: Literal["t", "F"]
    axes: Axes
    subjects: tuple[str, ...]
    subject_columns: tuple[str, ...]
    subject_contrast: Array
    subject_contrast_labels: tuple[str, ...]
    group_formula: str
    group_columns: tuple[str, ...]
    group_contrast: Array
    group_contrast_labels: tuple[str, ...]
    df: tuple[float, float]
    alternative: Literal["two-sided", "greater", "less"]
    alpha: float
    correction: Correction
    estimate: Array
    estimate_labels: tuple[str, ...]
    standard_error: Array
    statistic: Array
    p: Array
    p_corrected: Array
    significant: Array
    effect_size: Array
    effect_size_corrected: Array
    effect_size_name: str
    effect_size_corrected_name: str
    effect_size_low: Array | None = None
    effect_size_high: Array | None = None
    estimate_low: Array | None = None
    estimate_high: Array | None = None
    confidence_level: float = 0.95
    p_permutation: Array | None = None
    tfce: Array | None = None
    cluster: Array | None = None
    clusters: tuple[Cluster, ...] = ()
    resampling: Resampling | None = None
    null_distribution: Array | None = None
    # The group test's inputs: subject contrast estimates (n_subjects, k, n_points) in
    # ``subjects`` order and the group design matrix (n_subjects, q); None in older files.
    subject_estimates: Array | None = None
    group_design: Array | None = None
    # Group-level residual checks (single-contrast tests): maps and their summary.
    residual_skewness: Array | None = None
    residual_kurtosis: Array | None = None
    normality_p: Array | None = None
    residual_checks: ResidualChecks | None = None
    notes: tuple[str, ...] = ()
    provenance: Provenance

    @property
    def n_subjects(self) -> int:
        return len(self.subjects)

    @property
    def n_significant(self) -> int:
        return int(self.significant.sum())

    @property
    def n_nonfinite(self) -> int:
        return int((~np.isfinite(self.statistic)).sum())

    def map(self, field: str) -> np.ndarray:
        """A map as an array of shape ``axes.shape`` (``(rows, *axes.shape)`` for ``estimate``)."""
        if field not in _MAPS:
            raise KeyError(f"{field!r} is not a map; maps: {', '.join(_MAPS)}")
        value = getattr(self, field)
        if value is None:
            raise KeyError(f"{field!r} is not computed by correction '{self.correction.method}'")
        return self.axes.unflatten(value)

    def to_frame(self) -> pd.DataFrame:
        """Tidy table, one row per point (the content of ``points.csv``).

        For F tests ``estimate`` is empty and each contrast row has a column
        ``estimate: <label>``.
        """
        from .exports import points_frame

        return points_frame(self)

    def clusters_frame(self) -> pd.DataFrame:
        """The clusters (or regions of significant points) as a table: ``clusters.csv``."""
        return clusters_frame(self.clusters, frequencies=self.axes.frequencies is not None)

    def to_xarray(self):
        """Every array of the result as a labelled ``xarray.Dataset`` (needs xarray).

        Maps have dims ``channel``, (``frequency``,) ``time``; ``estimate`` (and
        ``estimate_low``/``estimate_high``) add ``contrast`` in front. The group test's inputs
        come too: ``subject_estimates`` (``subject``, ``subject_contrast_row``, point dims),
        ``group_design`` (``subject``, ``group_column``), ``subject_contrast``,
        ``group_contrast`` and ``null_distribution`` (``resampling``). Fields that are None for
        this test are left out. Scalar settings are attributes; ``settings_json`` holds every
        setting that is not an array (clusters, provenance ...) as JSON. Booleans among the
        attributes are stored as 0/1 integers (netCDF has no boolean attributes).

        Returns
        -------
        xarray.Dataset

        Raises
        ------
        GlmeegError
            xarray is not installed.
        """
        from .exports import to_xarray

        return to_xarray(self)


    def to_netcdf(self, path: str | Path) -> Path:
        """Write :meth:`to_xarray` as a netCDF-4 file, atomically (needs ``glmeeg[netcdf]``).

        The file is written beside ``path`` under a temporary name and renamed into place, so a
        failed write never leaves a partial file or damages an earlier one. :func:`read_netcdf`
        gives back every variable bit for bit with its dtype (booleans stay booleans, NaN stays
        NaN).

        Parameters
        ----------
        path : str or Path
            File to write (conventionally ``.nc``).

        Returns
        -------
        Path

        Raises
        ------
        GlmeegError
            xarray or h5netcdf is not installed, or ``path`` cannot be written.
        """
        from .exports import to_netcdf

        return to_netcdf(self, path)

    def findings(self) -> dict:
        """A summary of the significant points: count, peak, channels and their time spans."""
        from .summary import findings

        return findings(self)

    def summary(self) -> dict:
        """Everything ``summary.json`` holds; it follows :func:`summary_schema`.

        Returns
        -------
        dict
            Checked against :class:`Summary` (a mismatch is a bug in glmeeg).
        """
        from .summary import summary

        return summary(self)

    def __str__(self) -> str:
        from .text import describe

        return describe(self)

    def save(self, folder: str | Path) -> None:
        """Write ``result.npz``, ``points.csv`` and ``summary.json`` into ``folder``."""
        from .store import save_result

        return save_result(self, folder)


def _plain(v):
    if isinstance(v, np.generic):
        return v.item()
    return v


class RunResult(_Frozen):
    """All tests of one design, with the per-subject summary and provenance."""

    schema_version: int = SCHEMA_VERSION
    design: dict
    subject_formula: str
    subject_columns: tuple[str, ...]
    subjects: tuple[SubjectSummary, ...]
    tests: tuple[TestResult, ...]
    warnings: tuple[str, ...] = ()
    provenance: Provenance
    # One subject's design matrix (the first subject's), to show what was fitted.
    example_design_subject: str | None = None
    example_design: Array | None = None

    def test(self, name: str) -> TestResult:
        for t in self.tests:
            if t.name == name:
                return t
        raise KeyError(f"no test {name!r}; tests: {', '.join(t.name for t in self.tests)}")

    def run_summary(self) -> dict:
        return {"schema_version": self.schema_version, "design": self.design,
                "subject_formula": self.subject_formula, "subject_columns": list(self.subject_columns),
                "subjects": [s.model_dump() for s in self.subjects],
                "tests": [t.name for t in self.tests], "warnings": list(self.warnings),
                "provenance": self.provenance.model_dump(),
                "example_design_subject": self.example_design_subject,
                "example_design": (None if self.example_design is None
                                   else np.asarray(self.example_design).tolist())}

    def __str__(self) -> str:
        used = sum(s.trials_used for s in self.subjects)
        dropped = sum(s.rows_dropped for s in self.subjects)
        head = (f"{len(self.subjects)} subjects, {used} trials used ({dropped} rows dropped for "
                f"missing values); subject model: {self.subject_formula}")
        return "\n".join([head] + [f"warning: {w}" for w in self.warnings]
                         + [str(t) for t in self.tests] + [CLINICAL_CAUTION])
