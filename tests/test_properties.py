"""Property-based tests (hypothesis): random tables, formulas, levels, contrasts and study files
never make glmeeg fail with anything but its own error type.

The promise checked here is the one the CLI relies on to turn every bad input into one line and
exit code 2: whatever the input, the formula layer and the study reader either succeed or raise
:class:`glmeeg.errors.GlmeegError` (a subclass of ValueError carrying the message). Any other
exception (a KeyError, a TypeError from pandas, a numpy warning turned error, a patsy error
leaking through) fails the test, and hypothesis prints the smallest input that triggers it.
When the reader succeeds, what it returns is checked against the input.
"""

from __future__ import annotations

import tempfile
from pathlib import Path

import numpy as np
import pandas as pd
import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from glmeeg.testing import write_study
from glmeeg.errors import GlmeegError
from glmeeg.formula import build_design, contrast_matrix, design_matrix
from glmeeg.pipeline import plan_analysis

SETTINGS = settings(max_examples=120, deadline=None, derandomize=True,
                    suppress_health_check=[HealthCheck.too_slow, HealthCheck.data_too_large])

# --- the formula layer ---------------------------------------------------------------------------

LEVELS = ["a", "b", "c", "é", "1", " "]
TERMS = ["cond", "x", "n", "C(cond)", "C(n)", "center(x)", "standardize(x)", "scale(x)", "log(x)",
         "exp(x)", "sqrt(x)", "abs(x)", "log10(x)", "I(x ** 2)", "I(x * n)", "x:cond", "cond*x",
         "C(cond, Treatment('b'))", "C(cond, Sum)", "C(cond, Poly)", "flag", "0", "1", "-1",
         "bs(x, df=3)", "Q('x')", "x + I(x / 0)", "I(-x)", "cond:n", "log(n - 3)"]
INJECTIONS = ["__import__('os').system('touch hacked')", "open('hacked', 'w')", "x.real",
              "exec('1')", "eval('1')", "globals()", "x[0]", "__builtins__", "(lambda: 1)()",
              "[c for c in x]", "getattr(x, 'real')", "Q('__builtins__')", "I(9 ** 9 ** 9)",
              "I('a' * 99999999)", "I([0] * 99999999)", "C(cond, levels=x.__class__)",
              "I(x if x else x)", "{1: 2}", "I(*x)", "C(**{})"]


def tables(min_rows: int = 0):
    """Tables with a factor, a float covariate (NaN, inf, huge values), an integer column and a
    boolean, any of them missing anywhere."""
    row = st.fixed_dictionaries({
        "cond": st.one_of(st.none(), st.sampled_from(LEVELS)),
        "x": st.one_of(st.none(), st.floats(allow_nan=True, allow_infinity=True, width=64),
                       st.floats(min_value=-10, max_value=10)),
        "n": st.one_of(st.none(), st.integers(-5, 5)),
        "flag": st.booleans(),
    })
    return st.lists(row, min_size=min_rows, max_size=25).map(
        lambda rows: pd.DataFrame(rows, columns=["cond", "x", "n", "flag"]))


formulas = st.one_of(
    st.lists(st.sampled_from(TERMS), min_size=1, max_size=4).map(" + ".join),
    st.sampled_from(INJECTIONS),
    st.text(alphabet=st.characters(codec="utf-8"), max_size=30),
    st.text(alphabet="cond x+*:-()01 CIlogQ'\",=", max_size=30),
)
level_maps = st.one_of(
    st.none(),
    st.dictionaries(st.sampled_from(["cond", "n", "nope", "x"]),
                    st.lists(st.sampled_from(LEVELS + ["0", "3", "-5"]), max_size=5, unique=True),
                    max_size=2),
)
contrasts = st.one_of(
    st.text(alphabet="cond[T.abc] -+*0123x=,I()'", max_size=30),
    st.sampled_from(["x", "Intercept", "cond[T.b]", "cond[T.b] - cond[T.c]", "x = 1",
                     "__import__('os')", "x.real", "open('f')", "cond[T.b], cond[T.c]"]),
    st.lists(st.floats(allow_nan=True, allow_infinity=True), min_size=0, max_size=6),
    st.lists(st.one_of(st.sampled_from(["x", "cond[T.b]"]),
                       st.lists(st.integers(-2, 2), min_size=1, max_size=6)), max_size=3),
)


@pytest.mark.slow  # a hypothesis search
@SETTINGS
@given(table=tables(), formula=formulas, levels=level_maps, contrast=contrasts,
       split=st.integers(0, 25))
def test_formula_layer_raises_only_its_own_errors(table, formula, levels, contrast, split):
    try:
        design = build_design(table, formula, levels=levels, source="trials.csv",
                              where="subject_model.formula")
    except GlmeegError as e:
        assert str(e) and "\n" not in str(e)
        return
    # A design was built: its columns are finite and full rank on the pooled table.
    assert design.column_names
    for part in (table.iloc[:split], table.iloc[split:]):
        try:
            X = design_matrix(design, part, who="subject s01")
        except GlmeegError as e:
            assert str(e) and "\n" not in str(e)
            continue
        assert X.matrix.shape == (int(X.kept.sum()), len(design.column_names))
        assert np.isfinite(X.matrix).all() and np.linalg.matrix_rank(X.matrix) == X.matrix.shape[1]
        assert X.condition_number >= 1.0
    try:
        C = contrast_matrix(design, contrast, where="test[0].subject_contrast")
    except GlmeegError as e:
        assert str(e) and "\n" not in str(e)
        return
    assert C.matrix.shape[1] == len(design.column_names) and np.isfinite(C.matrix).all()
    assert len(C.labels) == C.matrix.shape[0]


@pytest.mark.slow  # a hypothesis search
@SETTINGS
@given(formula=st.sampled_from(INJECTIONS), contrast=st.sampled_from(INJECTIONS))
def test_injection_strings_never_run(formula, contrast):
    """No injection string creates a file, whether given as a formula or as a contrast."""
    table = pd.DataFrame({"cond": ["a", "b", "c"] * 4, "x": np.arange(12.0), "n": [1, 2] * 6,
                          "flag": [True, False] * 6})
    with tempfile.TemporaryDirectory() as d:
        import os

        here = os.getcwd()
        os.chdir(d)
        try:
            with pytest.raises(GlmeegError):
                build_design(table, formula, source="trials.csv", where="subject_model.formula")
            design = build_design(table, "cond + x", source="trials.csv", where="f")
            with pytest.raises(GlmeegError):
                contrast_matrix(design, contrast, where="test[0].subject_contrast")
        finally:
            os.chdir(here)
        assert list(Path(d).iterdir()) == []


# --- the study reader ----------------------------------------------------------------------------

cells = st.one_of(st.none(), st.integers(-3, 40), st.floats(allow_nan=True, allow_infinity=True),
                  st.sampled_from(["a", "b", "c", "s01", "s02", "s03", "", " ", "NA", "1e400",
                                   "x;y", "é", "\t"]),
                  st.text(max_size=5))
COLUMNS = ["subject", "epoch", "condition", "intensity", "rt", "group", "age"]


def edits():
    """Changes to one column of a valid table: new values in some rows, or the column removed
    or renamed."""
    return st.tuples(st.sampled_from(COLUMNS),
                     st.one_of(st.just("drop"), st.just("rename"),
                               st.lists(st.tuples(st.integers(0, 40), cells), min_size=1, max_size=6)))


def _apply(frame: pd.DataFrame, edit) -> pd.DataFrame:
    col, what = edit
    if col not in frame.columns:
        return frame
    if what == "drop":
        return frame.drop(columns=col)
    if what == "rename":
        return frame.rename(columns={col: col.upper()})
    frame = frame.astype({col: object})
    for row, value in what:
        if row < len(frame):
            frame.iat[row, frame.columns.get_loc(col)] = value
    return frame


@pytest.mark.slow  # a hypothesis search
@SETTINGS
@given(trial_edits=st.lists(edits(), max_size=3), subject_edits=st.lists(edits(), max_size=2),
       drop_rows=st.lists(st.integers(0, 40), max_size=4),
       duplicate_rows=st.lists(st.integers(0, 40), max_size=2),
       raw=st.one_of(st.none(), st.binary(max_size=60),
                     st.text(alphabet="subject,epoch;condition\n\"a1é\t", max_size=60)))
def test_study_reader_raises_only_its_own_errors(trial_edits, subject_edits, drop_rows,
                                                 duplicate_rows, raw):
    with tempfile.TemporaryDirectory() as d:
        root = Path(d)
        design = write_study(root, n_subjects=4, n_trials=9, n_channels=2, n_times=3, seed=1)
        trials = pd.read_csv(root / "trials.csv", dtype={"subject": str})
        subjects = pd.read_csv(root / "subjects.csv", dtype={"subject": str})
        for e in trial_edits:
            trials = _apply(trials, e)
        for e in subject_edits:
            subjects = _apply(subjects, e)
        trials = trials.drop(index=[r for r in drop_rows if r in trials.index])
        dups = [r for r in duplicate_rows if r in trials.index]
        if dups:
            trials = pd.concat([trials, trials.loc[dups]])
        trials.to_csv(root / "trials.csv", index=False)
        subjects.to_csv(root / "subjects.csv", index=False)
        if raw is not None:
            target = root / "trials.csv"
            target.write_bytes(raw if isinstance(raw, bytes) else raw.encode("utf-8"))
        try:
            plan = plan_analysis(design)
        except GlmeegError as e:
            assert str(e) and "\n" not in str(e)
            return
        # Read without error: every subject has a design matching its epochs.
        study = plan.study
        assert len(study.subject_ids) >= 1 and set(plan.subject_matrices) <= set(study.subject_ids)
        for s, X in plan.subject_matrices.items():
            assert np.isfinite(X.matrix).all()
            assert X.matrix.shape == (int(X.kept.sum()), len(plan.subject_design.column_names))
            assert int(X.kept.sum()) <= study.epoch_counts[s]
