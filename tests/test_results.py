"""Result objects: lossless save/load, immutability, tidy tables, xarray export, 4-D maps."""

from __future__ import annotations

import json

import numpy as np
import pandas as pd
import pytest
from pydantic import ValidationError
from typer.testing import CliRunner

import glmeeg
from glmeeg.testing import write_study
from glmeeg.cli import app
from glmeeg.results.models import _ARRAYS, _OPTIONAL_ARRAYS

# Every array a result may hold; the optional ones are None for some corrections.
ALL_ARRAYS = _ARRAYS + _OPTIONAL_ARRAYS

TESTS = """\
[[test]]
name = "b-vs-a"
subject_contrast = "condition[T.b]"
correction = "holm"

[[test]]
name = "condition"
subject_contrast = ["condition[T.b]", "condition[T.c]"]

[[test]]
name = "group-and-age"
subject_contrast = "intensity"
group_formula = "group + age"
group_contrast = ["group[T.y]", "age"]
correction = "none"
"""


@pytest.fixture(scope="module")
def run(tmp_path_factory) -> glmeeg.RunResult:
    design = write_study(tmp_path_factory.mktemp("res") / "study", n_subjects=9, n_trials=18,
                         n_channels=3, n_times=6, seed=5, effect=1.0, tests=TESTS)
    return glmeeg.run_analysis(design)


@pytest.fixture(scope="module")
def run_tf(tmp_path_factory) -> tuple[glmeeg.RunResult, object]:
    """A channel x frequency x time study run through the CLI."""
    root = tmp_path_factory.mktemp("tf")
    design = write_study(root / "study", n_subjects=8, n_trials=15, n_channels=3, n_times=5,
                         n_freqs=3, seed=9, effect=1.0, tests=TESTS)
    out = root / "out"
    result = CliRunner().invoke(app, ["run", str(design), "--out", str(out), "-q"])
    assert result.exit_code == 0, result.output
    return glmeeg.run_analysis(design), out


def same_bits(a: np.ndarray | None, b: np.ndarray | None) -> bool:
    # Compares bytes, so NaNs at the same places count as equal and -0.0 != 0.0.
    if a is None or b is None:
        return a is None and b is None
    return a.dtype == b.dtype and a.shape == b.shape and a.tobytes() == b.tobytes()


def test_save_load_round_trip_is_lossless(run, tmp_path):
    out = glmeeg.write_run(run, tmp_path / "out")
    loaded = glmeeg.load_test_results(out)
    assert [t.name for t in loaded] == [t.name for t in run.tests]
    for t, back in zip(run.tests, loaded):
        for field in ALL_ARRAYS:
            assert same_bits(getattr(t, field), getattr(back, field)), field
        assert back.model_dump(exclude=set(ALL_ARRAYS)) == t.model_dump(exclude=set(ALL_ARRAYS))
        assert back.axes == t.axes and back.correction == t.correction and back.spec == t.spec
        # Loading the file directly, or the folder, gives the same.
        direct = glmeeg.load_result(out / t.name / "result.npz")
        assert same_bits(direct.p_corrected, t.p_corrected)
        assert str(back) == str(t)


def test_round_trip_keeps_nan(run, tmp_path):
    t = run.test("b-vs-a")
    assert np.isnan(t.standard_error).sum() == 0  # a t test has standard errors everywhere
    f = run.test("condition")
    assert np.isnan(f.standard_error).all()       # and an F test none: NaN must survive saving
    f.save(tmp_path / "f")
    assert same_bits(glmeeg.load_result(tmp_path / "f").standard_error, f.standard_error)


def test_arrays_are_read_only(run, tmp_path):
    t = run.test("b-vs-a")
    t.save(tmp_path / "t")
    for res in (t, glmeeg.load_result(tmp_path / "t")):
        for field in _ARRAYS:
            arr = getattr(res, field)
            assert not arr.flags.writeable, field
        with pytest.raises(ValueError):
            res.statistic[0] = 0.0
        with pytest.raises(ValueError):
            res.map("p")[0, 0] = 0.0


def test_models_are_frozen(run):
    t = run.test("b-vs-a")
    with pytest.raises(ValidationError):
        t.alpha = 0.5
    with pytest.raises(ValidationError):
        t.statistic = np.zeros_like(t.statistic)
    with pytest.raises(ValidationError):
        run.tests = ()
    with pytest.raises(ValidationError):
        t.axes.channels = ("X",)
    with pytest.raises(ValidationError):
        t.provenance.created = "yesterday"


def test_constructing_a_result_copies_the_input_array(run):
    t = run.test("b-vs-a")
    stat = np.array(t.statistic)  # writeable copy
    copy = t.model_copy(update={})
    rebuilt = type(t).model_validate({**t.model_dump(exclude=set(ALL_ARRAYS)),
                                      **{f: getattr(t, f) for f in ALL_ARRAYS}, "statistic": stat})
    stat[0] = 123.0
    assert rebuilt.statistic[0] != 123.0 and not rebuilt.statistic.flags.writeable
    assert same_bits(copy.statistic, t.statistic)


def test_to_frame_one_row_per_point_with_labels(run):
    for t in run.tests:
        frame = t.to_frame()
        labels = t.axes.point_labels()
        assert len(frame) == t.axes.n_points == len(labels)
        pd.testing.assert_frame_equal(frame[list(labels.columns)], labels)
        # Flat order is the map order: row i of the frame is point i of every map.
        np.testing.assert_array_equal(frame["statistic"].to_numpy().reshape(t.axes.shape), t.map("statistic"))
        ch, ti = np.unravel_index(7, t.axes.shape)
        assert frame.loc[7, "channel"] == t.axes.channels[ch] and frame.loc[7, "time"] == t.axes.times[ti]


def test_t_frame_columns(run):
    frame = run.test("b-vs-a").to_frame()
    assert list(frame.columns) == ["channel", "time", "estimate", "standard_error", "statistic", "p",
                                   "p_corrected", "significant", "effect_size", "effect_size_low",
                                   "effect_size_high", "effect_size_corrected", "effect_size_label",
                                   "residual_skewness", "residual_kurtosis", "normality_p"]
    np.testing.assert_array_equal(frame["estimate"], run.test("b-vs-a").estimate[0])


@pytest.mark.parametrize(("name", "labels"), [
    ("condition", ["condition[T.b]", "condition[T.c]"]),
    ("group-and-age", ["group[T.y]", "age"]),
])
def test_f_frame_has_one_estimate_column_per_contrast(run, name, labels):
    t = run.test(name)
    assert t.kind == "F"
    frame = t.to_frame()
    assert frame["estimate"].isna().all()
    for i, lab in enumerate(labels):
        np.testing.assert_array_equal(frame[f"estimate: {lab}"].to_numpy(), t.estimate[i])
    assert len([c for c in frame.columns if c.startswith("estimate: ")]) == len(labels)


def test_to_xarray_channel_time(run):
    pytest.importorskip("xarray")
    t = run.test("condition")
    ds = t.to_xarray()
    assert ds["statistic"].dims == ("channel", "time")
    assert ds["estimate"].dims == ("contrast", "channel", "time")
    assert list(ds["channel"].values) == list(t.axes.channels)
    np.testing.assert_array_equal(ds["time"].values, t.axes.times)
    assert list(ds["contrast"].values) == list(t.estimate_labels)
    np.testing.assert_array_equal(ds["p"].values, t.map("p"))
    assert ds.attrs["kind"] == "F" and ds.attrs["test"] == "condition"


@pytest.mark.slow  # a 4-D study run twice, once with its report
def test_four_d_study_end_to_end(run_tf):
    run, out = run_tf
    t = run.test("b-vs-a")
    assert t.axes.dims == ("channel", "frequency", "time")
    assert t.axes.frequencies == (4.0, 6.0, 8.0)
    assert t.map("statistic").shape == (3, 3, 5)
    assert t.map("estimate").shape == (1, 3, 3, 5)
    for name in ("b-vs-a", "condition", "group-and-age"):
        points = pd.read_csv(out / name / "points.csv")
        assert list(points.columns[:3]) == ["channel", "frequency", "time"]
        assert len(points) == 3 * 3 * 5
        assert sorted(points["frequency"].unique()) == [4.0, 6.0, 8.0]
        json.loads((out / name / "summary.json").read_text())
    back = glmeeg.load_result(out / "b-vs-a")
    assert back.axes == t.axes
    assert same_bits(back.statistic, t.statistic)  # the CLI run and the API run agree bit for bit
    frame = t.to_frame()
    pd.testing.assert_frame_equal(frame[["channel", "frequency", "time"]], t.axes.point_labels())


@pytest.mark.slow  # a 4-D study run twice, once with its report
def test_to_xarray_four_d(run_tf):
    pytest.importorskip("xarray")
    run, _ = run_tf
    ds = run.test("b-vs-a").to_xarray()
    assert ds["statistic"].dims == ("channel", "frequency", "time")
    assert ds["estimate"].dims == ("contrast", "channel", "frequency", "time")
    np.testing.assert_array_equal(ds["frequency"].values, [4.0, 6.0, 8.0])
    assert ds["effect_size"].shape == (3, 3, 5)


def test_load_errors_are_glmeeg_errors(tmp_path):
    with pytest.raises(glmeeg.GlmeegError, match="no saved glmeeg result"):
        glmeeg.load_result(tmp_path)
    (tmp_path / "result.npz").write_bytes(b"not a zip")
    with pytest.raises(glmeeg.GlmeegError, match="not a glmeeg result file"):
        glmeeg.load_result(tmp_path)


def test_the_old_names_of_the_run_loaders_still_work_with_a_deprecation_warning(tmp_path):
    """load_run (the tests of a folder) and load_run_result (the whole run) were renamed."""
    import glmeeg
    from glmeeg.results import load_run_result

    design = write_study(tmp_path / "study", n_subjects=6, n_trials=12, n_channels=2, n_times=4)
    out = tmp_path / "out"
    glmeeg.write_run(glmeeg.run_analysis(design), out)
    with pytest.warns(DeprecationWarning, match="load_test_results"):
        old = glmeeg.load_run(out)
    assert [t.name for t in old] == [t.name for t in glmeeg.load_test_results(out)]
    with pytest.warns(DeprecationWarning, match="load_run_folder"):
        whole = load_run_result(out)
    assert whole.tests[0].statistic.tobytes() == glmeeg.load_run_folder(out).tests[0].statistic.tobytes()
