"""Memory benchmark: subject-level fitting of a study larger than memory budgets allow to load.

Problem: 30 participants x 600 epochs x 64 channels x 500 samples, float32: 2.3 GB of epoch files,
written by this benchmark (invented noise with a small planted effect; 5 % of each participant's
epochs are left out of the trials table, as after artefact rejection, so the chosen epochs are
copied out of the memory-mapped file). Subject model ``condition + intensity`` (4 columns), one
contrast with FDR correction (no resampling: the figure is about the subject level).

Each measurement runs in a fresh process whose peak resident set size is read from the kernel
(``os.wait4``), so file pages mapped by the process count as they do in ``ps``:

* baseline: importing glmeeg and planning the analysis (tables, headers, design matrices);
* subject-level fitting: ``plan_analysis``, input hashes and ``fit_subjects`` with the cache in
  the output folder, as ``glmeeg run`` does;
* the whole ``glmeeg run --no-report --refit`` (fits, group test, writing the results).

Printed: peak RSS of each, against the 1 GB target for the fitting, as a share of the data on
disk and of one participant's file; the fitting time against the time of reading every file once
(``numpy.sum`` over each memory-mapped array) measured in the same run.

Run: ``python benchmarks/bench_memory.py [--folder DIR] [--keep]`` (a few minutes; needs 2.5 GB
of free disk; the study is removed afterwards unless ``--keep``).
"""

from __future__ import annotations

import argparse
import os
import shutil
import subprocess
import sys
import tempfile
import textwrap
import time
from pathlib import Path

import numpy as np
import pandas as pd

from bench_permutation import CHANNELS_64

N_SUBJECTS, N_EPOCHS, N_TIMES = 30, 600, 500
TARGET = 2**30

DESIGN = """\
[data]
trials = "trials.csv"
subjects = "subjects.csv"
channels = "channels.tsv"
epochs = "epochs/{subject}.npy"
time_start = -0.2
sampling_rate = 500.0

[subject_model]
formula = "condition + intensity"
levels = { condition = ["a", "b", "c"] }

[group_model]
formula = "1"

[[test]]
name = "b-vs-a"
subject_contrast = "condition[T.b]"
correction = "fdr"
"""


def write_study(root: Path) -> Path:
    rng = np.random.default_rng(20261202)
    (root / "epochs").mkdir(parents=True)
    rows, subjects = [], []
    for i in range(N_SUBJECTS):
        s = f"p{i + 1:02d}"
        cond = np.array(["a", "b", "c"])[np.arange(N_EPOCHS) % 3]
        rng.shuffle(cond)
        y = rng.standard_normal((N_EPOCHS, 64, N_TIMES), dtype=np.float32)
        y[cond == "b", 30:40, 200:300] += 0.3
        np.save(root / "epochs" / f"{s}.npy", y)
        del y
        kept = np.sort(rng.choice(N_EPOCHS, size=int(0.95 * N_EPOCHS), replace=False))
        intensity = rng.normal(60, 5, N_EPOCHS).round(2)
        rows.append(pd.DataFrame({"subject": s, "epoch": kept, "condition": cond[kept],
                                  "intensity": intensity[kept]}))
        subjects.append({"subject": s, "age": int(rng.integers(20, 60))})
    pd.concat(rows).to_csv(root / "trials.csv", index=False)
    pd.DataFrame(subjects).to_csv(root / "subjects.csv", index=False)
    pd.DataFrame({"name": CHANNELS_64}).to_csv(root / "channels.tsv", sep="\t", index=False)
    (root / "design.toml").write_text(DESIGN)
    return root / "design.toml"


def peak_rss(code: str, *args: str) -> tuple[int, float, str]:
    """Run ``code`` in a fresh Python; its peak RSS in bytes, wall time, stdout."""
    t0 = time.perf_counter()
    p = subprocess.Popen([sys.executable, "-c", code, *args], stdout=subprocess.PIPE, text=True)
    out = p.stdout.read()
    _, status, usage = os.wait4(p.pid, 0)
    p.returncode = os.waitstatus_to_exitcode(status)
    if p.returncode != 0:
        raise SystemExit(f"child failed ({p.returncode}): {code[:60]}...")
    return usage.ru_maxrss * 1024, time.perf_counter() - t0, out


BASELINE = textwrap.dedent("""
    import sys
    from glmeeg.pipeline import plan_analysis
    plan = plan_analysis(sys.argv[1])
""")
FIT = textwrap.dedent("""
    import sys, time
    from glmeeg.subject_level.cache import FitCache
    from glmeeg.pipeline import fit_subjects, plan_analysis
    from glmeeg.results import provenance
    plan = plan_analysis(sys.argv[1])
    prov = provenance(design_file=plan.design_file, inputs=plan.study.input_files)
    t0 = time.perf_counter()
    est = fit_subjects(plan, cache=FitCache(sys.argv[2]), refit=True, hashes=prov.input_sha256)
    print(time.perf_counter() - t0, est.estimates.nbytes)
""")
READ = textwrap.dedent("""
    import sys, time
    from pathlib import Path
    import numpy as np
    t0 = time.perf_counter()
    total = 0.0
    for f in sorted(Path(sys.argv[1]).glob("*.npy")):
        total += float(np.load(f, mmap_mode="r").sum(dtype=np.float64))
    print(time.perf_counter() - t0)
""")
RUN = textwrap.dedent("""
    import sys
    from glmeeg.cli import main
    sys.argv = ["glmeeg", "run", sys.argv[1], "--out", sys.argv[2], "--no-report", "--refit", "-q"]
    main()
""")


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    ap.add_argument("--folder", type=Path, default=None, help="where to write the study (default: a "
                    "temporary folder)")
    ap.add_argument("--keep", action="store_true", help="keep the study afterwards")
    args = ap.parse_args()
    base = Path(tempfile.mkdtemp(prefix="glmeeg-bench-memory-", dir=args.folder))
    try:
        t0 = time.perf_counter()
        design = write_study(base / "study")
        files = sorted((base / "study" / "epochs").glob("*.npy"))
        size = sum(f.stat().st_size for f in files)
        print(f"study: {N_SUBJECTS} participants x {N_EPOCHS} epochs x 64 channels x {N_TIMES} samples, "
              f"float32: {size / 1e9:.2f} GB on disk ({size / N_SUBJECTS / 2**20:.0f} MiB each), "
              f"written in {time.perf_counter() - t0:.0f} s; load average {os.getloadavg()[0]:.2f}")
        rss_base, _, _ = peak_rss(BASELINE, str(design))
        _, t_read_wall, out = peak_rss(READ, str(base / "study" / "epochs"))
        t_read = float(out.split()[0])
        rss_fit, _, out = peak_rss(FIT, str(design), str(base / "out" / "subject-fits"))
        t_fit = float(out.split()[0])
        rss_run, t_run, _ = peak_rss(RUN, str(design), str(base / "out"))
        mib = 2**20
        print(f"peak RSS, import + plan (baseline):  {rss_base / mib:7.0f} MiB")
        print(f"peak RSS, subject-level fitting:     {rss_fit / mib:7.0f} MiB (target < 1024 MiB: "
              f"{'met' if rss_fit < TARGET else 'MISSED'}); {rss_fit / size:.3f} x the data on disk, "
              f"{rss_fit / (size / N_SUBJECTS):.1f} x one participant's file, "
              f"{(rss_fit - rss_base) / mib:.0f} MiB above the baseline")
        print(f"peak RSS, whole glmeeg run:          {rss_run / mib:7.0f} MiB ({t_run:.0f} s)")
        print(f"fitting time {t_fit:.1f} s for {size / 1e9:.2f} GB: {size / 1e9 / t_fit:.2f} GB/s; "
              f"reading every file once takes {t_read:.1f} s ({size / 1e9 / t_read:.2f} GB/s): "
              f"fitting / reading = {t_fit / t_read:.2f}")
        print(f"load average after: {os.getloadavg()[0]:.2f}")
    finally:
        if args.keep:
            print(f"study kept in {base}")
        else:
            shutil.rmtree(base, ignore_errors=True)


if __name__ == "__main__":
    main()
