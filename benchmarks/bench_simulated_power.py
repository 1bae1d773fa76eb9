"""Simulated power benchmark: 5 sample sizes x 200 simulated studies, each with a cluster-mass
permutation test.

Problem: the demo study (``glmeeg.demo.write_demo_study``: 28 volunteers, 32 channels x 250
samples = 8,000 points), written to a temporary folder. Its first question -- urgency high vs
low, a one-sample t over volunteers -- is run once as the pilot, with a cluster-mass correction
of 500 sign-flips, saved and loaded back. Then ``glmeeg.planning.simulated.simulate_power``
simulates 200 new studies at each of n = 12, 16, 24, 32, 40 from that result, each analysed
with the same cluster-mass test with 500 sign-flips (``permutations = 500``: enough for a power
estimate, Boos & Zhang 2000; the pilot's neighbour graph from its design).

Printed, all measured in this run (the machines are shared and noisy, so only ratios measured
side by side mean much):

* the wall time of the whole simulation (target: minutes on 2 cores) and per sample size, the
  time per simulated study;
* the baseline: one cluster-mass permutation test with the same settings on the pilot's own
  data (28 volunteers; best of ``--repeats``), and the ratio of the time per simulated study to
  it (the simulated studies have 12 to 40 volunteers, so a ratio near the mean n / 28 says the
  simulation adds little beyond the tests themselves);
* the power table, and the load average before and after.

Run: ``python benchmarks/bench_simulated_power.py`` (a few minutes); ``--simulations``,
``--permutations``, ``--n``, ``--effect-scale``, ``--repeats``.
"""

from __future__ import annotations

import argparse
import os
import tempfile
import time
from pathlib import Path

import numpy as np
from timing import best_of

TEST = """
[[test]]
name = "urgency-high-vs-low"
subject_contrast = "urgency[T.high]"
correction = "cluster"
permutations = {permutations}
seed = 1
"""


def main() -> None:
    import glmeeg
    from glmeeg.inference.permutation import permutation_test
    from glmeeg.demo import write_demo_study
    from glmeeg.planning.simulated import simulate_power

    ap = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    ap.add_argument("--simulations", type=int, default=200)
    ap.add_argument("--permutations", type=int, default=500)
    ap.add_argument("--n", default="12,16,24,32,40", help="sample sizes, comma-separated")
    ap.add_argument("--effect-scale", type=float, default=1.0)
    ap.add_argument("--repeats", type=int, default=3, help="best of this many baseline runs")
    args = ap.parse_args()
    sizes = [int(v) for v in args.n.split(",")]

    load0 = os.getloadavg()[0]
    with tempfile.TemporaryDirectory() as tmp:
        demo = write_demo_study(Path(tmp) / "demo")
        text = demo.read_text()
        design = demo.with_name("bench.toml")
        design.write_text(text[:text.index("[[test]]")] + TEST.format(permutations=args.permutations))
        plan = glmeeg.plan_analysis(design)
        t0 = time.perf_counter()
        run = glmeeg.run_analysis(plan)
        pilot_time = time.perf_counter() - t0
        glmeeg.write_run(run, Path(tmp) / "results")
        pilot = glmeeg.load_result(Path(tmp) / "results" / "urgency-high-vs-low")
        print(f"pilot: {pilot.n_subjects} volunteers, {pilot.axes.n_points} points, "
              f"{pilot.n_significant} significant points, {len([c for c in pilot.clusters if c.significant])} "
              f"significant cluster(s); fit and test {pilot_time:.1f} s")

        correction = pilot.correction
        # Writable copies, as each simulated study passes (numba compiles read-only arrays apart).
        Y, G = np.array(pilot.subject_estimates), np.array(pilot.group_design)

        def baseline():
            permutation_test(Y, G, pilot.group_contrast, kind=pilot.kind, df=pilot.df,
                             correction=correction, graph=plan.graph)

        baseline()  # compile / load the cached kernels before timing
        base = best_of(baseline, args.repeats)

        per_n = {}

        def progress(n: int, done: int, total: int) -> None:
            if done == 1:
                per_n[n] = time.perf_counter()
            elif done == total:
                per_n[n] = time.perf_counter() - per_n[n]

        t0 = time.perf_counter()
        sim = simulate_power(pilot, n=sizes, simulations=args.simulations, permutations=args.permutations,
                             effect_scale=args.effect_scale, graph=plan.graph, progress=progress)
        wall = time.perf_counter() - t0

    studies = len(sizes) * args.simulations
    print(f"\n{sim}\n")
    print(f"simulated power: {len(sizes)} sample sizes x {args.simulations} studies x "
          f"{args.permutations} sign-flips, cluster mass: {wall:.1f} s ({wall / 60:.1f} min)")
    for n in sizes:
        # per_n starts at the end of the first study of each n: scale to all of them.
        each = per_n[n] / max(args.simulations - 1, 1)
        print(f"  n = {n:>3}: {each:.3f} s per simulated study, {each / base:.2f} x the baseline")
    mean_n = float(np.mean(sizes))
    print(f"  per simulated study on average: {wall / studies:.3f} s")
    print(f"baseline: one cluster-mass test with {args.permutations} sign-flips on the pilot's "
          f"{pilot.n_subjects} volunteers: {base:.3f} s (best of {args.repeats})")
    print(f"ratio, time per simulated study / baseline: {wall / studies / base:.2f} "
          f"(mean n / pilot n = {mean_n / pilot.n_subjects:.2f})")
    print(f"load average (1 min): {load0:.2f} before, {os.getloadavg()[0]:.2f} after, on "
          f"{os.cpu_count()} CPUs")


if __name__ == "__main__":
    main()
