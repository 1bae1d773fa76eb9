"""Every bad input gets one line on stderr, exit code 2, no traceback and nothing written.

Each case writes a small valid study with :func:`glmeeg.testing.write_study`, breaks one thing, runs
``glmeeg run`` in-process and checks the whole contract: exit code 2, nothing on stdout, exactly
one non-empty line on stderr starting with ``error:`` that names what is wrong and where, no
traceback, no output folder and no partial folder beside it.
"""

from __future__ import annotations

import io
import json
import re
import shutil
import warnings
from pathlib import Path
from types import SimpleNamespace

import numpy as np
import pandas as pd
import pytest
from typer.testing import CliRunner

from glmeeg.cli import app
from glmeeg.testing import (DEFAULT_TESTS, SMALL_STUDY, assert_one_line_error, run_glmeeg,
                            write_study)

# SMALL_STUDY (6 subjects x 12 trials x 3 channels x 5 times) is small enough that the whole
# corpus runs in seconds.

# --- mutation helpers ------------------------------------------------------------------------

def edit_design(design: Path, old: str, new: str) -> None:
    text = design.read_text()
    assert old in text, f"test bug: {old!r} not in the design file"
    design.write_text(text.replace(old, new, 1))


def read_trials(root: Path) -> pd.DataFrame:
    return pd.read_csv(root / "trials.csv", dtype={"subject": str})


def edit_trials(root: Path, fn) -> None:
    fn(read_trials(root)).to_csv(root / "trials.csv", index=False)


def load_epochs(root: Path, subject: str) -> np.ndarray:
    return np.load(root / "epochs" / f"{subject}.npy")


def save_epochs(root: Path, subject: str, arr: np.ndarray, **kw) -> None:
    np.save(root / "epochs" / f"{subject}.npy", arr, **kw)


def tblock(body: str, name: str = "b-vs-a") -> str:
    return f'[[test]]\nname = "{name}"\n{body}\n'


# --- the mutations ---------------------------------------------------------------------------
# Each is called as mutate(root, design) after write_study(root, **SMALL_STUDY, **study_kwargs).

def _unlink(path):
    return lambda root, design: (root / path).unlink()


def _set_value(col, subject, row_in_subject, value):
    def fn(df):
        idx = df.index[df["subject"] == subject][row_in_subject]
        df[col] = df[col].astype(object)
        df.loc[idx, col] = value
        return df
    return lambda root, design: edit_trials(root, fn)


def _epochs(subject, transform, **kw):
    return lambda root, design: save_epochs(root, subject, transform(load_epochs(root, subject)), **kw)


def _level_absent(root, design):
    # s02 never sees condition c: its c trials become a.
    edit_trials(root, lambda df: df.assign(condition=np.where(
        (df["subject"] == "s02") & (df["condition"] == "c"), "a", df["condition"])))


def _constant_in_subject(root, design):
    edit_trials(root, lambda df: df.assign(intensity=np.where(df["subject"] == "s03", 50.0,
                                                              df["intensity"])))


def _intensity_missing_in_s02(root, design):
    edit_trials(root, lambda df: df.assign(intensity=np.where(df["subject"] == "s02", np.nan,
                                                              df["intensity"])))


def _semicolons(root, design):
    read_trials(root).to_csv(root / "trials.csv", sep=";", index=False)


def _latin1(root, design):
    text = (root / "trials.csv").read_text().replace(",a,", ",\u00e9,", 1)
    (root / "trials.csv").write_bytes(text.encode("latin-1"))


def _no_subject_column(root, design):
    edit_trials(root, lambda df: df.rename(columns={"subject": "participant"}))


def _header_only(root, design):
    (root / "trials.csv").write_text("subject,epoch,condition,intensity,rt\n")


def _channels_commas(root, design):
    (root / "channels.tsv").write_text("name,x,y\nFz,0,1\nCz,0,0\nPz,0,-1\n")


def _channels_duplicate(root, design):
    (root / "channels.tsv").write_text("name\nFz\nCz\nFz\n")


def _subjects_duplicate(root, design):
    sub = pd.read_csv(root / "subjects.csv", dtype={"subject": str})
    pd.concat([sub, sub.iloc[[1]]]).to_csv(root / "subjects.csv", index=False)


def _subject_not_listed(root, design):
    sub = pd.read_csv(root / "subjects.csv", dtype={"subject": str})
    sub[sub["subject"] != "s03"].to_csv(root / "subjects.csv", index=False)


def _drop_last_epoch(root, design):
    save_epochs(root, "s02", load_epochs(root, "s02")[:-1])


def _repeat_epoch(root, design):
    def fn(df):
        rows = df.index[df["subject"] == "s04"]
        df.loc[rows[5], "epoch"] = df.loc[rows[4], "epoch"]
        return df
    edit_trials(root, fn)


def _npz_archive(root, design):
    buf = io.BytesIO()
    np.savez(buf, a=np.zeros(3))
    (root / "epochs" / "s01.npy").write_bytes(buf.getvalue())


def _nan(value):
    def fn(arr):
        arr = arr.copy()
        arr[7, 2, 3] = value
        return arr
    return fn


def _object_array(root, design):
    arr = np.empty((12, 3, 5), dtype=object)
    arr[...] = 0.5
    save_epochs(root, "s01", arr, allow_pickle=True)


def _drop_frequencies(root, design):
    text = design.read_text()
    assert "frequencies" in text
    design.write_text(re.sub(r"(?m)^frequencies = .*$", "", text))


def _add_constant_column(root, design):
    edit_trials(root, lambda df: df.assign(gain=1.0))
    edit_design(design, 'formula = "condition + intensity"', 'formula = "condition + gain"')


def _formula(new):
    return lambda root, design: edit_design(design, 'formula = "condition + intensity"',
                                            f"formula = {new}")


def _tests(body):
    return lambda root, design: edit_design(design, DEFAULT_TESTS, body)


def _prepend(line):
    return lambda root, design: design.write_text(line + "\n" + design.read_text())


def _write_design(content: bytes):
    return lambda root, design: design.write_bytes(content)


_CASES = [
    # --- the design file --------------------------------------------------------------------
    ("design-missing", lambda root, design: design.unlink(), ["design.toml", "not found"], {}),
    ("design-is-folder", lambda root, design: (design.unlink(), design.mkdir()),
     ["design.toml", "folder"], {}),
    ("design-not-toml", _write_design(b"[data\ntrials = trials.csv\n"), ["design.toml", "TOML"], {}),
    ("design-not-utf8", _write_design("# caf\u00e9\n".encode("latin-1")), ["design.toml", "UTF-8"], {}),
    ("unknown-key-top", _prepend("verbose = true"), ["design.toml", "unknown key 'verbose'"], {}),
    ("unknown-key-data", None, ["unknown key 'data.sample_rate'"], dict(extra_data="sample_rate = 100.0")),
    ("unknown-key-test", _tests(tblock('subject_contrast = "condition[T.b]"\ncorection = "holm"')),
     ["unknown key 'test[0].corection'"], {}),
    ("mistyped-key", lambda root, design: edit_design(design, "time_start = -0.1", 'time_start = "soon"'),
     ["data.time_start", "number"], {}),
    ("missing-key", lambda root, design: edit_design(design, 'channels = "channels.tsv"\n', ""),
     ["missing required key 'data.channels'"], {}),
    ("missing-tests", _tests(""), ["missing required key 'test'"], {}),
    ("zero-sampling-rate", lambda root, design: edit_design(design, "sampling_rate = 100.0", "sampling_rate = 0"),
     ["data.sampling_rate", "greater than 0"], {}),
    ("infinite-sampling-rate",
     lambda root, design: edit_design(design, "sampling_rate = 100.0", "sampling_rate = inf"),
     ["data.sampling_rate", "finite"], {}),
    ("nan-time-start", lambda root, design: edit_design(design, "time_start = -0.1", "time_start = nan"),
     ["data.time_start", "finite"], {}),
    ("boolean-time-start", lambda root, design: edit_design(design, "time_start = -0.1", "time_start = true"),
     ["data.time_start", "number"], {}),
    ("negative-sampling-rate",
     lambda root, design: edit_design(design, "sampling_rate = 100.0", "sampling_rate = -250.0"),
     ["data.sampling_rate", "-250"], {}),
    ("epochs-without-placeholder",
     lambda root, design: edit_design(design, '"epochs/{subject}.npy"', '"epochs/s01.npy"'),
     ["data.epochs", "{subject}"], {}),
    ("epochs-pattern-other-field",
     lambda root, design: edit_design(design, '"epochs/{subject}.npy"', '"epochs/{subject}_{run}.npy"'),
     ["data.epochs", "no other braces"], {}),
    ("epochs-pattern-unbalanced",
     lambda root, design: edit_design(design, '"epochs/{subject}.npy"', '"epochs/{subject}}.npy"'),
     ["data.epochs", "no other braces"], {}),
    ("frequencies-decreasing", None, ["data.frequencies", "increasing"],
     dict(n_freqs=3, extra_data="frequencies = [8.0, 6.0, 4.0]")),
    ("test-name-slash", _tests(tblock('subject_contrast = "condition[T.b]"', "b/../a")),
     ["test[0].name", "folder name"], {}),
    ("test-name-cache-folder", _tests(tblock('subject_contrast = "condition[T.b]"', "subject-fits")),
     ["test[0].name", "cached subject fits"], {}),
    ("test-name-dotdot", _tests(tblock('subject_contrast = "condition[T.b]"', "..")),
     ["test[0].name", "'..'"], {}),
    ("test-name-run-json", _tests(tblock('subject_contrast = "condition[T.b]"', "run.json")),
     ["test[0].name", "'run.json'", "file of the result folder"], {}),
    ("test-name-report-any-case", _tests(tblock('subject_contrast = "condition[T.b]"', "Report.HTML")),
     ["test[0].name", "'Report.HTML'", "file of the result folder"], {}),
    ("test-name-cache-any-case", _tests(tblock('subject_contrast = "condition[T.b]"', "Subject-Fits")),
     ["test[0].name", "cached subject fits"], {}),
    ("test-name-trailing-newline", _tests(tblock('subject_contrast = "condition[T.b]"', "b-vs-a\\n")),
     ["test[0].name", "folder name"], {}),
    ("permutations-as-text", _tests(tblock('subject_contrast = "condition[T.b]"\ncorrection = "max-statistic"\n'
                                           'permutations = "200"')),
     ["test[0].permutations", "integer", "'200'"], {}),
    ("alpha-as-text", _tests(tblock('subject_contrast = "condition[T.b]"\nalpha = "0.05"')),
     ["test[0].alpha", "number", "'0.05'"], {}),
    ("permutations-as-float", _tests(tblock('subject_contrast = "condition[T.b]"\ncorrection = "max-statistic"\n'
                                            'permutations = 200.0')),
     ["test[0].permutations", "integer"], {}),
    ("duplicate-test-names", _tests(tblock('subject_contrast = "condition[T.b]"', "b-vs-a")
                                    + tblock('subject_contrast = "condition[T.c]"', "B-vs-A")),
     ["unique", "b-vs-a"], {}),
    ("unknown-correction", _tests(tblock('subject_contrast = "condition[T.b]"\ncorrection = "bonferoni"')),
     ["test[0].correction", "bonferoni"], {}),
    ("alpha-one", _tests(tblock('subject_contrast = "condition[T.b]"\nalpha = 1.0')),
     ["test[0].alpha", "less than 1"], {}),
    ("alpha-zero", _tests(tblock('subject_contrast = "condition[T.b]"\nalpha = 0')),
     ["test[0].alpha", "greater than 0"], {}),
    ("alpha-negative", _tests(tblock('subject_contrast = "condition[T.b]"\nalpha = -0.05')),
     ["test[0].alpha"], {}),
    ("empty-contrast", _tests(tblock('subject_contrast = " "')), ["test[0].subject_contrast", "empty"], {}),
    # --- tables -----------------------------------------------------------------------------
    ("trials-missing", _unlink("trials.csv"), ["trials.csv", "not found"], {}),
    ("trials-empty", lambda root, design: (root / "trials.csv").write_text(""), ["trials.csv", "empty"], {}),
    ("trials-is-folder",
     lambda root, design: edit_design(design, 'trials = "trials.csv"', 'trials = "epochs"'),
     ["epochs", "is a folder"], {}),
    ("trials-ragged-row",
     lambda root, design: (root / "trials.csv").write_text((root / "trials.csv").read_text()
                                                           + "s01,3,a,50,0.5,EXTRA\n"),
     ["trials.csv", "line 74"], {}),
    ("trials-header-only", _header_only, ["trials.csv", "no rows"], {}),
    ("trials-no-subject-column", _no_subject_column, ["trials.csv", "'subject'"], {}),
    ("trials-semicolons", _semicolons, ["trials.csv", "semicolons"], {}),
    ("trials-not-utf8", _latin1, ["trials.csv", "UTF-8"], {}),
    ("trials-empty-subject-id", _set_value("subject", "s02", 3, ""), ["trials.csv row", "empty subject"], {}),
    ("trials-unsafe-subject-id", _set_value("subject", "s02", 3, "../evil"), ["trials.csv", "'../evil'"], {}),
    ("subjects-missing", _unlink("subjects.csv"), ["subjects.csv", "not found"], {}),
    ("subjects-duplicate", _subjects_duplicate, ["subjects.csv", "s02", "more than once"], {}),
    ("subject-not-in-subjects", _subject_not_listed, ["subject s03", "subjects.csv"], {}),
    ("channels-commas", _channels_commas, ["channels.tsv", "commas", "tab-separated"], {}),
    ("channels-duplicate", _channels_duplicate, ["channels.tsv", "channel Fz", "more than once"], {}),
    ("channels-empty-name",
     lambda root, design: (root / "channels.tsv").write_text("name\tx\nFz\t0\n\t1\nPz\t2\n"),
     ["channels.tsv row 3", "empty channel name"], {}),
    ("channels-missing", _unlink("channels.tsv"), ["channels.tsv", "not found"], {}),
    # --- epoch arrays -----------------------------------------------------------------------
    ("epoch-file-missing", _unlink("epochs/s04.npy"), ["subject s04", "epochs/s04.npy", "not found"], {}),
    ("epoch-file-corrupt", lambda root, design: (root / "epochs" / "s02.npy").write_bytes(b"\x93NUMPY garbage"),
     ["subject s02", "epochs/s02.npy", "NumPy"], {}),
    ("epoch-file-npz", _npz_archive,
     ["subject s01", "epochs/s01.npy"], {}),
    ("wrong-channel-count", _epochs("s01", lambda a: a[:, :2]), ["subject s01", "2 channels", "channels.tsv"], {}),
    ("wrong-channel-count-later", _epochs("s05", lambda a: a[:, :2]), ["subject s05", "shape"], {}),
    ("wrong-epoch-count", _drop_last_epoch, ["subject s02", "11 epochs", "12 rows"],
     dict(with_epoch_column=False)),
    ("epoch-out-of-range", _set_value("epoch", "s03", 2, 999), ["subject s03", "epoch 999", "12 epochs"], {}),
    ("epoch-negative", _set_value("epoch", "s03", 2, -1), ["trials.csv row", "-1"], {}),
    ("epoch-fractional", _set_value("epoch", "s03", 2, 1.5), ["trials.csv row", "1.5"], {}),
    ("epoch-repeated", _repeat_epoch, ["subject s04", "more than once"], {}),
    ("nan-in-data", _epochs("s03", _nan(np.nan)), ["subject s03", "NaN", "epoch(s) 7"], {}),
    ("inf-in-data", _epochs("s01", _nan(np.inf)), ["subject s01", "Inf", "epoch(s) 7"], {}),
    ("two-d-array", _epochs("s02", lambda a: a[:, :, 0]), ["subject s02", "2 dimensions"], {}),
    ("five-d-array", _epochs("s02", lambda a: a[:, :, None, None, :]), ["subject s02", "5 dimensions"], {}),
    ("npy-version-3", lambda root, design: (root / "epochs" / "s02.npy").write_bytes(
        b"\x93NUMPY\x03\x00" + (2**31).to_bytes(4, "little") + b" " * 100),
     ["subject s02", "format version 3.0"], {}),
    ("object-array", _object_array, ["subject s01", "epochs/s01.npy", "objects"], {}),
    ("int64-array", _epochs("s02", lambda a: (a * 10).astype(np.int64)), ["subject s02", "int64", "float"], {}),
    ("float16-array", _epochs("s02", lambda a: a.astype(np.float16)), ["subject s02", "float16"], {}),
    ("zero-time-samples", lambda root, design: [
        save_epochs(root, f"s0{i}", load_epochs(root, f"s0{i}")[..., :0]) for i in range(1, 7)],
     ["subject s01", "(12, 3, 0)"], {}),
    ("time-length-differs", _epochs("s04", lambda a: a[..., :4]), ["subject s04", "shape", "s01"], {}),
    ("four-d-without-frequencies", _drop_frequencies, ["subject s01", "4-D", "data.frequencies"],
     dict(n_freqs=3)),
    ("frequencies-length-mismatch", None, ["subject s01", "3 frequencies", "data.frequencies lists 2"],
     dict(n_freqs=3, extra_data="frequencies = [4.0, 6.0]\n")),
    ("three-d-with-frequencies", None, ["subject s01", "3-D", "data.frequencies"],
     dict(extra_data="frequencies = [4.0, 6.0]\n")),
    # --- formulas ---------------------------------------------------------------------------
    ("formula-unknown-column", _formula('"condition + loudness"'), ["'loudness'", "trials.csv"], {}),
    ("formula-left-hand-side", _formula('"rt ~ condition"'), ["subject_model.formula", "left-hand side"], {}),
    ("formula-syntax", _formula('"condition + + * intensity"'), ["subject_model.formula"], {}),
    ("formula-import", _formula("\"__import__('os').system('touch X')\""), ["subject_model.formula"], {}),
    ("formula-open", _formula("\"open('x')\""), ["subject_model.formula", "open"], {}),
    ("formula-attribute", _formula('"np.log(intensity)"'), ["subject_model.formula", "attribute"], {}),
    ("formula-dunder", _formula('"condition + __builtins__"'), ["subject_model.formula", "__builtins__"], {}),
    ("formula-lambda", _formula("\"I((lambda: 1)())\""), ["subject_model.formula", "lambda"], {}),
    ("formula-no-columns", _formula('"0"'), ["subject_model.formula", "no design columns"], {}),
    ("formula-division-by-zero", _formula('"condition + I(intensity / 0)"'),
     ["I(intensity / 0)", "infinite"], {}),
    ("formula-log-of-negative", _formula('"condition + log(intensity - 1000)"'),
     ["subject_model.formula", "trials.csv", "non-positive"], {}),
    ("formula-coding-as-text", _formula("\"C(condition, 'abc')\""), ["subject_model.formula", "coding"], {}),
    ("formula-numeric-where", _formula('"condition + log(intensity, where=rt)"'),
     ["subject_model.formula", "log", "one argument"], {}),
    ("formula-numeric-out", _formula('"condition + sqrt(intensity, rt)"'),
     ["subject_model.formula", "sqrt", "one argument"], {}),
    ("formula-bs-degree", _formula('"condition + bs(intensity, df=6, degree=40)"'),
     ["subject_model.formula", "degree"], {}),
    ("levels-unknown-column",
     lambda root, design: edit_design(design, "condition = [", "colour = [\"red\", \"blue\"], condition = ["),
     ["subject_model.levels", "'colour'"], {}),
    ("levels-miss-a-value",
     lambda root, design: edit_design(design, '["a", "b", "c"]', '["a", "b", "d"]'),
     ["trials.csv", "'condition'", "'c'"], {}),
    ("factor-level-absent-in-subject", _level_absent, ["subject s02", "'c'", "'condition'"], {}),
    ("collinear-design", _formula('"intensity + I(2*intensity)"'), ["rank deficient", "intensity"], {}),
    ("constant-column", _add_constant_column, ["gain", "constant"], {}),
    ("constant-in-one-subject", _constant_in_subject, ["subject s03", "intensity", "constant"], {}),
    ("all-rows-missing-in-subject", _intensity_missing_in_s02,
     ["subject s02", "no usable rows", "intensity"], {}),
    # --- contrasts and tests ----------------------------------------------------------------
    ("contrast-unknown-column", _tests(tblock('subject_contrast = "condition[T.d]"')),
     ["test 'b-vs-a'", "subject_contrast", "condition[T.d]"], {}),
    ("contrast-wrong-length", _tests(tblock("subject_contrast = [0, 1]")),
     ["subject_contrast", "2 weights", "4 columns"], {}),
    ("contrast-all-zero", _tests(tblock("subject_contrast = [0, 0, 0, 0]")),
     ["subject_contrast", "zero weights"], {}),
    ("contrast-nonzero-rhs", _tests(tblock('subject_contrast = "condition[T.b] = 1"')),
     ["subject_contrast", "right-hand side"], {}),
    ("joint-contrast-dependent",
     _tests(tblock('subject_contrast = ["condition[T.b]", "condition[T.c]", '
                       '"condition[T.b] - condition[T.c]"]')),
     ["subject_contrast", "linearly dependent"], {}),
    ("group-contrast-unknown", _tests(tblock('subject_contrast = "condition[T.b]"\n'
                                                 'group_contrast = "group[T.y]"')),
     ["group_contrast", "group[T.y]"], {}),
    ("group-formula-unknown-column", _tests(tblock('subject_contrast = "condition[T.b]"\n'
                                                       'group_formula = "handedness"')),
     ["group formula", "'handedness'", "subjects.csv"], {}),
    ("too-few-subjects", _tests(tblock('subject_contrast = "condition[T.b]"\n'
                                           'group_formula = "group + age"')),
     ["test 'b-vs-a'", "3 subjects", "3 column"], dict(n_subjects=3)),
    ("joint-test-two-group-contrasts",
     _tests(tblock('subject_contrast = ["condition[T.b]", "condition[T.c]"]\n'
                       'group_formula = "group"\ngroup_contrast = ["Intercept", "group[T.y]"]')),
     ["test 'b-vs-a'", "one group contrast"], {}),
    ("greater-on-f-test", _tests(tblock('subject_contrast = ["condition[T.b]", "condition[T.c]"]\n'
                                            'alternative = "greater"')),
     ["test 'b-vs-a'", "'greater'", "F test"], {}),
    ("unknown-alternative", _tests(tblock('subject_contrast = "condition[T.b]"\nalternative = "bigger"')),
     ["test[0].alternative", "bigger"], {}),
]

assert len(_CASES) >= 30


def _params():
    return [pytest.param(mutate, fragments, kwargs, id=case_id)
            for case_id, mutate, fragments, kwargs in _CASES]


@pytest.mark.parametrize(("mutate", "fragments", "kwargs"), _params())
def test_bad_input_is_one_line_exit_2_nothing_written(tmp_path, monkeypatch, mutate, fragments, kwargs):
    monkeypatch.chdir(tmp_path)  # a formula that escaped would 'touch X' here
    root = tmp_path / "study"
    design = write_study(root, **{**SMALL_STUDY, **kwargs})
    if mutate is not None:
        mutate(root, design)
    out = tmp_path / "results" / "run1"
    with warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always")
        result = CliRunner().invoke(app, ["run", str(design), "--out", str(out)])
    assert_one_line_error(result, fragments)
    # Outside pytest a warning is printed on stderr and breaks the one-line promise.
    assert [str(w.message) for w in caught] == []
    assert not out.exists()
    assert not (tmp_path / "results").exists()
    assert not (tmp_path / "X").exists()


def test_check_reports_the_same_error(tmp_path):
    root = tmp_path / "study"
    design = write_study(root, **SMALL_STUDY)
    save_epochs(root, "s05", load_epochs(root, "s05")[:, :2])
    result = CliRunner().invoke(app, ["check", str(design)])
    assert_one_line_error(result, ["subject s05", "shape"])


def test_output_folder_with_other_files_is_refused_and_untouched(tmp_path):
    design = write_study(tmp_path / "study", **SMALL_STUDY)
    out = tmp_path / "thesis"
    out.mkdir()
    (out / "chapter1.txt").write_bytes(b"do not lose me\n")
    (out / "figures").mkdir()
    (out / "figures" / "f1.svg").write_bytes(b"<svg/>")
    before = {p.relative_to(out): p.read_bytes() for p in out.rglob("*") if p.is_file()}
    result = CliRunner().invoke(app, ["run", str(design), "--out", str(out)])
    assert_one_line_error(result, [str(out), "files glmeeg did not write", "chapter1.txt", "figures/"])
    after = {p.relative_to(out): p.read_bytes() for p in out.rglob("*") if p.is_file()}
    assert after == before
    assert sorted(p.name for p in out.iterdir()) == ["chapter1.txt", "figures"]
    assert [p.name for p in tmp_path.iterdir() if p.name.startswith(".")] == []


def test_output_path_that_is_a_file_is_refused(tmp_path):
    design = write_study(tmp_path / "study", **SMALL_STUDY)
    out = tmp_path / "out.txt"
    out.write_bytes(b"keep")
    result = CliRunner().invoke(app, ["run", str(design), "--out", str(out)])
    assert_one_line_error(result, [str(out), "not a folder"])
    assert out.read_bytes() == b"keep"


def test_output_path_below_a_file_is_refused_before_fitting(tmp_path):
    design = write_study(tmp_path / "study", **SMALL_STUDY)
    (tmp_path / "notes.txt").write_bytes(b"keep")
    out = tmp_path / "notes.txt" / "run1"
    result = CliRunner().invoke(app, ["run", str(design), "--out", str(out)])
    assert_one_line_error(result, [str(out), "notes.txt is a file"])
    assert (tmp_path / "notes.txt").read_bytes() == b"keep"


def test_progress_does_not_glue_onto_the_error_line(tmp_path):
    """A data error found after some subjects were fitted is still one clean line."""
    root = tmp_path / "study"
    design = write_study(root, **SMALL_STUDY)
    save_epochs(root, "s06", _nan(np.nan)(load_epochs(root, "s06")))
    out = tmp_path / "out"
    result = CliRunner().invoke(app, ["run", str(design), "--out", str(out)])
    assert_one_line_error(result, ["subject s06", "NaN"])
    assert not out.exists()


def test_error_on_a_terminal_starts_a_clean_line(tmp_path, monkeypatch):
    """On a terminal the progress bars are stopped first, so the error is what stays visible."""
    import glmeeg.cli.commands as cli

    monkeypatch.setattr(cli, "sys", SimpleNamespace(stderr=SimpleNamespace(isatty=lambda: True)))
    root = tmp_path / "study"
    design = write_study(root, **SMALL_STUDY)
    save_epochs(root, "s04", _nan(np.nan)(load_epochs(root, "s04")))
    result = CliRunner().invoke(app, ["run", str(design), "--out", str(tmp_path / "out")])
    assert result.exit_code == 2
    assert "fitting subjects" in result.stderr and "3/6" in result.stderr  # the bar got to s03
    # The bar is stopped first: the error is a line of its own, the last one.
    *before, last, end = result.stderr.split("\n")
    visible = re.sub(r"\x1b\[[0-9;?]*[A-Za-z]", "", last)  # terminal control codes print nothing
    assert end == "" and visible.startswith("error: subject s04: ") and "\r" not in visible
    assert not (tmp_path / "out").exists()


@pytest.mark.parametrize("args", [["show", "{tmp}"], ["show", "{tmp}/nowhere"]])
def test_show_on_a_non_result_is_one_line(tmp_path, args):
    (tmp_path / "notes.txt").write_text("x")
    result = CliRunner().invoke(app, [a.format(tmp=tmp_path) for a in args])
    assert_one_line_error(result, ["not a glmeeg result folder"])


@pytest.mark.parametrize("value", [
    pytest.param(np.nan, id="nan"),
    pytest.param(np.inf, id="inf"),
])
@pytest.mark.slow  # a real glmeeg process
def test_real_process_stderr_is_one_line(tmp_path, value):
    """Outside the test runner: warnings and progress reach the real stderr too."""
    root = tmp_path / "study"
    design = write_study(root, **SMALL_STUDY)
    save_epochs(root, "s04", _nan(value)(load_epochs(root, "s04")))
    out = tmp_path / "out"
    proc = run_glmeeg("run", design, "--out", out, cwd=tmp_path)
    assert proc.returncode == 2, proc.stderr
    assert proc.stdout == ""
    assert proc.stderr.count("\n") == 1 and proc.stderr.startswith("error: subject s04: "), proc.stderr
    assert not out.exists()


# --- saved results that cannot be shown ------------------------------------------------------

@pytest.fixture(scope="module")
def saved_run(tmp_path_factory) -> Path:
    root = tmp_path_factory.mktemp("saved")
    design = write_study(root / "study", **SMALL_STUDY)
    result = CliRunner().invoke(app, ["run", str(design), "--out", str(root / "out"), "-q"])
    assert result.exit_code == 0, result.output
    return root / "out"


def _rewrite_npz(**changes):
    def mutate(folder: Path) -> None:
        path = folder / "b-vs-a" / "result.npz"
        with np.load(path) as z:
            arrays = dict(z)
        arrays.update(changes)
        with open(path, "wb") as fh:
            np.savez(fh, **arrays)
    return mutate


def _bad_kind(folder: Path) -> None:
    path = folder / "b-vs-a" / "result.npz"
    with np.load(path) as z:
        arrays = dict(z)
    meta = json.loads(str(arrays["meta"]))
    meta["kind"] = "Z"
    arrays["meta"] = np.array(json.dumps(meta))
    with open(path, "wb") as fh:
        np.savez(fh, **arrays)


def _compressed_npz(folder: Path) -> None:
    """The same arrays, deflated: glmeeg stores its members uncompressed, so a deflated member
    (a bomb, say) is refused before anything is inflated."""
    path = folder / "b-vs-a" / "result.npz"
    with np.load(path) as z:
        arrays = dict(z)
    with open(path, "wb") as fh:
        np.savez_compressed(fh, **arrays)


def _write(rel: str, content: bytes):
    return lambda folder: (folder / rel).write_bytes(content)


@pytest.mark.parametrize(("mutate", "fragments"), [
    pytest.param(_write("b-vs-a/result.npz", b"PK\x03\x04garbage"), ["result.npz", "not a glmeeg result"],
                 id="npz-bad-zip"),
    pytest.param(_write("b-vs-a/result.npz", b""), ["result.npz", "not a glmeeg result"], id="npz-empty"),
    pytest.param(_rewrite_npz(meta=np.array("{nope")), ["result.npz", "not a glmeeg result"], id="meta-not-json"),
    pytest.param(_bad_kind, ["result.npz", "kind"], id="meta-invalid"),
    pytest.param(_write("run.json", b"[1, 2]"), ["run.json", "unreadable run summary"], id="run-json-list"),
    pytest.param(_write("run.json", json.dumps({"tests": ["../../elsewhere"]}).encode()),
                 ["run.json", "test folder names"], id="run-json-escapes"),
    pytest.param(_write("run.json", b"\xff\xfe{"), ["run.json", "unreadable"], id="run-json-not-utf8"),
    pytest.param(lambda folder: shutil.rmtree(folder / "b-vs-a"), ["b-vs-a", "no saved glmeeg result"],
                 id="test-folder-missing"),
    pytest.param(_rewrite_npz(statistic=np.zeros(3)), ["result.npz", "statistic has shape (3,)"],
                 id="npz-map-truncated"),
    pytest.param(_rewrite_npz(meta=np.array("[" * 100_000 + "]" * 100_000)), ["result.npz", "not a glmeeg result"],
                 id="meta-deeply-nested"),
    pytest.param(_compressed_npz, ["result.npz", "compressed"], id="npz-compressed"),
    pytest.param(_write("run.json", b"[" * 200_000 + b"]" * 200_000), ["run.json", "unreadable"],
                 id="run-json-deeply-nested"),
])
def test_show_on_a_damaged_result_is_one_line(saved_run, tmp_path, mutate, fragments):
    folder = tmp_path / "copy"
    shutil.copytree(saved_run, folder)
    mutate(folder)
    result = CliRunner().invoke(app, ["show", str(folder)])
    assert_one_line_error(result, fragments)


def test_an_unknown_scheduler_protocol_is_one_line(tmp_path):
    design = write_study(tmp_path / "study", **SMALL_STUDY)
    result = CliRunner().invoke(app, ["run", str(design), "--out", str(tmp_path / "out"),
                                      "--scheduler", "foo://x"])
    assert_one_line_error(result, ["--scheduler foo://x", "unknown protocol"])
    assert not (tmp_path / "out").exists()
