"""Typed, immutable results; saving, loading and exporting them.

A :class:`TestResult` holds one test's maps (flat, one value per point, labelled by its
:class:`~glmeeg.axes.Axes`), its settings and provenance. A :class:`RunResult` holds every test
of a design plus the per-subject summary. Results are saved as a folder per test:

``result.npz``
    every array, bit for bit, plus the settings as JSON; :func:`load_result` reads it back.
``points.csv``
    one row per point: channel, (frequency,) time, estimate, statistic, p, p_corrected,
    significant, effect_size, effect_size_corrected.
``summary.json``
    what was found, in a form other programs can read.
"""

from __future__ import annotations

import hashlib
import json
import os
import platform
import shutil
import tempfile
import zipfile
from datetime import datetime, timezone
from pathlib import Path
from typing import Annotated, Any, Literal

import numpy as np
import pandas as pd
from pydantic import BaseModel, ConfigDict, Field, PlainSerializer, PlainValidator, ValidationError

from ..axes import Axes
from ..errors import GlmeegError
from ..group_level.effect_sizes import size_label
from .findings import CLUSTER_CAUTION, Cluster, clusters_frame
from ..inference.corrections import Correction
from ..spec import TestSpec

__all__ = ["Provenance", "SubjectSummary", "TestResult", "RunResult", "load_result", "load_run",
           "write_run", "write_table", "write_figure", "check_output_folder", "provenance", "CAUTION",
           "CLINICAL_CAUTION", "read_netcdf", "load_netcdf", "Summary", "summary_schema", "write_text",
           "NETCDF_FORMAT"]

SCHEMA_VERSION = 1
NETCDF_FORMAT = "glmeeg test result"
CLINICAL_CAUTION = ("glmeeg is research software, not a clinical diagnostic device: clinical EEG "
                    "interpretation belongs to licensed clinicians under local regulations.")
CAUTION = ("Significant points are where the test rejects the null hypothesis under the chosen "
           "error control; they do not establish the exact onset, offset or spatial extent of an "
           "effect.")


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


def _need(module: str, what: str, extra: str):
    """Import an optional package, or say which extra installs it."""
    import importlib

    try:
        return importlib.import_module(module)
    except ImportError:
        raise GlmeegError(f"{what} needs {module}: pip install 'glmeeg[{extra}]'") from None


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
                                         "None with fewer than 8 subjects")
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


class _SummaryPart(BaseModel):
    model_config = ConfigDict(extra="forbid")


class SummaryPeak(_SummaryPart):
    """The point of the largest statistic (|t| for t tests) among points with a finite p."""

    channel: str
    frequency: float | None = Field(None, description="Hz; time-frequency results only")
    time: float = Field(description="seconds")
    statistic: float
    p: float
    p_corrected: float
    effect_size: float
    effect_size_interval: list[float] | None = Field(description="[low, high] confidence interval "
                                                     "of the effect size; null when not computed",
                                                     min_length=2, max_length=2)


class SummaryChannel(_SummaryPart):
    """Where one channel has significant points."""

    channel: str
    first_time: float = Field(description="seconds")
    last_time: float = Field(description="seconds")
    n_points: int = Field(ge=1)


class SummaryFindings(_SummaryPart):
    """What was found (see :meth:`TestResult.findings`)."""

    n_points: int = Field(ge=1)
    n_significant: int = Field(ge=0)
    n_nonfinite: int = Field(ge=0, description="points where the statistic is not finite")
    peak: SummaryPeak | None = Field(None, description="absent when no point has a finite p")
    channels: list[SummaryChannel]
    clusters: list[Cluster] = Field(description="significant clusters or regions only")


class Summary(_SummaryPart):
    """The content of a test's ``summary.json`` (what :meth:`TestResult.summary` returns).

    :func:`summary_schema` turns this model into the published JSON Schema; ``summary()``
    validates its output through it, so the two cannot drift apart.
    """

    model_config = ConfigDict(extra="forbid", title="glmeeg summary.json")

    schema_version: int = Field(ge=1, description="layout version of saved results")
    test: str = Field(description="the test's name in the design file")
    kind: Literal["t", "F"]
    df: list[float] = Field(min_length=2, max_length=2, description="[numerator, denominator] "
                            "degrees of freedom (numerator 1 for t tests)")
    alternative: Literal["two-sided", "greater", "less"]
    alpha: float = Field(gt=0, lt=1)
    correction: Correction
    n_subjects: int = Field(ge=1)
    subject_contrast: dict[str, list[float]] = Field(description="contrast row label -> weights "
                                                     "on subject_columns")
    subject_columns: list[str]
    group_formula: str
    group_columns: list[str]
    group_contrast: dict[str, list[float]] = Field(description="contrast row label -> weights on "
                                                   "group_columns")
    effect_size_name: str
    effect_size_corrected_name: str
    resampling: Resampling | None = Field(description="null unless max / cluster / tfce")
    residual_checks: ResidualChecks | None = Field(description="null for multi-row contrasts")
    findings: SummaryFindings
    notes: list[str]
    cautions: list[str]


def summary_schema() -> dict:
    """The JSON Schema (draft 2020-12) of ``summary.json``, version :data:`SCHEMA_VERSION`.

    Returns
    -------
    dict
        With ``$schema``, ``$id``, ``title``, ``version`` and ``description`` on top of the
        schema generated from :class:`Summary`.
    """
    schema = Summary.model_json_schema()
    head = {"$schema": "https://json-schema.org/draft/2020-12/schema",
            "$id": f"urn:glmeeg:schema:summary:{SCHEMA_VERSION}",
            "title": "glmeeg summary.json", "version": SCHEMA_VERSION,
            "description": ("What one glmeeg test found, as written to <run folder>/<test>/"
                            f"summary.json (schema_version {SCHEMA_VERSION}). Numbers may be NaN "
                            "where a statistic could not be computed.")}
    schema.pop("title", None)
    schema.pop("description", None)
    return {**head, **schema}


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
        df = self.axes.point_labels()
        if self.kind == "t":
            df["estimate"] = self.estimate[0]
            if self.estimate_low is not None:
                df["estimate_low"] = self.estimate_low
                df["estimate_high"] = self.estimate_high
            df["standard_error"] = self.standard_error
        else:
            df["estimate"] = np.nan
            for lab, row in zip(self.estimate_labels, self.estimate):
                df[f"estimate: {lab}"] = row
        df["statistic"] = self.statistic
        if self.tfce is not None:
            df["tfce"] = self.tfce
        df["p"] = self.p
        if self.p_permutation is not None:
            df["p_permutation"] = self.p_permutation
        df["p_corrected"] = self.p_corrected
        df["significant"] = self.significant
        if self.cluster is not None:
            df["cluster"] = pd.array(np.where(self.cluster > 0, self.cluster, 0), dtype="Int64")
            df.loc[self.cluster == 0, "cluster"] = pd.NA
        df["effect_size"] = self.effect_size
        if self.effect_size_low is not None:
            df["effect_size_low"] = self.effect_size_low
            df["effect_size_high"] = self.effect_size_high
        df["effect_size_corrected"] = self.effect_size_corrected
        if self.kind == "t":
            df["effect_size_label"] = size_label(self.effect_size)
        for name in ("residual_skewness", "residual_kurtosis", "normality_p"):
            if getattr(self, name) is not None:
                df[name] = getattr(self, name)
        return df

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
        xr = _need("xarray", "to_xarray", "xarray")
        dims = self.axes.dims
        coords: dict[str, Any] = {"channel": np.array(self.axes.channels, dtype=str),
                                  "time": np.array(self.axes.times, dtype=np.float64),
                                  "contrast": np.array(self.estimate_labels, dtype=str),
                                  "subject": np.array(self.subjects, dtype=str),
                                  "subject_contrast_row": np.array(self.subject_contrast_labels, dtype=str),
                                  "subject_column": np.array(self.subject_columns, dtype=str),
                                  "group_contrast_row": np.array(self.group_contrast_labels, dtype=str),
                                  "group_column": np.array(self.group_columns, dtype=str)}
        if self.axes.frequencies is not None:
            coords["frequency"] = np.array(self.axes.frequencies, dtype=np.float64)
        data: dict[str, Any] = {}
        for f in _MAPS:
            value = getattr(self, f)
            if value is None:
                continue
            if f in ("estimate", "estimate_low", "estimate_high") and np.ndim(value) == 2:
                data[f] = (("contrast",) + dims, self.map(f))
            else:
                data[f] = (tuple(f"{f}_row{i}" for i in range(np.ndim(value) - 1)) + dims, self.map(f))
        extra = {"subject_estimates": ("subject", "subject_contrast_row"),
                 "group_design": ("subject", "group_column"),
                 "subject_contrast": ("subject_contrast_row", "subject_column"),
                 "group_contrast": ("group_contrast_row", "group_column"),
                 "null_distribution": ("resampling",)}
        for f, lead in extra.items():
            value = getattr(self, f)
            if value is None:
                continue
            value = np.asarray(value)
            if f == "subject_estimates" and value.ndim == 3 and value.shape[-1] == self.axes.n_points:
                data[f] = (lead + dims, self.axes.unflatten(value))
            elif value.ndim == len(lead):
                data[f] = (lead, value)
            else:  # a layout this export does not know: keep it, with plain dim names
                data[f] = (tuple(f"{f}_dim{i}" for i in range(value.ndim)), value)
        used = {d for v in data.values() for d in v[0]}
        coords = {k: v for k, v in coords.items() if k in used or k in dims}
        return xr.Dataset(data, coords=coords, attrs=self._attributes())

    def _attributes(self) -> dict[str, Any]:
        """Scalar settings as netCDF-safe attributes (no None, no booleans)."""
        attrs: dict[str, Any] = {"title": f"glmeeg test {self.name}", "format": NETCDF_FORMAT,
                                 "schema_version": self.schema_version, "test": self.name,
                                 "kind": self.kind, "df_numerator": float(self.df[0]),
                                 "df_denominator": float(self.df[1]), "alternative": self.alternative,
                                 "alpha": float(self.alpha), "confidence_level": float(self.confidence_level),
                                 "n_subjects": self.n_subjects, "group_formula": self.group_formula,
                                 "effect_size_name": self.effect_size_name,
                                 "effect_size_corrected_name": self.effect_size_corrected_name,
                                 "correction": self.correction.describe()}
        for key, value in self.correction.model_dump().items():
            attrs[f"correction_{key}"] = value
        if self.resampling is not None:
            for key, value in self.resampling.model_dump().items():
                attrs[f"resampling_{key}"] = value
        attrs["glmeeg_version"] = self.provenance.glmeeg_version
        attrs["created"] = self.provenance.created
        attrs["settings_json"] = json.dumps(self.model_dump(mode="json", exclude=set(_ARRAYS) | set(_OPTIONAL_ARRAYS)),
                                            default=_plain)
        return {k: (int(v) if isinstance(v, bool) else v) for k, v in attrs.items() if v is not None}

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
        ds = self.to_xarray()
        _need("h5netcdf", "to_netcdf", "netcdf")
        _need("h5py", "to_netcdf", "netcdf")
        # No fill value: nothing is masked on reading, so every NaN comes back with its bits.
        encoding = {name: {"_FillValue": None} for name in ds.variables
                    if ds[name].dtype.kind == "f"}
        return _write_atomically(Path(path), lambda tmp: ds.to_netcdf(tmp, engine="h5netcdf",
                                                                      encoding=encoding),
                                 label=str(path), kind="netcdf")

    def findings(self) -> dict:
        """A summary of the significant points: count, peak, channels and their time spans."""
        sig = self.significant.astype(bool)
        out: dict[str, Any] = {"n_points": self.axes.n_points, "n_significant": int(sig.sum()),
                               "n_nonfinite": self.n_nonfinite}
        finite = np.isfinite(self.p)
        if finite.any():
            labels = self.axes.point_labels()
            i = int(np.nanargmin(np.where(finite, self.p, np.nan)))
            if self.kind == "t" and np.isfinite(self.statistic).any():
                i = int(np.nanargmax(np.abs(np.where(finite, self.statistic, np.nan))))
            elif np.isfinite(self.statistic).any():
                i = int(np.nanargmax(np.where(finite, self.statistic, np.nan)))
            out["peak"] = {**{k: _plain(v) for k, v in labels.iloc[i].items()},
                           "statistic": float(self.statistic[i]), "p": float(self.p[i]),
                           "p_corrected": float(self.p_corrected[i]),
                           "effect_size": float(self.effect_size[i]),
                           "effect_size_interval": ([float(self.effect_size_low[i]), float(self.effect_size_high[i])]
                                                    if self.effect_size_low is not None else None)}
        if sig.any():
            labels = self.axes.point_labels()[sig]
            spans = labels.groupby("channel", sort=False)["time"].agg(["min", "max", "size"])
            out["channels"] = [{"channel": ch, "first_time": float(r["min"]), "last_time": float(r["max"]),
                                "n_points": int(r["size"])} for ch, r in spans.iterrows()]
        else:
            out["channels"] = []
        out["clusters"] = [c.model_dump() for c in self.clusters if c.significant]
        return out

    def summary(self) -> dict:
        """Everything ``summary.json`` holds; it follows :func:`summary_schema`.

        Returns
        -------
        dict
            Checked against :class:`Summary` (a mismatch is a bug in glmeeg).
        """
        out = {"schema_version": self.schema_version, "test": self.name, "kind": self.kind,
                "df": list(self.df), "alternative": self.alternative, "alpha": self.alpha,
                "correction": self.correction.model_dump(), "n_subjects": self.n_subjects,
                "subject_contrast": dict(zip(self.subject_contrast_labels, self.subject_contrast.tolist())),
                "subject_columns": list(self.subject_columns), "group_formula": self.group_formula,
                "group_columns": list(self.group_columns),
                "group_contrast": dict(zip(self.group_contrast_labels, self.group_contrast.tolist())),
                "effect_size_name": self.effect_size_name,
                "effect_size_corrected_name": self.effect_size_corrected_name,
                "resampling": self.resampling.model_dump() if self.resampling else None,
                "residual_checks": self.residual_checks.model_dump() if self.residual_checks else None,
                "findings": self.findings(), "notes": list(self.notes),
                "cautions": [CAUTION] + ([CLUSTER_CAUTION] if self.resampling else []) + [CLINICAL_CAUTION]}
        Summary.model_validate(out)
        return out

    def __str__(self) -> str:
        f = self.findings()
        df = f"t({self.df[1]:g})" if self.kind == "t" else f"F({self.df[0]:g}, {self.df[1]:g})"
        method = {"trimmed": f", {100 * (0.2 if self.spec.trim is None else self.spec.trim):g} % trimmed means",
                  "welch": ", Welch's unequal variances"}.get(self.spec.group_method, "")
        lines = [f"test {self.name}: {df}{method}, {self.n_subjects} subjects, {self.correction.describe()}, "
                 f"alpha {self.alpha:g}, {self.alternative}",
                 f"  {f['n_significant']} of {f['n_points']} points significant"]
        if "peak" in f:
            pk = f["peak"]
            where = ", ".join(f"{k} {pk[k]:g}" if k != "channel" else f"channel {pk[k]}"
                              for k in ("channel", "frequency", "time") if k in pk)
            lines.append(f"  peak: {where}: {self.kind} = {pk['statistic']:.3f}, p = {pk['p']:.3g}, "
                         f"corrected p = {pk['p_corrected']:.3g}, {self.effect_size_name} = {pk['effect_size']:.3f}"
                         + (f" [{100 * self.confidence_level:g} % CI {pk['effect_size_interval'][0]:.3f}, "
                            f"{pk['effect_size_interval'][1]:.3f}]" if pk.get("effect_size_interval") else "")
                         + (f" ({size_label(pk['effect_size'])})" if self.kind == "t" else ""))
        for ch in f["channels"][:40]:
            lines.append(f"    {ch['channel']:>8}: {1000 * ch['first_time']:7.0f} to "
                         f"{1000 * ch['last_time']:5.0f} ms ({ch['n_points']} points)")
        if len(f["channels"]) > 40:
            lines.append(f"    ... and {len(f['channels']) - 40} more channels")
        if self.resampling is not None:
            r = self.resampling
            lines.append(f"  {r.scheme}: {r.n_resamplings} resamplings"
                         f"{' (all possible)' if r.exhaustive else f', seed {r.seed}'}"
                         + (f", cluster-forming threshold {r.cluster_threshold:.3f}"
                            if r.cluster_threshold is not None else ""))
            sig = [c for c in self.clusters if c.significant]
            what = "clusters" if self.correction.method == "cluster" else "regions of significant points"
            lines.append(f"  {len(sig)} significant {what}" + (":" if sig else ""))
            for c in sig[:20]:
                span = f"{1000 * c.first_time:.0f} to {1000 * c.last_time:.0f} ms"
                if c.lowest_frequency is not None:
                    span += f", {c.lowest_frequency:g}-{c.highest_frequency:g} Hz"
                size = ("" if c.effect_size is None else
                        f"; average {self.effect_size_name} = {c.effect_size:.2f} "
                        f"[{c.effect_size_low:.2f}, {c.effect_size_high:.2f}] (selected: biased upwards)")
                if c.estimate_low is not None:
                    size += (f"; average estimate {c.estimate:.3g} [bootstrap {c.estimate_low:.3g}, "
                             f"{c.estimate_high:.3g}]")
                lines.append(f"    #{c.id} {c.sign}, {span}, {c.extent} points, p = {c.p:.4g}; peak "
                             f"{c.peak_channel} {1000 * c.peak_time:.0f} ms ({self.kind} = "
                             f"{c.peak_statistic:.2f}); channels {' '.join(c.channels)}{size}")
            if len(sig) > 20:
                lines.append(f"    ... and {len(sig) - 20} more")
        if f["n_nonfinite"]:
            lines.append(f"  warning: the statistic is not finite at {f['n_nonfinite']} points "
                         "(zero variance, a variance at rounding level or underflowed, or missing "
                         "data); they are left out of the correction")
        rc = self.residual_checks
        if rc is not None:
            share = ("not tested (fewer than 8 subjects)" if rc.share_rejected is None else
                     f"{100 * rc.share_rejected:.1f} % of points (about {100 * rc.alpha:g} % by chance)")
            lines.append(f"  residual checks: normality ({rc.normality_test}) rejected at {share}; "
                         f"median |skewness| {rc.median_abs_skewness:.2f}, median excess kurtosis "
                         f"{rc.median_excess_kurtosis:.2f}"
                         + (f"; outlying subjects {', '.join(rc.outlying_subjects)}" if rc.outlying_subjects else ""))
        for n in self.notes:
            lines.append(f"  note: {n}")
        lines.append(f"  caution: {CAUTION}")
        if self.resampling is not None:
            lines.append(f"  caution: {CLUSTER_CAUTION}")
        return "\n".join(lines)

    # --- saving ---------------------------------------------------------------------------
    def save(self, folder: str | Path) -> None:
        """Write ``result.npz``, ``points.csv`` and ``summary.json`` into ``folder``."""
        folder = Path(folder)
        folder.mkdir(parents=True, exist_ok=True)
        meta = self.model_dump(mode="json", exclude=set(_ARRAYS) | set(_OPTIONAL_ARRAYS))
        arrays = {k: np.asarray(getattr(self, k)) for k in _ARRAYS + _OPTIONAL_ARRAYS
                  if getattr(self, k) is not None}
        with open(folder / "result.npz", "wb") as fh:
            _write_npz(fh, {"meta": np.array(json.dumps(meta)), **arrays})
        csv_safe(self.to_frame()).to_csv(folder / "points.csv", index=False, float_format="%.10g")
        if self.resampling is not None:
            csv_safe(self.clusters_frame()).to_csv(folder / "clusters.csv", index=False,
                                                   float_format="%.10g")
        (folder / "summary.json").write_text(json.dumps(self.summary(), indent=2, default=_plain) + "\n")


def _plain(v):
    if isinstance(v, np.generic):
        return v.item()
    return v


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


def read_netcdf(path: str | Path):
    """Read a file written by :meth:`TestResult.to_netcdf` into memory.

    Parameters
    ----------
    path : str or Path

    Returns
    -------
    xarray.Dataset
        The same variables, coordinates and attributes as :meth:`TestResult.to_xarray`, every
        variable bit for bit with its dtype.

    Raises
    ------
    GlmeegError
        The file is missing, is not netCDF, was not written by glmeeg, or xarray / h5netcdf
        are not installed.
    """
    path = Path(path)
    xr = _need("xarray", "read_netcdf", "netcdf")
    _need("h5netcdf", "read_netcdf", "netcdf")
    _need("h5py", "read_netcdf", "netcdf")
    if not path.is_file():
        raise GlmeegError(f"{path}: no such file")
    try:
        ds = xr.load_dataset(path, engine="h5netcdf")
    except (OSError, ValueError, TypeError, KeyError) as e:
        raise GlmeegError(f"{path}: not a readable netCDF file ({e or type(e).__name__})") from None
    if ds.attrs.get("format") != NETCDF_FORMAT:
        raise GlmeegError(f"{path}: not a glmeeg result (no attribute format = {NETCDF_FORMAT!r})")
    for name in list(ds.variables):
        var = ds[name]
        if var.dtype == object:  # variable-length strings some engines read back as objects
            ds[name] = var.astype(str)
        var = ds[name]
        var.encoding.pop("_FillValue", None)
    return ds


def load_netcdf(path: str | Path) -> TestResult:
    """Read a file written by :meth:`TestResult.to_netcdf` back into the :class:`TestResult`.

    Parameters
    ----------
    path : str or Path

    Returns
    -------
    TestResult
        Equal to the one written, every array bit for bit.

    Raises
    ------
    GlmeegError
        As :func:`read_netcdf`, or the file's settings do not make a valid result.
    """
    ds = read_netcdf(path)
    try:
        meta = json.loads(ds.attrs["settings_json"])
        n_point_dims = len(Axes.model_validate(meta["axes"]).dims)
    except (KeyError, ValueError, TypeError) as e:
        raise GlmeegError(f"{path}: not a glmeeg result (settings_json: {e})") from None
    arrays = {}
    for f in _ARRAYS + _OPTIONAL_ARRAYS:
        if f not in ds:
            continue
        value = ds[f].values
        if f in _MAPS or f == "subject_estimates":
            value = value.reshape(value.shape[:value.ndim - n_point_dims] + (-1,))
        arrays[f] = value
    try:
        return TestResult.model_validate({**meta, **arrays})
    except ValidationError as e:
        err = e.errors()[0]
        where = ".".join(map(str, err["loc"])) or "(top level)"
        raise GlmeegError(f"{path}: not a valid glmeeg result ({where}: {err['msg']})") from None


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


def load_run_result(folder: str | Path) -> RunResult:
    """Read a whole run folder back as a :class:`RunResult` (``run.json`` and every test)."""
    folder = Path(folder)
    if not folder.exists():
        recover_results(folder)
    path = folder / "run.json"
    if not path.is_file():
        raise GlmeegError(f"{folder}: not a glmeeg run folder (no run.json)")
    tests = tuple(load_run(folder))
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


def load_run(folder: str | Path) -> list[TestResult]:
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
