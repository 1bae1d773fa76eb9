"""The methods paragraph states every setting that changes a result."""

from __future__ import annotations

import pytest

import glmeeg
from glmeeg.testing import write_study
from glmeeg.report.methods import methods_paragraph

# One base design; each case below changes one setting that changes the result.
BASE_TEST = '''
[[test]]
name = "t1"
subject_contrast = "condition[T.b]"
group_contrast = "Intercept"
correction = "cluster"
permutations = 200
seed = 3
alpha = 0.05
'''
GROUP_TEST = '''
[[test]]
name = "t1"
subject_contrast = "condition[T.b]"
group_formula = "group"
group_contrast = "group[T.y]"
correction = "holm"
'''

# (what changes, subject-model line added, test text)
CASES = [
    ("subject formula", None, BASE_TEST, "condition"),
    ("robust norm", 'robust = "huber"', BASE_TEST, None),
    ("robust norm bisquare", 'robust = "bisquare"', BASE_TEST, None),
    ("robust tuning", 'robust = "huber"\nrobust_tuning = 2.0', BASE_TEST, None),
    ("robust tolerance", 'robust = "huber"\nrobust_tolerance = 1e-5', BASE_TEST, None),
    ("robust iterations", 'robust = "huber"\nrobust_max_iterations = 7', BASE_TEST, None),
    ("robust stopping rule", 'robust = "huber"\nrobust_convergence = "relative-residuals"', BASE_TEST, None),
    ("robust scale constant", 'robust = "huber"\nrobust_scale_constant = 0.6745', BASE_TEST, None),
    ("trial weights", 'trial_weights = "rt"', BASE_TEST, None),
    ("reference level", None, BASE_TEST, "levels"),
    ("alpha", None, BASE_TEST.replace("alpha = 0.05", "alpha = 0.01"), None),
    ("alternative", None, BASE_TEST + 'alternative = "greater"\n', None),
    ("permutations", None, BASE_TEST.replace("permutations = 200", "permutations = 300"), None),
    ("seed", None, BASE_TEST.replace("seed = 3", "seed = 4"), None),
    ("cluster threshold", None, BASE_TEST + "cluster_threshold = 3.0\n", None),
    ("cluster statistic", None, BASE_TEST + 'cluster_statistic = "extent"\n', None),
    ("correction max", None, BASE_TEST.replace('"cluster"', '"max-statistic"'), None),
    ("correction tfce", None, BASE_TEST.replace('"cluster"', '"tfce"'), None),
    ("tfce extent", None, BASE_TEST.replace('"cluster"', '"tfce"') + "tfce_extent_exponent = 1.0\n", None),
    ("tfce height", None, BASE_TEST.replace('"cluster"', '"tfce"') + "tfce_height_exponent = 1.0\n", None),
    ("correction holm", None, BASE_TEST.replace('"cluster"', '"holm"').replace("permutations = 200\nseed = 3\n", ""), None),
    ("correction fdr", None, BASE_TEST.replace('"cluster"', '"fdr"').replace("permutations = 200\nseed = 3\n", ""), None),
    ("confidence level", None, BASE_TEST + "confidence_level = 0.9\n", None),
    ("bootstrap", None, BASE_TEST + "bootstrap = 200\n", None),
    ("bootstrap method", None, BASE_TEST + 'bootstrap = 200\nbootstrap_method = "percentile"\n', None),
    ("trimmed group test", None, BASE_TEST + 'group_method = "trimmed"\n', None),
    ("trim", None, BASE_TEST + 'group_method = "trimmed"\ntrim = 0.1\n', None),
    ("contrast", None, BASE_TEST.replace("condition[T.b]", "condition[T.c]"), None),
    ("group model", None, GROUP_TEST, None),
    ("welch", None, GROUP_TEST + 'group_method = "welch"\n', None),
]


def _paragraph(tmp_path, name, subject_extra, tests, change):
    formula = "condition" if change == "condition" else "condition + intensity"
    design = write_study(tmp_path / name.replace(" ", "_"), n_subjects=12, n_channels=4, n_times=8,
                         seed=2, effect=1.0, formula=formula, tests=tests)
    text = design.read_text()
    if subject_extra:
        text = text.replace('levels = { condition = ["a", "b", "c"] }',
                            'levels = { condition = ["a", "b", "c"] }\n' + subject_extra)
    if change == "levels":
        text = text.replace('["a", "b", "c"]', '["b", "a", "c"]')
        text = text.replace("condition[T.b]", "condition[T.a]")
    design.write_text(text)
    return methods_paragraph(glmeeg.run_analysis(design))


@pytest.fixture(scope="module")
def base(tmp_path_factory):
    return _paragraph(tmp_path_factory.mktemp("base"), "base", None, BASE_TEST, None)


def test_base_paragraph_states_the_main_settings(base):
    for fragment in ("glmeeg", "NumPy", "ordinary least squares", "condition[T.b]", "200 random",
                     "seed 3", "sign-flipping", "alpha = 0.05", "two-sided", "cluster-forming",
                     "95 % confidence", "reference level 'a'", "12 participants"):
        assert fragment in base, fragment


@pytest.mark.parametrize("name, subject_extra, tests, change", CASES, ids=[c[0] for c in CASES])
@pytest.mark.slow  # 30 runs
def test_every_setting_that_changes_the_result_changes_the_paragraph(tmp_path, base, name,
                                                                     subject_extra, tests, change):
    assert _paragraph(tmp_path, name, subject_extra, tests, change) != base
