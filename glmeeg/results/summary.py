"""``summary.json``: what a test found, in a versioned, schema-checked form other programs can read."""

from __future__ import annotations

from typing import Any, Literal

import numpy as np
from pydantic import BaseModel, ConfigDict, Field

from ..inference.corrections import Correction
from .findings import CLUSTER_CAUTION, Cluster
from .models import SCHEMA_VERSION, Resampling, ResidualChecks, TestResult, _plain
from .text import CAUTION, CLINICAL_CAUTION


class _SummaryPart(BaseModel):
    model_config = ConfigDict(extra="forbid")


class SummaryPeak(_SummaryPart):
    """The point of the largest statistic (|t| for t tests) among points with a finite
    statistic and p."""

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
    peak: SummaryPeak | None = Field(None, description="absent when no point has a finite statistic and p")
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


def findings(result: TestResult) -> dict:
    """A summary of the significant points: count, peak, channels and their time spans."""
    sig = result.significant.astype(bool)
    out: dict[str, Any] = {"n_points": result.axes.n_points, "n_significant": int(sig.sum()),
                           "n_nonfinite": result.n_nonfinite}
    # A point without a finite statistic and p (zero variance, a variance at rounding level,
    # missing data; a statistic of ±inf in results saved by earlier versions) has no result,
    # so it is never the peak.
    finite = np.isfinite(result.p) & np.isfinite(result.statistic)
    if finite.any():
        labels = result.axes.point_labels()
        kept = np.where(finite, result.statistic, np.nan)
        i = int(np.nanargmax(np.abs(kept) if result.kind == "t" else kept))
        out["peak"] = {**{k: _plain(v) for k, v in labels.iloc[i].items()},
                       "statistic": float(result.statistic[i]), "p": float(result.p[i]),
                       "p_corrected": float(result.p_corrected[i]),
                       "effect_size": float(result.effect_size[i]),
                       "effect_size_interval": ([float(result.effect_size_low[i]), float(result.effect_size_high[i])]
                                                if result.effect_size_low is not None else None)}
    if sig.any():
        labels = result.axes.point_labels()[sig]
        spans = labels.groupby("channel", sort=False)["time"].agg(["min", "max", "size"])
        out["channels"] = [{"channel": ch, "first_time": float(r["min"]), "last_time": float(r["max"]),
                            "n_points": int(r["size"])} for ch, r in spans.iterrows()]
    else:
        out["channels"] = []
    out["clusters"] = [c.model_dump() for c in result.clusters if c.significant]
    return out


def summary(result: TestResult) -> dict:
    """:meth:`TestResult.summary` (documented there)."""
    out = {"schema_version": result.schema_version, "test": result.name, "kind": result.kind,
            "df": list(result.df), "alternative": result.alternative, "alpha": result.alpha,
            "correction": result.correction.model_dump(), "n_subjects": result.n_subjects,
            "subject_contrast": dict(zip(result.subject_contrast_labels, result.subject_contrast.tolist())),
            "subject_columns": list(result.subject_columns), "group_formula": result.group_formula,
            "group_columns": list(result.group_columns),
            "group_contrast": dict(zip(result.group_contrast_labels, result.group_contrast.tolist())),
            "effect_size_name": result.effect_size_name,
            "effect_size_corrected_name": result.effect_size_corrected_name,
            "resampling": result.resampling.model_dump() if result.resampling else None,
            "residual_checks": result.residual_checks.model_dump() if result.residual_checks else None,
            "findings": result.findings(), "notes": list(result.notes),
            "cautions": [CAUTION] + ([CLUSTER_CAUTION] if result.resampling else []) + [CLINICAL_CAUTION]}
    Summary.model_validate(out)
    return out
