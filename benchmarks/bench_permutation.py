"""Permutation engine benchmark: 5,000 sign-flips with TFCE and with cluster mass on a full-size
EEG map.

Problem: a one-sample group test of 30 subjects x 64 channels x 500 samples (32,000 points),
5,000 random sign-flips (``glmeeg.inference.permutation.permutation_test``). Data: white noise
smoothed in time (Gaussian, SD 5 samples) and mixed across neighbouring sensors, fixed seed (no
effect: every resampled map is noise, as most of them are in a real test). Channels: 64 names of
the 10-10 system; their neighbour graph comes from ``glmeeg.sensors.neighbours.sensor_graph`` on the
standard positions of the names, times the path over samples.

Targets on a 2-core machine: TFCE <= 30 s, cluster mass <= 10 s.

Printed, all measured in this run (the machines are shared and noisy, so only ratios measured
side by side mean much):

* TFCE and cluster-mass corrections: total time, time per resampling, target met or missed;
* baselines: the same call with the max-statistic correction (the statistic maps of all 5,000
  resamplings plus a maximum: the work every correction shares) and numpy's BLAS matrix product
  of the same size ((5,000 x 30) sign matrix times the (30 x 32,000) data, in the engine's
  batches), with ratios against them;
* the time of the compiled TFCE / cluster kernels alone on the same null maps, so that the time
  outside them (building the statistic maps and counting exceedances in numpy) can be read off;
* the load average before and after, since a busy machine changes every figure.

Run: ``python benchmarks/bench_permutation.py`` (1-2 minutes); ``--permutations``,
``--repeats``.
"""

from __future__ import annotations

import argparse
import os
import time

import numpy as np
import pandas as pd
from scipy.ndimage import gaussian_filter1d

# A 64-channel 10-10 montage (names that glmeeg.sensors.standard_position accepts).
CHANNELS_64 = (
    "Fp1 Fpz Fp2 AF7 AF3 AFz AF4 AF8 F7 F5 F3 F1 Fz F2 F4 F6 F8 FT7 FC5 FC3 FC1 FCz FC2 FC4 FC6 "
    "FT8 T7 C5 C3 C1 Cz C2 C4 C6 T8 TP7 CP5 CP3 CP1 CPz CP2 CP4 CP6 TP8 P7 P5 P3 P1 Pz P2 P4 P6 "
    "P8 PO7 PO3 POz PO4 PO8 O1 Oz O2 TP9 TP10 P9"
).split()
N_SUBJECTS, N_TIMES = 30, 500
TARGETS = {"tfce": 30.0, "cluster": 10.0}


def timed(fn, repeats: int):
    best, out = float("inf"), None
    for _ in range(repeats):
        t0 = time.perf_counter()
        out = fn()
        best = min(best, time.perf_counter() - t0)
    return best, out


def main() -> None:
    import numba

    from glmeeg.inference.clusters import max_cluster_statistic
    from glmeeg.inference.corrections import TFCE, ClusterMass, MaxStatistic
    from glmeeg.inference.graph import graph_arrays, points_graph
    from glmeeg.inference.permutation import (_Engine, cluster_forming_threshold, permutation_test,
                                              resamplings)
    from glmeeg.inference.tfce import max_tfce
    from glmeeg.sensors.neighbours import sensor_graph

    ap = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    ap.add_argument("--permutations", type=int, default=5000)
    ap.add_argument("--repeats", type=int, default=1, help="best of this many runs of each timing")
    args = ap.parse_args()
    m = args.permutations

    assert len(set(CHANNELS_64)) == 64
    sg = sensor_graph(pd.DataFrame({"name": CHANNELS_64}))
    shape = (64, N_TIMES)
    indptr, indices = graph_arrays(points_graph(sg.adjacency(), shape))
    P = 64 * N_TIMES
    rng = np.random.default_rng(20240501)
    white = rng.standard_normal((N_SUBJECTS, 64, N_TIMES))
    mix = np.eye(64) + 0.3 * sg.adjacency().toarray()
    Y = gaussian_filter1d(np.einsum("cd,sdt->sct", mix, white), 5.0, axis=-1).reshape(N_SUBJECTS, P)
    design, contrast = np.ones((N_SUBJECTS, 1)), np.array([[1.0]])
    df = (1.0, N_SUBJECTS - 1.0)

    load0 = os.getloadavg()[0]
    print(f"{N_SUBJECTS} subjects x 64 channels x {N_TIMES} samples = {P} points; {m} sign-flips; "
          f"numba threads: {numba.get_num_threads()}")
    print(f"  sensor graph: {sg.n_edges} sensor pairs ({sg.method}); {indices.size // 2} point pairs")

    def run(cls):
        return permutation_test(Y, design, contrast, kind="t", df=df, correction=cls(permutations=m, seed=1),
                                graph=(indptr, indices))

    # Compile / load the cached kernels before timing.
    for cls in (MaxStatistic, ClusterMass, TFCE):
        permutation_test(Y, design, contrast, kind="t", df=df, correction=cls(permutations=8),
                         graph=(indptr, indices))

    t_max, r_max = timed(lambda: run(MaxStatistic), args.repeats)
    t_tfce, r_tfce = timed(lambda: run(TFCE), args.repeats)
    t_cluster, r_cluster = timed(lambda: run(ClusterMass), args.repeats)
    assert r_tfce.n_resamplings == m and not r_tfce.exhaustive

    # BLAS baseline: the same sign-flip products, batched as the engine batches them.
    rows, _ = resamplings("sign-flip", N_SUBJECTS, permutations=m, seed=1)
    batch = max(1, min(m, (512 * 2**20) // (P * 8 * 7)))
    signs = rows.astype(np.float64)

    def blas():
        for s in range(0, m, batch):
            signs[s:s + batch] @ Y
    t_blas, _ = timed(blas, args.repeats)

    # The kernels alone on the engine's null maps (built untimed, batch by batch as the
    # engine builds them); the rest of a correction's time is spent outside them.
    engine = _Engine(Y[:, None, :], design, contrast, "sign-flip")
    thr = cluster_forming_threshold("t", df, "two-sided")
    k_tfce = k_cluster = 0.0
    for s in range(0, m, batch):
        maps = np.ascontiguousarray(engine.statistics(rows[s:s + batch]))
        t0 = time.perf_counter()
        max_tfce(maps, indptr, indices)
        t1 = time.perf_counter()
        max_cluster_statistic(maps, indptr, indices, thr)
        k_tfce += t1 - t0
        k_cluster += time.perf_counter() - t1

    print(f"\n  {'':<34} {'total s':>8} {'ms / resampling':>16}")
    lines = [("numpy BLAS matmul, same size", t_blas), ("max statistic (maps + max)", t_max),
             ("cluster mass", t_cluster), ("TFCE", t_tfce),
             ("  cluster kernel alone", k_cluster), ("  TFCE kernel alone", k_tfce)]
    for name, t in lines:
        print(f"  {name:<34} {t:8.2f} {1000 * t / m:16.3f}")
    print("\n  ratios:")
    print(f"    TFCE / max statistic     {t_tfce / t_max:6.2f}    TFCE / BLAS     {t_tfce / t_blas:7.1f}")
    print(f"    cluster / max statistic  {t_cluster / t_max:6.2f}    cluster / BLAS  {t_cluster / t_blas:7.1f}")
    print(f"    max statistic / BLAS     {t_max / t_blas:6.1f}")
    print(f"    outside the kernel: TFCE {t_tfce - k_tfce:.2f} s ({(t_tfce - k_tfce) / t_tfce:.0%}), "
          f"cluster {t_cluster - k_cluster:.2f} s ({(t_cluster - k_cluster) / t_cluster:.0%})")
    print("\n  targets (5,000 resamplings, 2 cores):")
    for name, t in (("tfce", t_tfce), ("cluster", t_cluster)):
        scaled = t * 5000 / m
        print(f"    {name:<8} {scaled:6.1f} s (target <= {TARGETS[name]:g} s): "
              f"{'meets' if scaled <= TARGETS[name] else 'misses'}")
    print(f"\n  load average (1 min): {load0:.2f} before, {os.getloadavg()[0]:.2f} after, on "
          f"{os.cpu_count()} CPUs")
    print(f"\n  smallest corrected p: max {r_max.p_corrected.min():.3g}, cluster "
          f"{min((c['p'] for c in r_cluster.clusters), default=1.0):.3g}, tfce {r_tfce.p_corrected.min():.3g} "
          "(noise only: nothing should be small)")


if __name__ == "__main__":
    main()
