"""Design-file schema: the validated description of a study and its tests.

A design file is TOML with three tables and one array of tables::

    [data]            where the study files are, time and frequency axes
    [subject_model]   the single-trial formula fitted in every subject
    [group_model]     the between-subject formula fitted on subjects' contrast estimates
    [[test]]          one entry per question: contrasts, correction, alpha, alternative

Unknown keys are an error, so a misspelt option never passes silently.
"""

from __future__ import annotations

import math
import re
import string
import tomllib
import warnings
from pathlib import Path
from typing import Literal, Union

from pydantic import BaseModel, ConfigDict, Field, ValidationError, field_validator, model_validator

from . import defaults
from .errors import DesignFileError

__all__ = ["DataSpec", "SubjectModelSpec", "GroupModelSpec", "TestSpec", "DesignSpec",
           "Contrast", "load_design", "parse_design"]

Alternative = Literal["two-sided", "greater", "less"]
CorrectionName = Literal["none", "bonferroni", "holm", "fdr", "max-statistic", "cluster", "tfce"]
# Correction names of earlier releases, accepted with a deprecation warning for one release.
DEPRECATED_CORRECTIONS = {"max": "max-statistic"}
PERMUTATION_CORRECTIONS = ("max-statistic", "cluster", "tfce")


def current_correction_name(name: str) -> str:
    """A correction's name, an earlier release's name replaced (with a DeprecationWarning)."""
    if name in DEPRECATED_CORRECTIONS:
        warnings.warn(f"correction {name!r} is now {DEPRECATED_CORRECTIONS[name]!r}; the old name goes "
                      "in the next release", DeprecationWarning, stacklevel=3)
        return DEPRECATED_CORRECTIONS[name]
    return name

# Keys that belong to one family of corrections only.
_PERMUTATION_KEYS = ("permutations", "seed", "resampling")
_CLUSTER_KEYS = ("cluster_threshold", "cluster_statistic")
_TFCE_KEYS = ("tfce_extent_exponent", "tfce_height_exponent")

# A contrast is a column name or patsy constraint string ("a - b"), or a numeric vector; a list
# of several of these is a joint (F) contrast.
Contrast = Union[str, list[float], list[Union[str, list[float]]]]

_SAFE_NAME = re.compile(r"[A-Za-z0-9][A-Za-z0-9._-]{0,99}")
# Names a result folder holds besides the tests' folders (any letter case: file systems that
# ignore case would confuse them).
RESERVED_NAMES = ("run.json", "report.html", "subject-fits")

# Bounds on a design file, checked on its text before the TOML parser runs (a parser's cost can
# grow with the square of a dotted key's length, and its recursion with nesting). Documented.
MAX_DESIGN_BYTES = 2**20
MAX_NESTING = 16
MAX_KEY_PARTS = 32
MAX_ARRAY_LENGTH = 10_000
MAX_LEVELS = 1000
MAX_TESTS = 1000

_TOML_TOKEN = re.compile("|".join([
    r'(?P<mlbasic>"""(?:[^"\\]|\\.|"(?!""))*"{3,5})',     # multi-line basic string
    r"(?P<mlliteral>'{3}[\s\S]*?'{3,5})",                   # multi-line literal string
    r'(?P<basic>"(?:[^"\\\n]|\\.)*")',                       # basic string
    r"(?P<literal>'[^'\n]*')",                               # literal string
    r"(?P<comment>#[^\n]*)",
    r"(?P<word>[A-Za-z0-9_+:-]+)",                           # bare key, number, date, boolean
    r"(?P<space>[ \t\r\n]+)",
    r"(?P<other>.)",
]), re.DOTALL)


def _check_toml_cost(text: str, source: str) -> None:
    """Refuse a design file whose parsing alone would be costly: nesting deeper than
    :data:`MAX_NESTING`, a dotted key of more than :data:`MAX_KEY_PARTS` parts, an array or
    inline table of more than :data:`MAX_ARRAY_LENGTH` elements. One linear pass over the
    text; strings and comments are skipped whole, so their content counts for nothing."""
    stack: list[int] = []  # elements seen so far in each open array / inline table
    chain, after_dot = 0, False
    for m in _TOML_TOKEN.finditer(text):
        kind, tok = m.lastgroup, m.group()
        if kind in ("space", "comment"):
            continue
        if kind in ("word", "basic", "literal", "mlbasic", "mlliteral"):
            chain = chain + 1 if after_dot else 1
            after_dot = False
            if chain > MAX_KEY_PARTS:
                raise DesignFileError(f"{source}: a dotted key has more than {MAX_KEY_PARTS} parts")
            continue
        after_dot = tok == "."
        if not after_dot:
            chain = 0
        if tok in "[{":
            stack.append(0)
            if len(stack) > MAX_NESTING:
                raise DesignFileError(f"{source}: arrays or tables are nested more than {MAX_NESTING} deep")
        elif tok in "]}" and stack:
            stack.pop()
        elif tok == "," and stack:
            stack[-1] += 1
            if stack[-1] >= MAX_ARRAY_LENGTH:
                raise DesignFileError(f"{source}: an array or inline table has more than "
                                      f"{MAX_ARRAY_LENGTH} elements")


class _Strict(BaseModel):
    # strict: a value of the wrong type ("200" for a number, 1 for a text) is an error, never
    # converted.
    model_config = ConfigDict(frozen=True, extra="forbid", strict=True)


class DataSpec(_Strict):
    """Where the study files are and how their samples map to time (and frequency)."""

    trials: str = Field(description="trials table (CSV), one row per epoch, column 'subject' required")
    subjects: str | None = Field(None, description="subjects table (CSV): 'subject' plus between-subject variables")
    channels: str = Field(description="sensors table (tab-separated): 'name', optional x, y, z")
    epochs: str = Field(description="path pattern of the per-subject epoch arrays, containing '{subject}'")
    # strict: a TOML true or "100" is a mistake, not a number; finite: inf/nan would give no time axis.
    time_start: float = Field(strict=True, allow_inf_nan=False, description="time of the first sample, seconds")
    sampling_rate: float = Field(gt=0, strict=True, allow_inf_nan=False, description="samples per second (Hz)")
    frequencies: list[float] | None = Field(None, description="frequencies (Hz) of 4-D epoch arrays")
    neighbours: str | None = Field(None, description="neighbour table (CSV: channel, neighbour); default: "
                                   "from sensor positions")

    @field_validator("epochs")
    @classmethod
    def _has_placeholder(cls, v: str) -> str:
        if "{subject}" not in v:
            raise ValueError("must contain the placeholder {subject}, e.g. 'epochs/{subject}.npy'")
        try:
            fields = [(f, spec, conv) for _, f, spec, conv in string.Formatter().parse(v) if f is not None]
        except ValueError:
            fields = None  # unbalanced braces
        if fields is None or any(f != ("subject", "", None) for f in fields):
            raise ValueError("must contain '{subject}' and no other braces, e.g. 'epochs/{subject}.npy'")
        return v

    @field_validator("frequencies")
    @classmethod
    def _frequencies_ok(cls, v: list[float] | None) -> list[float] | None:
        if v is not None:
            if not v:
                raise ValueError("must not be empty (leave it out for channel x time data)")
            if any(not math.isfinite(f) or f < 0 for f in v) or any(b <= a for a, b in zip(v, v[1:])):
                raise ValueError("must be non-negative and strictly increasing")
        return v


class _ModelSpec(_Strict):
    formula: str
    levels: dict[str, list[str]] = Field(default_factory=dict, max_length=MAX_LEVELS,
                                         description="level order per factor; the first is the reference")

    @field_validator("levels")
    @classmethod
    def _levels_ok(cls, v: dict[str, list[str]]) -> dict[str, list[str]]:
        for k, lv in v.items():
            if len(lv) > MAX_LEVELS:
                raise ValueError(f"factor '{k}' lists {len(lv)} levels; at most {MAX_LEVELS} are allowed")
            if len(lv) < 2:
                raise ValueError(f"factor '{k}' needs at least two levels, got {lv}")
            if len(set(lv)) != len(lv):
                raise ValueError(f"factor '{k}' lists a level twice: {lv}")
        return v


class SubjectModelSpec(_ModelSpec):
    """Single-trial model fitted in every subject (right-hand side of a patsy formula)."""

    robust: Literal["huber", "bisquare"] | None = Field(
        None, description="M-estimation instead of least squares (iteratively reweighted)")
    robust_tuning: float | None = Field(None, gt=0, le=100, allow_inf_nan=False,
                                        description="tuning constant; default 1.345 (huber), 4.685 (bisquare)")
    robust_max_iterations: int | None = Field(None, ge=1, le=10_000)
    robust_tolerance: float | None = Field(None, gt=0, lt=1)
    robust_convergence: Literal["standardized-residuals", "relative-residuals"] | None = Field(
        None, description="stopping rule of the iterations (default standardized-residuals)")
    robust_scale_constant: float | None = Field(
        None, ge=0.5, le=1, allow_inf_nan=False,
        description="divisor of the median absolute residual (default 0.67449, the normal quantile)")
    trial_weights: str | None = Field(None, description="trials-table column of non-negative trial weights")

    @model_validator(mode="after")
    def _robust_keys(self) -> "SubjectModelSpec":
        for key in ("robust_tuning", "robust_max_iterations", "robust_tolerance",
                    "robust_convergence", "robust_scale_constant"):
            if getattr(self, key) is not None and self.robust is None:
                raise ValueError(f"{key} applies only with robust = huber | bisquare")
        return self


class GroupModelSpec(_ModelSpec):
    """Between-subject model fitted on the subjects' contrast estimates."""

    formula: str = "1"


class TestSpec(_Strict):
    """One question asked of the data."""

    name: str = Field(description="name of the test; becomes a folder name in the output")
    subject_contrast: Contrast = Field(description="contrast of subject-level columns; a list = joint F")
    group_contrast: Contrast = Field("Intercept", description="contrast of group-level columns; a list = joint F")
    group_formula: str | None = Field(None, description="group formula of this test; default: [group_model].formula")
    correction: CorrectionName = "fdr"

    @field_validator("correction", mode="before")
    @classmethod
    def _current_correction(cls, v):
        return current_correction_name(v) if isinstance(v, str) else v
    alpha: float = Field(0.05, gt=0, lt=1)
    alternative: Alternative = "two-sided"
    confidence_level: float = Field(0.95, gt=0, lt=1, description="level of the effect-size intervals")
    group_method: Literal["glm", "trimmed", "welch"] = Field(
        "glm", description="group GLM; trimmed means (one sample / Yuen); Welch's unequal variances")
    trim: float | None = Field(None, ge=0, lt=0.5,
                               description=f"share trimmed per tail (default {defaults.TRIM:g})")
    bootstrap: int = Field(0, ge=0, le=1_000_000, description="bootstrap resamples for intervals of the "
                           "group estimate (0: none; 100 at least)")
    bootstrap_method: Literal["bca", "percentile"] = "bca"
    permutations: int | None = Field(None, ge=1, le=10_000_000,
                                     description=f"resamplings for max-statistic / cluster / tfce (default {defaults.PERMUTATIONS})")
    seed: int | None = Field(None, ge=0, le=2**63 - 1, description="seed of the resamplings")
    resampling: Literal["auto", "sign-flip", "permute"] | None = Field(
        None, description="sign-flip or permute subjects; default: chosen from the design")
    cluster_threshold: float | None = Field(None, gt=0, allow_inf_nan=False,
                                            description="cluster-forming threshold on |t| or F")
    cluster_statistic: Literal["mass", "extent"] | None = None
    tfce_extent_exponent: float | None = Field(None, gt=0, le=10, allow_inf_nan=False)
    tfce_height_exponent: float | None = Field(None, gt=0, le=10, allow_inf_nan=False)

    @model_validator(mode="after")
    def _keys_match_correction(self) -> "TestSpec":
        families = {"permutation": (_PERMUTATION_KEYS, PERMUTATION_CORRECTIONS),
                    "cluster": (_CLUSTER_KEYS, ("cluster",)), "tfce": (_TFCE_KEYS, ("tfce",))}
        if 0 < self.bootstrap < 100:
            raise ValueError(f"bootstrap needs at least 100 resamples (or 0 for none); got {self.bootstrap}")
        if self.trim is not None and self.group_method != "trimmed":
            raise ValueError("trim applies to group_method = trimmed only")
        for keys, allowed in families.values():
            for key in keys:
                if key == "seed" and self.bootstrap:
                    continue  # the seed also drives the bootstrap
                if getattr(self, key) is not None and self.correction not in allowed:
                    raise ValueError(f"{key} applies to correction = {' | '.join(allowed)}, not "
                                     f"{self.correction!r}")
        return self

    @property
    def trim_used(self) -> float:
        """The share trimmed per tail by ``group_method = "trimmed"``: ``trim``, or the default
        (:data:`glmeeg.defaults.TRIM`, read now)."""
        return defaults.TRIM if self.trim is None else self.trim

    @field_validator("name")
    @classmethod
    def _safe_name(cls, v: str) -> str:
        # fullmatch: a final newline must not pass as the end of the name.
        if not _SAFE_NAME.fullmatch(v) or v in (".", ".."):
            raise ValueError("must be 1-100 letters, digits, '.', '_' or '-', starting with a letter "
                             "or digit (it becomes a folder name)")
        if v.lower() == "subject-fits":
            raise ValueError(f"{v!r} is the folder of the cached subject fits; choose another name")
        if v.lower() in RESERVED_NAMES:
            raise ValueError(f"{v!r} is the name of a file of the result folder; choose another name")
        return v

    @field_validator("subject_contrast", "group_contrast")
    @classmethod
    def _non_empty(cls, v: Contrast) -> Contrast:
        if isinstance(v, str) and not v.strip():
            raise ValueError("must not be empty")
        if isinstance(v, list) and not v:
            raise ValueError("must not be an empty list")
        return v


class DesignSpec(_Strict):
    """A whole design file."""

    data: DataSpec
    subject_model: SubjectModelSpec
    group_model: GroupModelSpec = GroupModelSpec()
    test: list[TestSpec] = Field(min_length=1, max_length=MAX_TESTS, description="one or more [[test]] tables")

    @field_validator("test")
    @classmethod
    def _unique_tests(cls, v: list[TestSpec]) -> list[TestSpec]:
        # Case-insensitively: the names become folder names on case-insensitive file systems too.
        names = [t.name.lower() for t in v]
        dupes = sorted({n for n in names if names.count(n) > 1})
        if dupes:
            raise ValueError(f"test names must be unique (case-insensitively); repeated: {', '.join(dupes)}")
        return v


def _location(loc: tuple) -> str:
    out = ""
    for part in loc:
        if isinstance(part, int):
            out += f"[{part}]"
        elif part in ("str", "list[float]", "list[union[str,list[float]]]") or "[" in str(part):
            continue  # union branch names add nothing for the user
        else:
            out += ("." if out else "") + str(part)
    return out or "(top level)"


def _one_line(err: ValidationError, source: str) -> str:
    e = err.errors()[0]
    loc = _location(e["loc"])
    msg = e["msg"].removeprefix("Value error, ")
    if e["type"] == "extra_forbidden":
        return f"{source}: unknown key '{loc}'"
    if e["type"] == "missing":
        return f"{source}: missing required key '{loc}'"
    got = e.get("input")
    tables = isinstance(got, dict) or (isinstance(got, list) and any(isinstance(g, dict) for g in got))
    shown = "" if tables else f" (got {got!r})"
    if len(shown) > 80:
        shown = shown[:77] + "...)"
    return f"{source}: {loc}: {msg}{shown}"


def parse_design(data: dict, *, source: str = "design") -> DesignSpec:
    """Validate a design already read into a dict; errors name ``source`` and the key."""
    try:
        return DesignSpec.model_validate(data)
    except ValidationError as err:
        raise DesignFileError(_one_line(err, source)) from None


def load_design(path: str | Path) -> DesignSpec:
    """Read and validate a TOML design file.

    Parameters
    ----------
    path : str or Path
        The design file. Paths inside it are relative to its folder.

    Returns
    -------
    DesignSpec

    Raises
    ------
    DesignFileError
        The file is missing, is not valid UTF-8 TOML, or breaks the schema (unknown key, wrong
        type, value out of range). The message is one line naming the file and the key.
    """
    path = Path(path)
    try:
        with open(path, "rb") as fh:
            raw = fh.read(MAX_DESIGN_BYTES + 1)
        text = raw.decode("utf-8")
    except FileNotFoundError:
        raise DesignFileError(f"{path}: design file not found") from None
    except IsADirectoryError:
        raise DesignFileError(f"{path}: is a folder, expected a TOML design file") from None
    except UnicodeDecodeError as e:
        raise DesignFileError(f"{path}: not UTF-8 text (byte {e.start})") from None
    except OSError as e:
        raise DesignFileError(f"{path}: cannot be read ({e.strerror or e})") from None
    if len(raw) > MAX_DESIGN_BYTES:
        raise DesignFileError(f"{path}: larger than {MAX_DESIGN_BYTES // 2**10} KiB; a design file "
                              "is a short text")
    _check_toml_cost(text, str(path))
    try:
        data = tomllib.loads(text)
    except tomllib.TOMLDecodeError as e:
        raise DesignFileError(f"{path}: not valid TOML: {e}") from None
    except RecursionError:
        raise DesignFileError(f"{path}: arrays or tables are nested too deeply") from None
    return parse_design(data, source=str(path))
