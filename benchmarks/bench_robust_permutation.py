"""Robust permutation benchmark: 5,000 sign-flips of the one-sample trimmed t with TFCE and with
cluster mass, against the GLM (ordinary one-sample t) sign-flips with the same settings.

Problem: as in ``bench_permutation.py``: 30 subjects x 64 channels x 500 samples (32,000 points),
white noise smoothed in time (Gaussian, SD 5 samples) and mixed across neighbouring sensors,
fixed seed; 64 channels of the 10-10 system, their neighbour graph times the path over samples.
``glmeeg.inference.permutation.permutation_test`` with ``method="trimmed"`` (20 %) and with
``method="glm"``, the same resamplings (seed 1), the same correction settings and the same
cluster-forming threshold (the GLM's, t on 29 df, so both form clusters alike).

Printed, all measured in this run (shared, noisy machines: read the ratios):

* for max statistic, cluster mass and TFCE: total time of the trimmed and of the GLM run and
  their ratio;
* the statistic maps alone (the engines' ``statistics`` over all resamplings, in the engines'
  batches), trimmed and GLM, and their ratio: the extra cost of trimming;
* the load average before and after.

Run: ``python benchmarks/bench_robust_permutation.py`` (a few minutes on 2 cores);
``--permutations``, ``--repeats``.
"""

from __future__ import annotations

import argparse
import os

import numpy as np
import pandas as pd
from scipy.ndimage import gaussian_filter1d

from bench_permutation import CHANNELS_64, N_SUBJECTS, N_TIMES
from timing import best_of


def main() -> None:
    import numba

    from glmeeg.inference import permutation as perm
    from glmeeg.inference.corrections import TFCE, ClusterMass, MaxStatistic
    from glmeeg.inference.graph import graph_arrays, points_graph
    from glmeeg.sensors.neighbours import sensor_graph

    ap = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    ap.add_argument("--permutations", type=int, default=5000)
    ap.add_argument("--repeats", type=int, default=1, help="best of this many runs of each timing")
    args = ap.parse_args()
    m = args.permutations

    sg = sensor_graph(pd.DataFrame({"name": CHANNELS_64}))
    indptr, indices = graph_arrays(points_graph(sg.adjacency(), (64, N_TIMES)))
    P = 64 * N_TIMES
    rng = np.random.default_rng(20240501)
    white = rng.standard_normal((N_SUBJECTS, 64, N_TIMES))
    mix = np.eye(64) + 0.3 * sg.adjacency().toarray()
    Y = gaussian_filter1d(np.einsum("cd,sdt->sct", mix, white), 5.0, axis=-1).reshape(N_SUBJECTS, P)
    design, contrast = np.ones((N_SUBJECTS, 1)), np.array([[1.0]])
    df = (1.0, N_SUBJECTS - 1.0)
    threshold = perm.cluster_forming_threshold("t", df, "two-sided")

    load0 = os.getloadavg()[0]
    print(f"{N_SUBJECTS} subjects x 64 channels x {N_TIMES} samples = {P} points; {m} sign-flips; "
          f"numba threads: {numba.get_num_threads()}")

    def settings(cls, permutations):
        extra = {"threshold": threshold} if cls is ClusterMass else {}
        return cls(permutations=permutations, seed=1, **extra)

    def run(cls, method, permutations=m):
        return perm.permutation_test(Y, design, contrast, kind="t", df=df, method=method, trim=0.2,
                                     correction=settings(cls, permutations), graph=(indptr, indices))

    for cls in (MaxStatistic, ClusterMass, TFCE):     # compile / load the cached kernels
        for method in ("glm", "trimmed"):
            run(cls, method, permutations=8)

    times = {}
    for name, cls in (("max statistic", MaxStatistic), ("cluster mass", ClusterMass), ("TFCE", TFCE)):
        for method in ("glm", "trimmed"):
            times[name, method] = best_of(lambda: run(cls, method), args.repeats)

    # The statistic maps alone, in the batches permutation_test uses.
    rows, _ = perm.resamplings("sign-flip", N_SUBJECTS, permutations=m, seed=1)
    engines = {"glm": perm._Engine(Y[:, None, :], design, contrast, "sign-flip"),
               "trimmed": perm._robust_engine(Y[:, None, :], design, contrast, "sign-flip", kind="t",
                                              method="trimmed", trim=0.2)}

    def maps(engine):
        batch = int(max(1, min(m, perm._MAX_BATCH, (512 * 2**20) // engine.bytes_per_map)))
        for s in range(0, m, batch):
            engine.statistics(rows[s:s + batch])
    for method, engine in engines.items():
        times["maps alone", method] = best_of(lambda: maps(engine), args.repeats)

    print(f"\n  {'':<16} {'GLM s':>8} {'trimmed s':>10} {'trimmed / GLM':>14}")
    for name in ("maps alone", "max statistic", "cluster mass", "TFCE"):
        g, t = times[name, "glm"], times[name, "trimmed"]
        print(f"  {name:<16} {g:8.2f} {t:10.2f} {t / g:14.2f}")
    print(f"\n  load average (1 min): {load0:.2f} before, {os.getloadavg()[0]:.2f} after, on "
          f"{os.cpu_count()} CPUs")


if __name__ == "__main__":
    main()
