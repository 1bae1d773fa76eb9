"""Scale-out benchmark: 2,000 TFCE sign-flips on a channel x frequency x time map, on 1 and on 2
local Dask workers.

Problem: a one-sample group test of 20 subjects on a 64 channels x 30 frequencies x 150 samples
map (288,000 points), TFCE correction with 2,000 random sign-flips
(``glmeeg.inference.permutation.permutation_test``). Data: white noise smoothed along frequency
and time, fixed seed. Channels: 64 names of the 10-10 system, neighbours from their standard
positions, times the paths over frequencies and samples.

Each run uses a ``dask.distributed.LocalCluster`` of worker processes with one thread each
(numba too), started before the clock starts and warmed with one small test so that every
worker has loaded the compiled kernels. The engine (the reduced group data) is scattered to the
workers once; each task draws its own seed blocks of 100 sign-flips.

Printed, all measured in this run (shared, noisy machines: only ratios side by side mean much):

* time on 1 worker and on 2 workers, and the speed-up (target >= 1.7 on 2 cores);
* the baseline of this process alone (numba with all its threads, no Dask), and its ratio;
* a check that the three null distributions are bitwise equal;
* the load average before and after.

Run: ``python benchmarks/bench_dask_tfce.py`` (about 10 minutes on 2 cores); ``--permutations``.
"""

from __future__ import annotations

import argparse
import os
import time

import numpy as np
import pandas as pd
from scipy.ndimage import gaussian_filter

from bench_permutation import CHANNELS_64

N_SUBJECTS, N_FREQS, N_TIMES = 20, 30, 150
TARGET = 1.7


def problem():
    from glmeeg.inference.graph import map_graph
    from glmeeg.sensors.neighbours import sensor_graph

    sg = sensor_graph(pd.DataFrame({"name": CHANNELS_64}))
    shape = (64, N_FREQS, N_TIMES)
    graph = map_graph(sg.adjacency(), shape)  # as glmeeg run builds it
    rng = np.random.default_rng(20261202)
    Y = gaussian_filter(rng.standard_normal((N_SUBJECTS,) + shape), sigma=(0, 0, 1.5, 3.0))
    return Y.reshape(N_SUBJECTS, -1), graph


def run(Y, graph, permutations, backend):
    from glmeeg.inference.corrections import TFCE
    from glmeeg.inference.permutation import permutation_test

    G = np.ones((Y.shape[0], 1))
    L = np.ones((1, 1))
    t0 = time.perf_counter()
    res = permutation_test(Y, G, L, kind="t", df=(1.0, Y.shape[0] - 1.0),
                           correction=TFCE(permutations=permutations, seed=11), graph=graph,
                           backend=backend)
    return time.perf_counter() - t0, res


def on_cluster(n_workers, Y, graph, permutations):
    import distributed

    from glmeeg.parallel import DaskBackend

    with distributed.LocalCluster(n_workers=n_workers, threads_per_worker=1, processes=True,
                                  host="127.0.0.1", dashboard_address=None) as cluster, \
            distributed.Client(cluster) as client:
        backend = DaskBackend(client)
        run(Y[:, :64 * 31], _small_graph(), 200, backend)  # every worker loads the kernels
        return run(Y, graph, permutations, backend)


def _small_graph():
    from glmeeg.inference.graph import map_graph
    from glmeeg.sensors.neighbours import sensor_graph

    sg = sensor_graph(pd.DataFrame({"name": CHANNELS_64}))
    return map_graph(sg.adjacency(), (64, 1, 31))


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    ap.add_argument("--permutations", type=int, default=2000)
    args = ap.parse_args()
    load0 = os.getloadavg()[0]
    Y, graph = problem()
    print(f"problem: {N_SUBJECTS} subjects x 64 channels x {N_FREQS} frequencies x {N_TIMES} samples "
          f"= {Y.shape[1]:,} points; TFCE, {args.permutations} sign-flips; {os.cpu_count()} cores; "
          f"load average {load0:.2f}")
    from glmeeg.parallel import InProcess

    run(Y[:, :64 * 31], _small_graph(), 200, InProcess())  # compile / load the kernels here too
    t_here, r_here = run(Y, graph, args.permutations, InProcess())
    print(f"this process (numba threads, no Dask): {t_here:7.1f} s")
    t1, r1 = on_cluster(1, Y, graph, args.permutations)
    print(f"1 Dask worker  (1 thread):             {t1:7.1f} s")
    t2, r2 = on_cluster(2, Y, graph, args.permutations)
    print(f"2 Dask workers (1 thread each):        {t2:7.1f} s")
    speedup = t1 / t2
    print(f"speed-up 2 vs 1 workers: {speedup:.2f}x (target >= {TARGET}): "
          f"{'met' if speedup >= TARGET else 'MISSED'}; 2 workers vs this process: {t_here / t2:.2f}x")
    same = all(a.null_distribution.tobytes() == r_here.null_distribution.tobytes()
               and a.p_corrected.tobytes() == r_here.p_corrected.tobytes() for a in (r1, r2))
    print(f"null distributions and corrected p bitwise equal across the three runs: {same}")
    print(f"load average after: {os.getloadavg()[0]:.2f}")


if __name__ == "__main__":
    main()
