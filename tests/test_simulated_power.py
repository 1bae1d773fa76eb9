"""Simulated power from a saved result: closed forms, the null, seeds, bad settings, the CLI.

Outside references are named beside each check: the exact power of the one- and two-sample t
tests from the noncentral t distribution (``scipy.stats.nct``; Cohen, 1988, ch. 2), the
binomial distribution (``scipy.stats.binom``) for Monte-Carlo tolerances, and the Wilson
interval of ``statsmodels.stats.proportion.proportion_confint``.
"""

from __future__ import annotations

import json
import math

import numpy as np
import pandas as pd
import pytest
import scipy.stats
from statsmodels.stats.proportion import proportion_confint
from typer.testing import CliRunner

import glmeeg
from glmeeg.testing import write_study
from glmeeg.axes import Axes
from glmeeg.cli import app
from glmeeg.errors import ModelError
from glmeeg.group_level import group_test
from glmeeg.inference.corrections import (PERMUTATION_METHODS, ClusterMass, Holm, MaxStatistic,
                                          NoCorrection, adjust_p)
from glmeeg.inference.permutation import permutation_test
from glmeeg import results, spec
from glmeeg.results import provenance
from glmeeg.planning.simulated import simulate_power


def pilot_from_arrays(Y, G, L, *, channels=("Cz",), n_times=1, correction=NoCorrection(),
                      group_columns=None) -> results.TestResult:
    """A saved-test object built straight from arrays (as test_group would build it)."""
    Y = np.asarray(Y, dtype=np.float64)
    Y = Y[:, None, :] if Y.ndim == 2 else Y
    G, L = np.asarray(G, dtype=np.float64), np.atleast_2d(np.asarray(L, dtype=np.float64))
    n, k, P = Y.shape
    stats = group_test(Y, G, L)
    if correction.method in PERMUTATION_METHODS:
        p_corrected = permutation_test(Y, G, L, kind=stats.kind, df=stats.df, correction=correction).p_corrected
    else:
        p_corrected = adjust_p(stats.p, correction)
    labels = [f"c{i}" for i in range(k)]
    test_spec = spec.TestSpec(name="pilot", subject_contrast=labels if k > 1 else labels[0],
                              correction=correction.method)
    return results.TestResult(
        name="pilot", spec=test_spec, kind=stats.kind,
        axes=Axes(channels=tuple(channels), times=tuple(0.01 * np.arange(n_times))),
        subjects=tuple(f"s{i:04d}" for i in range(n)), subject_columns=tuple(labels),
        subject_contrast=np.eye(k), subject_contrast_labels=tuple(labels), group_formula="(arrays)",
        group_columns=tuple(group_columns or [f"g{j}" for j in range(G.shape[1])]), group_contrast=L,
        group_contrast_labels=tuple(f"L{i}" for i in range(L.shape[0])), df=stats.df,
        alternative="two-sided", alpha=0.05, correction=correction, estimate=stats.estimate,
        estimate_labels=tuple(f"e{i}" for i in range(stats.estimate.shape[0])),
        standard_error=stats.standard_error, statistic=stats.statistic, p=stats.p, p_corrected=p_corrected,
        significant=np.nan_to_num(p_corrected, nan=1.0) <= 0.05, effect_size=stats.effect_size,
        effect_size_corrected=stats.effect_size_corrected, effect_size_name=stats.effect_size_name,
        effect_size_corrected_name=stats.effect_size_corrected_name, provenance=provenance(),
        subject_estimates=Y, group_design=G)


def exact_t_power(delta: float, df: float, alpha: float = 0.05) -> tuple[float, float]:
    """Two-sided power of a t test and its part in the direction of delta (scipy.stats.nct)."""
    crit = scipy.stats.t.isf(alpha / 2, df)
    right = scipy.stats.nct.sf(crit, df, delta)
    return right + scipy.stats.nct.cdf(-crit, df, delta), right


# --------------------------------------------------------------------------- closed forms

@pytest.mark.slow  # 2,000 simulated studies
def test_one_sample_one_point_matches_the_noncentral_t():
    # A large pilot of independent normal values: resampling its residuals is close to sampling
    # the normal distribution with the pilot's own mean and SD, so the simulated power must be
    # the exact power at the pilot's d (dz = mean / SD).
    rng = np.random.default_rng(20240601)
    pilot = pilot_from_arrays(rng.normal(0.45, 1.0, size=(4000, 1)), np.ones((4000, 1)), [[1.0]])
    d = float(pilot.effect_size[0])
    S = 2000
    sim = simulate_power(pilot, n=[10, 20], simulations=S, seed=3)
    assert sim.layout == "one-sample" and sim.correction == NoCorrection()
    for n in (10, 20):
        both, right = exact_t_power(d * math.sqrt(n), n - 1)
        # Tolerance: 4 Monte-Carlo SEs sqrt(p (1 - p) / S) (two-sided normal tail 6e-5). The
        # gap between the 4000-value empirical noise and the normal is far smaller: excess
        # kurtosis of 4000 normal values is within +-0.15 (SE sqrt(24 / 4000)), worth well
        # under 0.005 in power at these n; the random signs make the noise symmetric.
        for criterion, exact in (("any", both), ("target", right)):
            rate = sim.rate(n, criterion)
            assert rate.total_n == n and rate.simulations == S
            assert abs(rate.probability - exact) <= 4 * math.sqrt(exact * (1 - exact) / S), (n, criterion)


@pytest.mark.slow  # 1,500 simulated studies
def test_two_groups_one_point_matches_the_noncentral_t():
    # Two groups drawn n per group, each from its own pilot subjects: exact two-sample power at
    # the pilot's d (pooled SD), df 2n - 2, noncentrality d sqrt(n / 2) (Cohen, 1988, ch. 2).
    rng = np.random.default_rng(20240602)
    n0 = 3000
    group = np.repeat([0.0, 1.0], n0)
    y = rng.normal(0.0, 1.0, 2 * n0) + 0.6 * group
    G = np.column_stack([np.ones(2 * n0), group])
    pilot = pilot_from_arrays(y[:, None], G, [[0.0, 1.0]], group_columns=("Intercept", "group[T.b]"))
    d = float(pilot.effect_size[0])
    S = 1500
    sim = simulate_power(pilot, n=[12], simulations=S, seed=4)
    assert sim.layout == "groups" and sim.groups == 2
    rate = sim.rate(12)
    assert rate.total_n == 24
    exact, _ = exact_t_power(d * math.sqrt(12 / 2), 2 * 12 - 2)
    # Tolerance: 4 Monte-Carlo SEs, as above.
    assert abs(rate.probability - exact) <= 4 * math.sqrt(exact * (1 - exact) / S)


@pytest.mark.slow  # 400 simulated studies, 99 resamplings each
def test_null_effect_with_max_correction_detects_at_alpha():
    # A pilot with exactly zero mean at every point: no effect. Sign-flipped resampled noise is
    # symmetric, so the max-statistic test of each simulated study has level alpha: with
    # 99 resamplings p = (b + 1) / 100 <= 0.05 for b <= 4, probability 5 / 100 (Phipson &
    # Smyth, 2010). Detections ~ Binomial(400, 0.05); the bounds leave 0.1 % in each tail.
    rng = np.random.default_rng(20240603)
    Y = rng.standard_normal((30, 15))
    Y -= Y.mean(axis=0)
    pilot = pilot_from_arrays(Y, np.ones((30, 1)), [[1.0]], channels=("Fz", "Cz", "Pz"), n_times=5,
                              correction=MaxStatistic(permutations=99))
    assert pilot.n_significant == 0
    S = 400
    sim = simulate_power(pilot, n=[12], simulations=S, permutations=99, seed=5)
    low, high = scipy.stats.binom.ppf(0.001, S, 0.05), scipy.stats.binom.isf(0.001, S, 0.05)
    assert low <= sim.rate(12).detections <= high
    assert [r.criterion for r in sim.rates] == ["any"]          # no target without significant points
    assert any("no target region" in note for note in sim.notes)


def test_rates_carry_the_monte_carlo_error_and_the_wilson_interval():
    rng = np.random.default_rng(20240604)
    pilot = pilot_from_arrays(rng.normal(0.4, 1.0, size=(40, 1)), np.ones((40, 1)), [[1.0]])
    sim = simulate_power(pilot, n=[14], simulations=150, seed=1, confidence_level=0.9)
    for r in sim.rates:
        p = r.detections / r.simulations
        assert r.probability == p
        assert r.standard_error == pytest.approx(math.sqrt(p * (1 - p) / r.simulations), rel=1e-12)
        # statsmodels proportion_confint(method="wilson") is the same interval.
        low, high = proportion_confint(r.detections, r.simulations, alpha=0.1, method="wilson")
        assert (r.low, r.high) == pytest.approx((low, high), rel=1e-9)
    frame = sim.to_frame()
    assert list(frame.columns) == ["n", "total_n", "criterion", "detections", "simulations", "probability",
                                   "standard_error", "low", "high"]
    assert len(frame) == 2 and set(frame["criterion"]) == {"any", "target"}
    text = str(sim)
    assert "below 16" in text and "winner's curse" in text and "90 % interval" in text


# --------------------------------------------------------------------------- seeds

@pytest.fixture(scope="module")
def max_pilot() -> results.TestResult:
    rng = np.random.default_rng(20240605)
    Y = rng.standard_normal((20, 12)) + np.linspace(0.0, 0.8, 12)
    return pilot_from_arrays(Y, np.ones((20, 1)), [[1.0]], channels=("Fz", "Cz", "Pz"), n_times=4,
                             correction=MaxStatistic(permutations=99))


@pytest.mark.slow  # simulated power six times
def test_seeded_and_independent_of_the_order_of_n(max_pilot):
    a = simulate_power(max_pilot, n=[8, 14], simulations=20, permutations=99, seed=11)
    b = simulate_power(max_pilot, n=[14, 8], simulations=20, permutations=99, seed=11)
    alone = simulate_power(max_pilot, n=14, simulations=20, permutations=99, seed=11)
    assert a == simulate_power(max_pilot, n=[8, 14], simulations=20, permutations=99, seed=11)
    for n in (8, 14):
        for criterion in ("any", "target"):
            assert a.rate(n, criterion) == b.rate(n, criterion)
    assert alone.rate(14) == a.rate(14) and alone.rate(14, "target") == a.rate(14, "target")
    assert b.n == (14, 8)
    other = simulate_power(max_pilot, n=[8, 14], simulations=20, permutations=99, seed=12)
    assert [r.detections for r in other.rates] != [r.detections for r in a.rates]


# --------------------------------------------------------------------------- from the pipeline

TESTS = """\
[[test]]
name = "b-vs-a"
subject_contrast = "condition[T.b]"
correction = "holm"

[[test]]
name = "b-cluster"
subject_contrast = "condition[T.b]"
correction = "cluster"
permutations = 100
seed = 3

[[test]]
name = "group-diff"
subject_contrast = "condition[T.b]"
group_formula = "group + age"
group_contrast = "group[T.y]"
correction = "fdr"
"""


@pytest.fixture(scope="module")
def saved(tmp_path_factory):
    root = tmp_path_factory.mktemp("simulated")
    design = write_study(root / "study", n_subjects=10, n_trials=18, n_channels=3, n_times=5, seed=4,
                         effect=1.0, tests=TESTS)
    result = CliRunner().invoke(app, ["run", str(design), "--out", str(root / "out"), "-q"])
    assert result.exit_code == 0, result.output
    return design, root / "out"


def test_saved_result_holds_the_group_test_inputs(saved):
    design, out = saved
    t = glmeeg.load_result(out / "b-vs-a")
    assert t.subject_estimates.shape == (10, 1, t.axes.n_points) and t.subject_estimates.dtype == np.float64
    assert not t.subject_estimates.flags.writeable
    # One-sample group model: the group estimate is the subjects' mean, the design a column of ones.
    np.testing.assert_allclose(t.subject_estimates[:, 0].mean(axis=0), t.estimate[0], rtol=1e-12, atol=1e-14)
    np.testing.assert_array_equal(t.group_design, np.ones((10, 1)))
    g = glmeeg.load_result(out / "group-diff")
    subjects = pd.read_csv(design.parent / "subjects.csv").set_index("subject").loc[list(g.subjects)]
    np.testing.assert_array_equal(g.group_design[:, 1], (subjects["group"] == "y").to_numpy(float))
    np.testing.assert_array_equal(g.group_design[:, 2], subjects["age"].to_numpy(float))
    points = pd.read_csv(out / "b-vs-a" / "points.csv")
    assert not {"subject_estimates", "group_design"} & set(points.columns)
    old = t.model_copy(update={"subject_estimates": None, "group_design": None})
    with pytest.raises(ModelError, match="re-run the analysis with this version"):
        simulate_power(old, n=8)


def test_cluster_graph_from_names_equals_the_design_graph(saved):
    design, out = saved
    t = glmeeg.load_result(out / "b-cluster")
    default = simulate_power(t, n=[6], simulations=15, permutations=50)
    plan = glmeeg.plan_analysis(design)   # the pilot's own graph (10-10 names: no positions)
    given = simulate_power(t, n=[6], simulations=15, permutations=50, graph=plan.graph)
    assert default.rates == given.rates
    assert "rebuilt from the channel names" in default.neighbours
    assert default.correction.permutations == 50 and default.correction.threshold is None
    g = glmeeg.load_result(out / "group-diff")
    sim = simulate_power(g, n=[5, 8], simulations=10, correction=Holm())
    assert sim.layout == "groups" and [sim.rate(n).total_n for n in (5, 8)] == [10, 16]


# --------------------------------------------------------------------------- bad settings

@pytest.mark.parametrize(("settings", "fragment"), [
    ({"n": 1}, "n: expected at least 2"),
    ({"n": []}, "n: expected at least one"),
    ({"n": [8, 8]}, "listed twice"),
    ({"n": 8.5}, "n: expected a whole number"),
    ({"n": 8, "simulations": 0}, "simulations: expected at least 1"),
    ({"n": 8, "effect_scale": 0.0}, "effect_scale"),
    ({"n": 8, "effect_scale": -1.0}, "effect_scale"),
    ({"n": 8, "effect_scale": float("nan")}, "effect_scale"),
    ({"n": 8, "correction": "cluster"}, "correction: expected a settings object"),
    ({"n": 8, "correction": MaxStatistic(), "permutations": 10}, "permutations: 10 resamplings cannot"),
    ({"n": 8, "alpha": 1.5}, "alpha"),
    ({"n": 8, "seed": -1}, "seed: expected at least 0"),
    ({"n": 8, "target": np.ones(3, dtype=bool)}, "target"),
    ({"n": 8, "correction": ClusterMass(), "graph": (np.zeros(3), np.zeros(0))}, "graph"),
])
def test_bad_settings_are_model_errors(max_pilot, settings, fragment):
    with pytest.raises(ModelError, match=fragment):
        simulate_power(max_pilot, **settings)


def test_no_graph_for_channels_without_10_10_names():
    rng = np.random.default_rng(1)
    pilot = pilot_from_arrays(rng.standard_normal((8, 6)), np.ones((8, 1)), [[1.0]],
                              channels=("E1", "E2", "E3"), n_times=2)
    with pytest.raises(ModelError, match="graph: the neighbour graph cannot be rebuilt"):
        simulate_power(pilot, n=8, correction=ClusterMass())


def test_too_few_per_group_and_joint_tests():
    rng = np.random.default_rng(2)
    G = np.column_stack([np.ones(12), np.repeat([0.0, 1.0], 6)])
    pilot = pilot_from_arrays(rng.standard_normal((12, 2)), G, [[0.0, 1.0]], n_times=2)
    with pytest.raises(ModelError, match="n: expected at least 2 per group"):
        simulate_power(pilot, n=1)
    joint = pilot_from_arrays(rng.standard_normal((12, 2, 2)) + 1.0, np.ones((12, 1)), [[1.0]], n_times=2)
    assert joint.kind == "F"
    with pytest.raises(ModelError, match="n: expected at least 3"):
        simulate_power(joint, n=2)
    sim = simulate_power(joint, n=[6], simulations=20)
    assert 0.0 <= sim.rate(6).probability <= 1.0


# --------------------------------------------------------------------------- command line

def invoke(*args):
    """``glmeeg simulate-power ARGS``, or ``glmeeg power ...`` when the first argument is "power"."""
    args = [str(a) for a in args]
    return CliRunner().invoke(app, args if args[:1] == ["power"] else ["simulate-power", *args])


def test_cli_json_is_one_object(saved):
    _, out = saved
    result = invoke(out / "b-vs-a", "--n", "6,10", "--simulations", "20", "--json")
    assert result.exit_code == 0, result.output
    record = json.loads(result.stdout)
    assert record["n"] == [6, 10] and record["simulations"] == 20 and record["test"] == "b-vs-a"
    assert [(r["n"], r["criterion"]) for r in record["rates"]] == [(6, "any"), (6, "target"),
                                                                   (10, "any"), (10, "target")]
    assert record["correction"]["method"] == "holm" and record["permutations"] is None
    assert any("below 16" in note for note in record["notes"])


def test_cli_table_and_csv(saved, tmp_path):
    _, out = saved
    path = tmp_path / "power.csv"
    result = invoke(out / "b-cluster", "--n", "6,8", "--simulations", "10", "--permutations", "40",
                    "--effect-scale", "0.5", "--seed", "2", "--csv", path)
    assert result.exit_code == 0, result.output
    assert "Simulated power: test b-cluster" in result.stdout and f"table written to {path}" in result.stdout
    table = pd.read_csv(path)
    assert list(table.columns) == ["n", "total_n", "criterion", "detections", "simulations", "probability",
                                   "standard_error", "low", "high"]
    assert len(table) == 4 and (table["low"] <= table["probability"]).all()
    assert (table["probability"] <= table["high"]).all()
    assert sorted(p.name for p in tmp_path.iterdir()) == ["power.csv"]   # no temporary file left


@pytest.mark.parametrize(("args", "fragment"), [
    (["{out}", "--n", "8"], "is a run folder"),
    (["{out}/nope", "--n", "8"], "no saved glmeeg result"),
    (["{out}/b-vs-a"], "--n: give the sample sizes"),
    (["{out}/b-vs-a", "--n", "1"], "--n: expected at least 2"),
    (["{out}/b-vs-a", "--n", "a,b"], "--n: expected comma-separated"),
    (["{out}/b-vs-a", "--n", "8", "--simulations", "0"], "--simulations: expected at least 1"),
    (["{out}/b-vs-a", "--n", "8", "--effect-scale", "0"], "--effect-scale: expected"),
    (["{out}/b-vs-a", "--n", "8", "--correction", "bogus"], "--correction: unknown correction"),
    (["{out}/b-vs-a", "--n", "8", "--permutations", "100"], "--permutations: applies"),
    (["{out}/b-cluster", "--n", "8", "--permutations", "5"], "--permutations: 5 resamplings"),
    (["{out}/b-vs-a", "--n", "8", "--neighbours", "nb.csv"], "--neighbours: applies"),
    (["{out}/b-vs-a", "--n", "8", "--csv", "{out}"], "--csv:"),
    (["{out}/b-vs-a", "--n", "8", "--csv", "{out}/missing/p.csv"], "does not exist"),
    (["power", "--effect-size", "0.5", "--power", "0.8"], "--design: required"),
    (["power", "--design", "paired", "--effect-size", "0.5", "--n", "12,16"], "--n: expected a whole number"),
    (["power", "--design", "paired", "--effect-size", "-1", "--n", "12"], "--effect-size:"),
])
def test_cli_bad_input_exits_2_with_one_line(saved, args, fragment):
    _, out = saved
    result = invoke(*[a.format(out=out) for a in args])
    assert result.exit_code == 2, result.output
    assert result.stderr.startswith("error: ") and result.stderr.count("\n") == 1
    assert fragment in result.stderr
    assert result.stdout == ""
    assert not (out / "missing").exists()


def test_statistic_is_group_tests():
    # Simulated power asks the group level's one entrance for its maps, without the effect-size
    # intervals; the statistic and p must be group_test's, bit for bit (group_test is checked
    # against statsmodels in test_reference_group_level.py).
    from glmeeg.group_level import group_statistics

    rng = np.random.default_rng(3)
    Y = rng.standard_normal((14, 2, 9)) + 0.3
    G = np.column_stack([np.ones(14), np.repeat([0.0, 1.0], 7), rng.normal(40, 9, 14)])
    for Yc, L in ((Y[:, :1], [[0.0, 1.0, 0.0]]), (Y[:, :1], [[0.0, 1.0, 0.0], [0.0, 0.0, 1.0]]),
                  (Y, [[1.0, 0.0, 0.0]])):
        L = np.array(L)
        fast, full = group_statistics(Yc, G, L, intervals=False), group_test(Yc, G, L)
        assert fast.statistic.tobytes() == full.statistic.tobytes() and fast.p.tobytes() == full.p.tobytes()
        assert np.isnan(fast.effect_size_low).all() and np.isfinite(full.effect_size_low).all()
