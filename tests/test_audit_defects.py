"""Defects found by the independent audit (issue 14), each with the test that failed before its fix.

* rank-deficient designs refused by ``group_test``, ``fit_ols`` and ``permutation_test`` with one
  line naming the columns (numpy's ``matrix_rank`` rule on the conditioned design, the rule of
  ``fit_robust``; a duplicated column is rank deficient by construction);
* points without a statistic (±inf from a zero variance, a variance at rounding level) left out
  of every correction's family, never significant, never the peak (``statsmodels``'
  ``multipletests`` over the remaining points as the outside value of the adjusted p);
* the residual-checks text gives the true cause when no normality test was run (D'Agostino's
  test needs 8 values: ``scipy.stats.skewtest`` refuses fewer).
"""

from __future__ import annotations

import numpy as np
import pytest
import scipy.stats
import statsmodels.api as sm
from statsmodels.stats.multitest import multipletests

import glmeeg
from glmeeg.testing import write_study
from glmeeg.errors import ModelError
from glmeeg.group_level import group_test, p_values
from glmeeg.group_level.assumptions import NO_RESIDUAL_VARIANCE, group_checks, normality_not_tested
from glmeeg.inference.corrections import (TFCE, Bonferroni, ClusterMass, FalseDiscoveryRate, Holm,
                                          MaxStatistic, NoCorrection, adjust_p)
from glmeeg.inference.graph import graph_arrays, points_graph
from glmeeg.inference.permutation import permutation_test
from glmeeg.subject_level import fit_ols, fit_robust
from glmeeg.subject_level.ols import dependent_columns

N = 12
GROUP = np.r_[np.zeros(6), np.ones(6)]


def _one_line(e: pytest.ExceptionInfo) -> str:
    message = str(e.value)
    assert "\n" not in message
    return message


# --- 1. rank-deficient designs ------------------------------------------------------------------

def _duplicated_group_column():
    """Intercept, a group indicator and the same indicator again: rank 2 of 3 columns."""
    return np.column_stack([np.ones(N), GROUP, GROUP])


@pytest.mark.filterwarnings("ignore:The design matrix is rank-deficient")
def test_group_test_refuses_a_duplicated_group_column():
    """Before the fix: a t on n - 3 = 9 df from a model whose rank is 2 (statsmodels, which
    fits it by pseudo-inverse, gives df_resid = n - rank = 10): a number on the wrong df."""
    G = _duplicated_group_column()
    Y = np.random.default_rng(0).standard_normal((N, 5))
    # statsmodels OLS as the outside value of the rank: df_resid = n - rank.
    assert sm.OLS(Y[:, 0], G).fit().df_resid == N - 2
    with pytest.raises(ModelError) as e:
        group_test(Y, G, [[0.0, 1.0, 0.0]])
    assert _one_line(e) == ("group design of 3 columns is rank deficient (rank 2): columns 1, 2 "
                            "(counted from 0) are linearly dependent; drop or merge columns")
    with pytest.raises(ModelError) as e:
        group_test(Y, G, [[0.0, 1.0, 0.0]], column_names=["Intercept", "group[T.y]", "again"])
    assert "columns 'group[T.y]', 'again' are linearly dependent" in _one_line(e)
    from glmeeg.group_level import group_test_in_chunks
    with pytest.raises(ModelError, match="rank deficient"):
        group_test_in_chunks(Y, G, [[0.0, 1.0, 0.0]], memory_limit=1)


def test_fit_ols_refuses_a_rank_deficient_design():
    """Before the fix: betas of about ±2.6e15 on the duplicated columns."""
    G = _duplicated_group_column()
    Y = np.random.default_rng(1).standard_normal((N, 4))
    with pytest.raises(ModelError) as e:
        fit_ols(G, Y)
    assert "design of 3 columns is rank deficient (rank 2): columns 1, 2" in _one_line(e)
    with pytest.raises(ModelError) as e:
        fit_ols(G, Y, column_names=["Intercept", "x", "x again"])
    assert "columns 'x', 'x again' are linearly dependent" in _one_line(e)


def test_permutation_test_refuses_a_rank_deficient_design():
    G = _duplicated_group_column()
    Y = np.random.default_rng(2).standard_normal((N, 4))
    with pytest.raises(ModelError) as e:
        permutation_test(Y, G, [[0.0, 1.0, 0.0]], kind="t", df=(1.0, N - 3.0),
                         correction=MaxStatistic(permutations=99))
    assert "group design of 3 columns is rank deficient" in _one_line(e)


@pytest.mark.parametrize("extra, involved, text", [
    (lambda: 2.0 * np.ones(N), (0, 2), "columns 0, 2 (counted from 0) are linearly dependent"),
    (lambda: np.zeros(N), (2,), "column 2 (counted from 0) is all zero"),
    (lambda: 1.0 - GROUP, (0, 1, 2), "columns 0, 1, 2 (counted from 0) are linearly dependent"),
    (lambda: 1e6 * GROUP, (1, 2), "columns 1, 2 (counted from 0) are linearly dependent"),
])
def test_the_message_names_the_columns_of_the_dependence(extra, involved, text):
    """The columns named are those of the exact dependence built into the design (closed form:
    2 * intercept, a zero column, the complement of the indicator, the indicator rescaled)."""
    G = np.column_stack([np.ones(N), GROUP, extra()])
    assert dependent_columns(G) == (2, involved)
    with pytest.raises(ModelError) as e:
        group_test(np.random.default_rng(3).standard_normal((N, 3)), G, [[0.0, 1.0, 0.0]])
    assert text in _one_line(e)


def test_the_rank_rule_is_fit_robusts():
    """One rule: fit_robust refuses the same designs and accepts the same nearly collinear
    (full-rank) one; numpy.linalg.matrix_rank of the conditioned design is the rule."""
    rng = np.random.default_rng(4)
    Y = rng.standard_normal((N, 3))
    x = rng.standard_normal(N)
    near = np.column_stack([np.ones(N), x, x + 1e-7 * rng.standard_normal(N)])
    # numpy.linalg.matrix_rank (its default tolerance) on the raw design as the outside value.
    assert np.linalg.matrix_rank(near) == 3 and np.linalg.matrix_rank(_duplicated_group_column()) == 2
    assert dependent_columns(near) == (3, ())
    fit_ols(near, Y)
    fit_robust(near, Y, norm="huber")
    for bad in (_duplicated_group_column(), np.column_stack([np.ones(N), GROUP, np.zeros(N)])):
        with pytest.raises(ModelError, match="rank deficient"):
            fit_ols(bad, Y)
        with pytest.raises(ModelError, match="rank deficient"):
            fit_robust(bad, Y, norm="huber")


def test_designs_with_nan_or_names_of_the_wrong_length_are_one_line():
    G = np.column_stack([np.ones(N), GROUP])
    Y = np.random.default_rng(5).standard_normal((N, 3))
    bad = G.copy()
    bad[3, 1] = np.nan
    with pytest.raises(ModelError) as e:
        group_test(Y, bad, [[0.0, 1.0]], column_names=["Intercept", "group"])
    assert _one_line(e) == "group design column(s) 'group' hold NaN or infinite values"
    with pytest.raises(ModelError) as e:
        fit_ols(G, Y, column_names=["Intercept"])
    assert _one_line(e) == "1 column names for the 2 columns of the design"


def test_the_pipeline_keeps_its_own_message_naming_the_columns(tmp_path):
    """A group formula whose columns are collinear is refused at planning, by the formula
    layer's message with the column names (unchanged)."""
    tests = ('[[test]]\nname = "dup"\nsubject_contrast = "condition[T.b]"\n'
             'group_formula = "age + I(2 * age)"\ngroup_contrast = "age"\ncorrection = "holm"\n')
    design = write_study(tmp_path / "s", n_subjects=8, n_trials=9, n_channels=2, n_times=3, tests=tests)
    with pytest.raises(glmeeg.GlmeegError) as e:
        glmeeg.plan_analysis(design)
    assert "collinear columns: age, I(2 * age)" in _one_line(e)


# --- 2. points without a statistic, under every correction -------------------------------------

def test_an_infinite_statistic_has_no_p_value():
    """Before the fix: t = ±inf gave p = 0, which Bonferroni counted in m and called
    significant. scipy.stats.t / f as the outside p of the finite entries."""
    stat = np.array([np.inf, -np.inf, 2.5, np.nan])
    p = p_values(stat, "t", (1.0, 10.0))
    assert np.isnan(p[[0, 1, 3]]).all()
    assert p[2] == 2 * scipy.stats.t.sf(2.5, 10)
    assert np.isnan(p_values(np.array([np.inf]), "F", (2.0, 10.0))).all()
    assert np.isnan(p_values(np.array([np.inf]), "t", (1.0, 10.0), alternative="greater")).all()


@pytest.mark.parametrize("correction, method", [(NoCorrection(), None), (Bonferroni(), "bonferroni"),
                                                (Holm(), "holm"), (FalseDiscoveryRate(), "fdr_bh")])
def test_an_infinite_statistic_is_left_out_of_the_family(correction, method):
    """The adjusted p of the other points are statsmodels' multipletests over them alone
    (m without the infinite points)."""
    rng = np.random.default_rng(6)
    stat = np.r_[np.inf, rng.normal(2.0, 1.5, 30), -np.inf]
    p = p_values(stat, "t", (1.0, 15.0))
    adjusted = adjust_p(p, correction)
    assert np.isnan(adjusted[[0, -1]]).all()
    ref = p[1:-1] if method is None else multipletests(p[1:-1], method=method)[1]
    np.testing.assert_allclose(adjusted[1:-1], ref, rtol=1e-12, atol=0)  # same formulas, rounding


def _map_with_points_without_a_digit(rng):
    """A two-group map: point 0 constant (zero variance, non-zero mean), point 1 an exact
    function of the design plus rounding-size noise, the rest ordinary data with effects."""
    G = np.column_stack([np.ones(N), GROUP])
    Y = rng.standard_normal((N, 40)) + np.outer(GROUP, np.linspace(0.0, 2.5, 40))
    Y[:, 0] = 3.0
    Y[:, 1] = 2.0 + 3.0 * GROUP + 1e-15 * rng.standard_normal(N)
    return Y, G


def _chain(n_points):
    s = np.zeros((1, 1))
    return graph_arrays(points_graph(s, (1, n_points)))


@pytest.mark.parametrize("correction", [NoCorrection(), Bonferroni(), Holm(), FalseDiscoveryRate(),
                                        MaxStatistic(permutations=499, seed=3),
                                        ClusterMass(permutations=499, seed=3),
                                        TFCE(permutations=499, seed=3)],
                         ids=lambda c: c.method)
def test_points_without_a_digit_are_treated_one_way_under_every_correction(correction):
    """No statistic, no p, no corrected p, never significant, whatever the correction; the
    parametric family is the other points (statsmodels' multipletests over them)."""
    Y, G = _map_with_points_without_a_digit(np.random.default_rng(7))
    g = group_test(Y, G, [[0.0, 1.0]])
    assert np.isnan(g.statistic[:2]).all() and np.isnan(g.p[:2]).all()
    assert np.isfinite(g.statistic[2:]).all()
    if correction.method in ("max-statistic", "cluster", "tfce"):
        r = permutation_test(Y, G, [[0.0, 1.0]], kind="t", df=g.df, correction=correction,
                             graph=_chain(Y.shape[1]))
        p_corr = r.p_corrected
        assert np.isnan(r.p_uncorrected[:2]).all()
    else:
        p_corr = adjust_p(g.p, correction)
        method = {"none": None, "bonferroni": "bonferroni", "holm": "holm", "fdr": "fdr_bh"}[correction.method]
        ref = g.p[2:] if method is None else multipletests(g.p[2:], method=method)[1]
        np.testing.assert_allclose(p_corr[2:], ref, rtol=1e-12, atol=0)
    assert np.isnan(p_corr[:2]).all()
    assert not (np.nan_to_num(p_corr, nan=1.0)[:2] <= 0.05).any()


def _small_run(tmp_path, **kw):
    tests = '[[test]]\nname = "b"\nsubject_contrast = "condition[T.b]"\ncorrection = "bonferroni"\n'
    design = write_study(tmp_path / "s", n_subjects=kw.pop("n_subjects", 8), n_trials=12, n_channels=2,
                         n_times=4, seed=5, tests=tests, effect=2.0)
    for f in (tmp_path / "s" / "epochs").glob("*.npy"):
        transform = kw.get("transform")
        if transform is not None:
            np.save(f, transform(np.load(f).astype(np.float64)))
    return glmeeg.run_analysis(design).test("b")


def test_a_point_with_an_infinite_statistic_is_never_the_peak(tmp_path):
    """Before the fix: the peak was the point of t = inf (p = 0), a number, not a result. A
    result of an earlier version may hold one; the peak is the largest finite |t|."""
    result = _small_run(tmp_path)
    stat, p = result.statistic.copy(), result.p.copy()
    true_peak = int(np.nanargmax(np.abs(stat)))
    other = (true_peak + 3) % stat.size
    stat[other], p[other] = -np.inf, 0.0
    edited = result.model_copy(update={"statistic": stat, "p": p})
    peak = edited.findings()["peak"]
    assert peak["statistic"] == result.statistic[true_peak]
    assert np.isfinite(peak["statistic"])


def test_simulated_power_leaves_points_without_a_digit_out_under_every_correction(tmp_path):
    """A pilot point that is an exact function of the group design (all subjects equal up to
    rounding) gives simulated studies whose t there is ~1e10 from rounding residue. Under
    Bonferroni it was significant in every simulated study, under the max statistic never.
    With the effect scaled to almost nothing, both rates are family-wise error rates: at most
    6 of 20 detections has probability below 1e-3 at a rate of 0.05 (binomial, scipy.stats)."""
    from glmeeg.planning import simulate_power

    pilot = _small_run(tmp_path)
    Y = np.array(pilot.subject_estimates)
    Y[:, 0, 0] = 3.0 + 1e-15 * np.random.default_rng(9).standard_normal(Y.shape[0])
    pilot = pilot.model_copy(update={"subject_estimates": Y})
    assert scipy.stats.binom.sf(5, 20, 0.05) < 1e-3
    for correction in (Bonferroni(), MaxStatistic(permutations=99)):
        sim = simulate_power(pilot, n=[8], simulations=20, correction=correction,
                             effect_scale=1e-6, seed=2)
        any_rate = next(r for r in sim.rates if r.criterion == "any")
        assert any_rate.detections <= 5, (correction.method, any_rate.detections)


# --- 3. the cause of a missing normality test ---------------------------------------------------

def test_group_checks_say_why_there_is_no_normality_test():
    """Zero (or rounding-size) residual variance at every point with 12 subjects: the cause is
    the variance, not the number of subjects. Before the fix the normality p of rounding noise
    was reported as if it were the data's."""
    G = np.column_stack([np.ones(N), GROUP])
    rng = np.random.default_rng(8)
    exact = np.outer(2.0 + 3.0 * GROUP, np.ones(5)) + 1e-15 * rng.standard_normal((N, 5))
    g = group_checks(exact, G, tuple(f"s{i}" for i in range(N)))
    assert np.isnan(g.normality_p).all() and np.isnan(g.share_rejected)
    assert np.isnan(g.skewness).all() and np.isnan(g.excess_kurtosis).all()
    assert g.notes == (NO_RESIDUAL_VARIANCE + ": no normality test",)
    assert normality_not_tested(12) == NO_RESIDUAL_VARIANCE
    assert normality_not_tested(7) == "fewer than 8 subjects"
    # A map with both: the usable points keep scipy's D'Agostino-Pearson p of the residuals
    # (scipy.stats.normaltest as the outside value), the exact ones get none.
    Y = np.column_stack([exact[:, :2], rng.standard_normal((N, 6))])
    g = group_checks(Y, G, tuple(f"s{i}" for i in range(N)))
    resid = Y - G @ np.linalg.lstsq(G, Y, rcond=None)[0]
    assert np.isnan(g.normality_p[:2]).all()
    np.testing.assert_allclose(g.normality_p[2:], scipy.stats.normaltest(resid[:, 2:]).pvalue,
                               rtol=1e-8)  # two least-squares fits of the same data: rounding
    assert g.share_rejected == np.mean(g.normality_p[2:] < 0.05)


def test_the_residual_checks_text_gives_the_true_cause(tmp_path):
    """Constant recordings of 8 subjects: no point has a residual variance. Before the fix the
    text said "fewer than 8 subjects"."""
    result = _small_run(tmp_path, transform=lambda a: np.full_like(a, 5.0))
    text = str(result)
    assert result.n_subjects == 8
    assert f"normality (D'Agostino-Pearson) not tested: {NO_RESIDUAL_VARIANCE};" in text
    assert "fewer than 8" not in text
    assert "have no p-value, are left out of the correction's family and are never significant" in text


def test_the_residual_checks_text_with_few_subjects(tmp_path):
    result = _small_run(tmp_path, n_subjects=6)
    assert "normality (D'Agostino-Pearson) not tested: fewer than 8 subjects;" in str(result)


def test_trial_weights_that_leave_a_condition_without_weight_are_one_line(tmp_path):
    """Zero weights on every trial of a condition leave its column without data: refused with
    the subject and the columns named (before, a LinAlgError escaped from the fit)."""
    import pandas as pd
    from typer.testing import CliRunner

    from glmeeg.cli import app

    design = write_study(tmp_path / "study", n_subjects=6, n_trials=15, n_channels=2, n_times=4)
    trials = pd.read_csv(tmp_path / "study" / "trials.csv")
    trials["w"] = np.where((trials["subject"] == "s02") & (trials["condition"] == "c"), 0.0, 1.0)
    trials.to_csv(tmp_path / "study" / "trials.csv", index=False)
    design.write_text(design.read_text().replace('formula = "condition + intensity"',
                                                 'formula = "condition + intensity"\ntrial_weights = "w"'))
    result = CliRunner().invoke(app, ["run", str(design), "--out", str(tmp_path / "out")])
    assert result.exit_code == 2, result.output
    line = result.stderr.strip()
    assert result.stderr.count("\n") == 1 and line.startswith("error: subject s02: design")
    assert "condition[T.c]" in line and "positive weight in 'w'" in line
    assert not (tmp_path / "out").exists()
