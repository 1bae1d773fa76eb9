"""Analyse the demo study from a script: the same steps as `glmeeg run`, one at a time.

Run: python examples/analyse_demo.py [FOLDER]
Writes the demo study into FOLDER (default: glmeeg-demo-script), checks the design, runs every
test, saves the results and prints the urgency effect's peak and its significant channels.
"""

import sys
from pathlib import Path

import glmeeg
from glmeeg.demo import write_demo_study

folder = Path(sys.argv[1] if len(sys.argv) > 1 else "glmeeg-demo-script")
design = write_demo_study(folder, n_subjects=28)

plan = glmeeg.plan_analysis(design)       # every input checked, nothing fitted yet
print(plan.describe())

run = glmeeg.run_analysis(plan)
glmeeg.write_run(run, folder / "results")

urgency = run.test("urgency-high-vs-low")
print(urgency)

# Labelled arrays for your own plots: (channels, times).
t_map = urgency.map("statistic")
significant = urgency.map("significant")
table = urgency.to_frame()
best = table.loc[table["statistic"].abs().idxmax()]
print(f"largest |t| = {best['statistic']:.2f} at {best['channel']}, {1000 * best['time']:.0f} ms "
      f"({urgency.effect_size_name} = {best['effect_size']:.2f})")
print(f"{int(significant.sum())} significant points on "
      f"{int(significant.any(axis=1).sum())} of {t_map.shape[0]} channels")
