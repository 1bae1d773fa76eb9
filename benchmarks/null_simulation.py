"""Null simulation: the family-wise error rate of the permutation corrections.

Eklund, Nichols & Knutsson (2016) validate error control by analysing many datasets with no
effect and counting how often anything is declared significant. Here every dataset is a
one-sample group test (does the mean differ from 0?) of smooth noise:

* 20 subjects, the 32 channels of the demo's 10-10 cap x 100 samples (3,200 points);
* noise smooth across the scalp (correlation exp(-d^2 / 0.6^2) between sensors at chord
  distance d on the unit sphere, plus a 5 % independent share, as the demo's noise) and in
  time (Gaussian kernel, SD 3 samples), scaled to unit variance at every point;
* neighbour graph of the points from ``glmeeg.sensors.neighbours.sensor_graph`` on the standard
  positions of the channel names, times the path over samples;
* max-statistic, cluster-mass and TFCE corrections (glmeeg defaults: cluster-forming threshold
  at parametric p = 0.05 two-sided, E = 0.5, H = 2), ``--resamplings`` random sign-flips per
  dataset, each dataset with its own resampling seed, alpha = 0.05.

A dataset counts as a family-wise error when any point has a corrected p <= alpha. With
m resamplings, p = (b + 1) / (m + 1) (Phipson & Smyth, 2010); when (m + 1) * alpha is a whole
number (m = 499 (the default), 999, 1999 ...) the test is exact: the rejection rate under the null is alpha.
Other m give a rate of floor((m + 1) * alpha) / (m + 1), a little below alpha (0.0499 for
m = 500). Printed for each correction: the FWER with its exact (Clopper-Pearson) 95 %
interval, and whether it lies in the binomial 95 % acceptance interval around 0.05 for 1,000
datasets, [0.037, 0.064]; the uncorrected rate (any point with permutation p <= alpha) for
contrast.

Sign-flipping assumes errors symmetric about zero. A second simulation uses the same smooth
fields turned point-wise into centred exponential noise (skewness 2: each Gaussian value z
becomes -log(1 - Phi(z)) - 1, which keeps the smoothness) to show how the corrections behave
when that assumption fails; false positives are split by the sign of the statistic.

Run: ``python benchmarks/null_simulation.py`` (15-20 minutes on 2 cores with the defaults);
``--datasets``, ``--resamplings``, ``--skewed-datasets`` (0 skips the skewed variant).
"""

from __future__ import annotations

import argparse
import time

import numpy as np
import pandas as pd
import scipy.special
import scipy.stats
from scipy.ndimage import gaussian_filter1d

from glmeeg.group_level import group_test
from glmeeg.inference.corrections import TFCE, ClusterMass, MaxStatistic
from glmeeg.inference.graph import graph_arrays, points_graph
from glmeeg.inference.permutation import permutation_test
from glmeeg.sensors.neighbours import sensor_graph
from glmeeg.sensors import standard_positions
from glmeeg.demo.study import CHANNELS

ALPHA = 0.05
N_TIMES = 100
TIME_SD = 3.0            # samples
SPATIAL_LENGTH = 0.6     # unit sphere
NUGGET = 0.05
# Binomial 95 % acceptance interval of the FWER around 0.05 for 1,000 datasets
# (0.05 +- 1.96 sqrt(0.05 * 0.95 / 1000)).
ACCEPT = (0.037, 0.064)
METHODS = {"max": MaxStatistic, "cluster": ClusterMass, "tfce": TFCE}


def spatial_mixing() -> np.ndarray:
    """Cholesky factor of the sensors' correlation exp(-d^2 / l^2) plus a nugget."""
    pos = standard_positions(CHANNELS)
    d2 = ((pos[:, None, :] - pos[None, :, :]) ** 2).sum(-1)
    cov = (np.exp(-d2 / SPATIAL_LENGTH**2) + NUGGET * np.eye(len(CHANNELS))) / (1.0 + NUGGET)
    return np.linalg.cholesky(cov)


def time_scale() -> np.ndarray:
    """Per-sample SD of unit white noise after the temporal filter (edges differ), to undo."""
    impulse = np.zeros((N_TIMES, N_TIMES))
    impulse[np.arange(N_TIMES), np.arange(N_TIMES)] = 1.0
    k = gaussian_filter1d(impulse, TIME_SD, axis=-1, mode="nearest")   # row i: response to sample i
    return np.sqrt((k**2).sum(axis=0))


def smooth_fields(rng, n_subjects: int, mixing: np.ndarray, scale: np.ndarray) -> np.ndarray:
    """(subjects, channels, times) Gaussian noise with unit variance at every point."""
    white = rng.standard_normal((n_subjects, len(CHANNELS), N_TIMES))
    x = gaussian_filter1d(white, TIME_SD, axis=-1, mode="nearest") / scale
    return np.einsum("cd,sdt->sct", mixing, x)


def skewed(z: np.ndarray) -> np.ndarray:
    """Centred unit exponential values (mean 0, variance 1, skewness 2) from standard normal
    ones: -log(1 - Phi(z)) - 1, with log(1 - Phi(z)) = log_ndtr(-z) accurate in both tails."""
    return -scipy.special.log_ndtr(-z) - 1.0


def simulate(kind: str, n_datasets: int, n_subjects: int, resamplings: int, seed: int, graph) -> dict:
    mixing, scale = spatial_mixing(), time_scale()
    rng = np.random.default_rng(np.random.SeedSequence([seed, 0 if kind == "gaussian" else 1]))
    design, contrast = np.ones((n_subjects, 1)), np.array([[1.0]])
    df = (1.0, n_subjects - 1.0)
    hits = {m: 0 for m in (*METHODS, "uncorrected")}
    signs = {m: [0, 0] for m in hits}      # datasets with a positive / negative false positive
    t0 = time.perf_counter()
    for d in range(n_datasets):
        z = smooth_fields(rng, n_subjects, mixing, scale)
        Y = (z if kind == "gaussian" else skewed(z)).reshape(n_subjects, -1)
        t = group_test(Y, design, contrast).statistic
        for name, cls in METHODS.items():
            res = permutation_test(Y, design, contrast, kind="t", df=df,
                                   correction=cls(permutations=resamplings, seed=seed + d), graph=graph)
            rows = [(name, res.p_corrected)]
            if name == "max":
                rows.append(("uncorrected", res.p_uncorrected))
            for key, p in rows:
                sig = p <= ALPHA
                if sig.any():
                    hits[key] += 1
                    signs[key][0] += bool((t[sig] > 0).any())
                    signs[key][1] += bool((t[sig] < 0).any())
        if (d + 1) % max(1, n_datasets // 10) == 0:
            print(f"  {kind}: {d + 1}/{n_datasets} datasets, {time.perf_counter() - t0:.0f} s", flush=True)
    return {"hits": hits, "signs": signs, "n": n_datasets, "seconds": time.perf_counter() - t0}


def report(title: str, out: dict) -> None:
    n = out["n"]
    print(f"\n{title}: {n} datasets, {out['seconds']:.0f} s")
    print(f"  {'correction':<12} {'errors':>6} {'FWER':>7}   95 % interval (exact)   "
          f"in [{ACCEPT[0]}, {ACCEPT[1]}]   positive / negative")
    for m, k in out["hits"].items():
        lo, hi = scipy.stats.binomtest(k, n).proportion_ci(0.95, method="exact")
        verdict = ("meets" if ACCEPT[0] <= k / n <= ACCEPT[1] else "outside") if m != "uncorrected" else "-"
        pos, neg = out["signs"][m]
        print(f"  {m:<12} {k:>6} {k / n:7.4f}   [{lo:.4f}, {hi:.4f}]        {verdict:<8}"
              f"            {pos} / {neg}")


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    ap.add_argument("--datasets", type=int, default=1000, help="null datasets (default 1000)")
    ap.add_argument("--skewed-datasets", type=int, default=None,
                    help="datasets of skewed noise (default: as --datasets; 0 skips)")
    ap.add_argument("--resamplings", type=int, default=499,
                    help="random sign-flips per dataset (default 499: (m + 1) * 0.05 is whole)")
    ap.add_argument("--subjects", type=int, default=20)
    ap.add_argument("--seed", type=int, default=2016)
    args = ap.parse_args()
    skewed_n = args.datasets if args.skewed_datasets is None else args.skewed_datasets

    sg = sensor_graph(pd.DataFrame({"name": list(CHANNELS)}))
    graph = graph_arrays(points_graph(sg.adjacency(), (len(CHANNELS), N_TIMES)))
    m = args.resamplings
    exact = np.floor((m + 1) * ALPHA + 1e-9) / (m + 1)
    print(f"null simulation: {args.subjects} subjects, {len(CHANNELS)} channels x {N_TIMES} samples "
          f"({len(CHANNELS) * N_TIMES} points), {m} sign-flips per dataset, alpha {ALPHA}")
    print(f"  sensor graph: {sg.method}; {sg.n_edges} sensor pairs, {graph[1].size // 2} point pairs")
    print(f"  rejection rate of an exact test with this m: {exact:.4f}")
    t0 = time.perf_counter()
    report("Gaussian smooth noise", simulate("gaussian", args.datasets, args.subjects, m, args.seed, graph))
    if skewed_n:
        report("Skewed smooth noise (centred exponential, skewness 2)",
               simulate("skewed", skewed_n, args.subjects, m, args.seed, graph))
    print(f"\ntotal runtime {time.perf_counter() - t0:.0f} s")


if __name__ == "__main__":
    main()
