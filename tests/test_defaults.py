"""Defaults are defined once (glmeeg.defaults) and every reader follows a change made there."""

from __future__ import annotations

import numpy as np
import pytest

import glmeeg
from glmeeg import defaults
from glmeeg.report.methods import methods_paragraph
from glmeeg.testing import write_study

TRIMMED = """\
[[test]]
name = "trimmed"
subject_contrast = "condition[T.b]"
group_method = "trimmed"
correction = "holm"
"""


def test_a_changed_trim_default_is_used_and_reported(tmp_path, monkeypatch):
    design = write_study(tmp_path / "study", n_subjects=10, n_trials=12, n_channels=2, n_times=4,
                         tests=TRIMMED)
    before = glmeeg.run_analysis(design)
    assert "20 % trimmed means" in methods_paragraph(before)
    monkeypatch.setattr(defaults, "TRIM", 0.1)
    after = glmeeg.run_analysis(design)
    text = methods_paragraph(after)
    assert "10 % trimmed means" in text and "20 %" not in text
    assert "10 % trimmed means" in str(after.tests[0])
    # The statistic follows too: a 10 % trimmed t of 10 subjects trims one per tail, 20 % two.
    from glmeeg.group_level.robust import trimmed_test

    t = after.tests[0]
    again = trimmed_test(t.subject_estimates[:, 0], t.group_design, t.group_contrast, trim=0.1)
    assert np.array_equal(again.statistic, t.statistic)
    assert not np.array_equal(before.tests[0].statistic, t.statistic)


@pytest.mark.parametrize("name, value, text", [
    ("ROBUST_MAX_ITERATIONS", 7, "after at most 7 steps"),
    ("ROBUST_TOLERANCE", 1e-5, "by more than 1e-05"),
])
def test_a_changed_robust_default_is_used_and_reported(tmp_path, monkeypatch, name, value, text):
    design = write_study(tmp_path / "study", n_subjects=6, n_trials=15, n_channels=2, n_times=4)
    design.write_text(design.read_text().replace('formula = "condition + intensity"',
                                                 'formula = "condition + intensity"\nrobust = "huber"'))
    monkeypatch.setattr(defaults, name, value)
    run = glmeeg.run_analysis(design)
    assert text in methods_paragraph(run)
    if name == "ROBUST_MAX_ITERATIONS":
        assert max(s.robust_iterations_max for s in run.subjects) <= value


def test_a_changed_tuning_default_reaches_the_fit():
    """fit_robust without a tuning constant takes the default of glmeeg.defaults at call time."""
    rng = np.random.default_rng(3)
    X = np.column_stack([np.ones(60), rng.normal(size=60)])
    Y = X @ [[1.0], [2.0]] + rng.standard_t(2, size=(60, 5))
    base = glmeeg.fit_robust(X, Y, norm="huber")
    given = glmeeg.fit_robust(X, Y, norm="huber", tuning=2.5)
    saved = defaults.ROBUST_TUNING["huber"]
    try:
        defaults.ROBUST_TUNING["huber"] = 2.5
        changed = glmeeg.fit_robust(X, Y, norm="huber")
    finally:
        defaults.ROBUST_TUNING["huber"] = saved
    assert changed.tuning == 2.5 and np.array_equal(changed.betas, given.betas)
    assert not np.array_equal(base.betas, changed.betas)


def test_the_old_correction_name_max_is_read_with_a_deprecation_note(tmp_path):
    """`correction = "max"` (glmeeg 0.1) is now "max-statistic": accepted for one release with a
    note on the command line; results saved under the old name still load."""
    from typer.testing import CliRunner

    from glmeeg.cli import app
    from glmeeg.inference.corrections import MaxStatistic

    test = TRIMMED.replace('group_method = "trimmed"\ncorrection = "holm"', 'correction = "max"\npermutations = 99')
    design = write_study(tmp_path / "study", n_subjects=6, n_trials=12, n_channels=2, n_times=4, tests=test)
    with pytest.warns(DeprecationWarning, match="'max' is now 'max-statistic'"):
        spec = glmeeg.load_design(design)
    assert spec.test[0].correction == "max-statistic"
    result = CliRunner().invoke(app, ["check", str(design)])
    assert result.exit_code == 0, result.output
    assert "note: correction 'max' is now 'max-statistic'" in result.stderr
    assert MaxStatistic.model_validate({"method": "max", "permutations": 99}).method == "max-statistic"
