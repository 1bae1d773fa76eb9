"""Bitwise check of glmeeg's results across a change of the code (a refactoring, a move).

Runs a fixed set of analyses -- the demo, synthetic studies covering every group method,
correction, robust subject fit, a channel x frequency x time study, bootstrap intervals, analytic
and simulated power -- through the command line, and records the SHA-256 of every saved array
(each member of every ``result.npz``; the numbers of every CSV table the commands write). Two
records made on the same machine must be equal, digest for digest:

    python .ci/bitwise.py record before.json          # on the commit before the change
    python .ci/bitwise.py record after.json           # on the change
    python .ci/bitwise.py compare before.json after.json

or in one step, with the earlier commit checked out into a temporary worktree and run with
this environment's Python and its dependencies:

    python .ci/bitwise.py against COMMIT

The studies are written by this script's own code (fixed seeds), so both sides analyse the
same bytes whatever the package's helpers become. Digests depend on the machine (BLAS, CPU
instructions), so a record is compared only with one made here. The settings metadata of a
saved result (names of corrections, version, time stamp) is not compared, only numbers.
"""

from __future__ import annotations

import argparse
import csv
import hashlib
import io
import json
import os
import subprocess
import sys
import tempfile
import zipfile
from pathlib import Path

import numpy as np

HERE = Path(__file__).resolve().parent.parent

STUDY_DESIGN = """\
[data]
trials = "trials.csv"
subjects = "subjects.csv"
channels = "channels.tsv"
epochs = "epochs/{{subject}}.npy"
time_start = -0.1
sampling_rate = 100.0
{extra}
[subject_model]
formula = "condition + intensity"
levels = {{ condition = ["a", "b", "c"] }}
{subject_extra}
[group_model]
formula = "1"
levels = {{ group = ["x", "y"] }}

{tests}
"""

FLAT_TESTS = """\
[[test]]
name = "none"
subject_contrast = "condition[T.b]"
correction = "none"
[[test]]
name = "bonferroni"
subject_contrast = "condition[T.b]"
correction = "bonferroni"
alternative = "greater"
[[test]]
name = "holm"
subject_contrast = "intensity"
correction = "holm"
[[test]]
name = "fdr-f"
subject_contrast = ["condition[T.b]", "condition[T.c]"]
correction = "fdr"
[[test]]
name = "max"
subject_contrast = "condition[T.b]"
correction = "max"
permutations = 300
seed = 11
bootstrap = 200
[[test]]
name = "max-groups"
subject_contrast = "condition[T.b]"
group_formula = "group + age"
group_contrast = "group[T.y]"
correction = "max"
permutations = 300
seed = 12
[[test]]
name = "cluster"
subject_contrast = "condition[T.b]"
correction = "cluster"
permutations = 300
seed = 13
[[test]]
name = "cluster-f"
subject_contrast = ["condition[T.b]", "condition[T.c]"]
correction = "cluster"
cluster_statistic = "extent"
permutations = 300
seed = 14
[[test]]
name = "tfce"
subject_contrast = "condition[T.b]"
correction = "tfce"
permutations = 300
seed = 15
[[test]]
name = "tfce-groups-f"
subject_contrast = ["condition[T.b]", "condition[T.c]"]
group_formula = "group"
group_contrast = "group[T.y]"
correction = "tfce"
permutations = 300
seed = 16
[[test]]
name = "trimmed"
subject_contrast = "condition[T.b]"
group_method = "trimmed"
correction = "max"
permutations = 300
seed = 17
[[test]]
name = "welch"
subject_contrast = "condition[T.b]"
group_formula = "group"
group_contrast = "group[T.y]"
group_method = "welch"
correction = "tfce"
permutations = 300
seed = 18
[[test]]
name = "trimmed-yuen"
subject_contrast = "condition[T.b]"
group_formula = "group"
group_contrast = "group[T.y]"
group_method = "trimmed"
trim = 0.1
correction = "holm"
bootstrap = 200
bootstrap_method = "percentile"
seed = 19
"""

ROBUST_TESTS = """\
[[test]]
name = "robust-tfce"
subject_contrast = "condition[T.b]"
correction = "tfce"
permutations = 200
seed = 21
[[test]]
name = "robust-fdr"
subject_contrast = "intensity"
correction = "fdr"
"""

TF_TESTS = """\
[[test]]
name = "tf-tfce"
subject_contrast = "condition[T.b]"
correction = "tfce"
permutations = 200
seed = 31
[[test]]
name = "tf-cluster"
subject_contrast = "condition[T.b]"
correction = "cluster"
permutations = 200
seed = 32
"""


def write_study(root: Path, *, n_subjects: int, n_channels: int, n_times: int,
                n_freqs: int | None, seed: int, subject_extra: str, tests: str) -> Path:
    """A study of conditions a/b/c, a covariate and two groups, effect planted at channel 1."""
    import pandas as pd

    rng = np.random.default_rng(seed)
    (root / "epochs").mkdir(parents=True)
    rows = []
    for i in range(n_subjects):
        s = f"s{i + 1:02d}"
        cond = np.array(["a", "b", "c"])[np.arange(36) % 3]
        rng.shuffle(cond)
        shape = (36, n_channels) + ((n_freqs,) if n_freqs else ()) + (n_times,)
        y = rng.standard_normal(shape) + 0.3 * rng.standard_t(3, shape)
        y[cond == "b", 1, ..., 3:7] += 0.8
        y[:, 2] += 0.05 * (i % 2)  # a group difference
        np.save(root / "epochs" / f"{s}.npy", y.astype(np.float32))
        intensity = rng.normal(50, 10, 36).round(2)
        rows += [{"subject": s, "epoch": j, "condition": cond[j], "intensity": intensity[j]}
                 for j in range(36)]
    pd.DataFrame(rows).to_csv(root / "trials.csv", index=False)
    pd.DataFrame({"subject": [f"s{i + 1:02d}" for i in range(n_subjects)],
                  "group": ["x", "y"] * (n_subjects // 2),
                  "age": rng.integers(20, 60, n_subjects)}).to_csv(root / "subjects.csv", index=False)
    names = ["Fz", "Cz", "Pz", "Oz", "C3", "C4", "P3", "P4", "F3", "F4", "O1", "O2"][:n_channels]
    pd.DataFrame({"name": names}).to_csv(root / "channels.tsv", sep="\t", index=False)
    extra = f"frequencies = {[float(4 + 2 * k) for k in range(n_freqs)]}\n" if n_freqs else ""
    design = root / "design.toml"
    design.write_text(STUDY_DESIGN.format(extra=extra, subject_extra=subject_extra, tests=tests))
    return design


def _glmeeg(*args: str, env: dict) -> None:
    done = subprocess.run([sys.executable, "-m", "glmeeg", *args], env=env, capture_output=True, text=True)
    if done.returncode != 0:
        raise SystemExit(f"glmeeg {' '.join(args)} failed ({done.returncode}):\n{done.stderr}")


def _npz_digests(path: Path) -> dict[str, str]:
    out = {}
    with zipfile.ZipFile(path) as zf:
        for name in sorted(zf.namelist()):
            if name == "meta.npy":
                continue  # settings and provenance, not numbers
            arr = np.load(io.BytesIO(zf.read(name)), allow_pickle=False)
            out[name] = f"{arr.dtype.str}{arr.shape}:" + hashlib.sha256(np.ascontiguousarray(arr).tobytes()).hexdigest()
    return out


def _csv_digest(path: Path) -> str:
    """Digest of a table's cells, the columns in sorted order (so a renamed label is caught but
    an added column is reported by name)."""
    with open(path, newline="") as fh:
        rows = list(csv.reader(fh))
    return hashlib.sha256(json.dumps(rows).encode()).hexdigest()


def record(out: Path) -> dict:
    env = {**os.environ, "SOURCE_DATE_EPOCH": "1700000000", "PYTHONHASHSEED": "0"}
    where = subprocess.run([sys.executable, "-c", "import glmeeg; print(glmeeg.__file__)"], env=env,
                           capture_output=True, text=True, check=True).stdout.strip()
    print(f"recording the results of {where}", file=sys.stderr)
    digests: dict[str, object] = {}
    with tempfile.TemporaryDirectory(prefix="glmeeg-bitwise-") as tmp:
        tmp = Path(tmp)
        _glmeeg("demo", str(tmp / "demo"), "--quiet", env=env)
        studies = {
            "flat": dict(n_subjects=12, n_channels=6, n_times=12, n_freqs=None, seed=1,
                         subject_extra="", tests=FLAT_TESTS),
            "robust": dict(n_subjects=10, n_channels=4, n_times=10, n_freqs=None, seed=2,
                           subject_extra='robust = "bisquare"\n', tests=ROBUST_TESTS),
            "huber": dict(n_subjects=10, n_channels=4, n_times=10, n_freqs=None, seed=3,
                          subject_extra='robust = "huber"\nrobust_tuning = 1.5\n',
                          tests=ROBUST_TESTS.replace("robust-tfce", "huber-tfce")),
            "tf": dict(n_subjects=10, n_channels=4, n_times=8, n_freqs=5, seed=4,
                       subject_extra="", tests=TF_TESTS),
        }
        for name, kw in studies.items():
            design = write_study(tmp / name, **kw)
            _glmeeg("run", str(design), "--out", str(tmp / name / "results"), "--no-report", env=env)
        for npz in sorted(tmp.rglob("result.npz")):
            digests[str(npz.relative_to(tmp))] = _npz_digests(npz)
        for table in ("points.csv",):
            for path in sorted(tmp.rglob(table)):
                digests[str(path.relative_to(tmp))] = _csv_digest(path)
        power = tmp / "power.csv"
        # `glmeeg simulate-power TEST` (earlier: `glmeeg power --from TEST`).
        newer = subprocess.run([sys.executable, "-m", "glmeeg", "simulate-power", "--help"], env=env,
                               capture_output=True).returncode == 0
        pilot = str(tmp / "demo" / "results" / "loudness")
        _glmeeg(*(["simulate-power", pilot] if newer else ["power", "--from", pilot]), "--n", "10,14",
                "--simulations", "20", "--permutations", "100", "--csv", str(power), env=env)
        digests["simulated-power.csv"] = _csv_digest(power)
        for i, args in enumerate([("--design", "two-sample", "--effect-size", "0.5", "--power", "0.8"),
                                  ("--design", "f", "--effect-size", "0.25", "--n", "60",
                                   "--df-numerator", "3", "--groups", "4"),
                                  ("--design", "paired", "--n", "24", "--power", "0.9",
                                   "--curve", "10,20,30")]):
            done = subprocess.run([sys.executable, "-m", "glmeeg", "power", *args], env=env,
                                  capture_output=True, text=True, check=True)
            digests[f"analytic-power-{i}"] = hashlib.sha256(done.stdout.encode()).hexdigest()
    out.write_text(json.dumps(digests, indent=1, sort_keys=True) + "\n")
    return digests


def compare(a: Path, b: Path) -> int:
    da, db = json.loads(a.read_text()), json.loads(b.read_text())
    bad = 0
    for key in sorted(set(da) | set(db)):
        if key not in da or key not in db:
            print(f"only in {'the second' if key in db else 'the first'}: {key}")
            bad += 1
        elif da[key] != db[key]:
            if isinstance(da[key], dict) and isinstance(db[key], dict):
                for member in sorted(set(da[key]) | set(db[key])):
                    if da[key].get(member) != db[key].get(member):
                        print(f"differs: {key} {member}")
            else:
                print(f"differs: {key}")
            bad += 1
    n = len(set(da) | set(db))
    print(f"{n - bad} of {n} records bitwise the same" + ("" if bad else ": all"))
    return 1 if bad else 0


def against(commit: str) -> int:
    with tempfile.TemporaryDirectory(prefix="glmeeg-bitwise-ref-") as tmp:
        tmp = Path(tmp)
        tree = tmp / "tree"
        subprocess.run(["git", "-C", str(HERE), "worktree", "add", "--detach", str(tree), commit],
                       check=True, capture_output=True)
        try:
            env = {**os.environ, "PYTHONPATH": str(tree)}
            subprocess.run([sys.executable, str(Path(__file__).resolve()), "record", str(tmp / "before.json")],
                           env=env, check=True, cwd=tmp)
        finally:
            subprocess.run(["git", "-C", str(HERE), "worktree", "remove", "--force", str(tree)],
                           capture_output=True)
        env = {**os.environ, "PYTHONPATH": str(HERE)}
        subprocess.run([sys.executable, str(Path(__file__).resolve()), "record", str(tmp / "after.json")],
                       env=env, check=True, cwd=tmp)
        return compare(tmp / "before.json", tmp / "after.json")


def main() -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    sub = parser.add_subparsers(dest="command", required=True)
    sub.add_parser("record").add_argument("out", type=Path)
    c = sub.add_parser("compare")
    c.add_argument("first", type=Path)
    c.add_argument("second", type=Path)
    sub.add_parser("against").add_argument("commit")
    args = parser.parse_args()
    if args.command == "record":
        record(args.out)
        return 0
    if args.command == "compare":
        return compare(args.first, args.second)
    return against(args.commit)


if __name__ == "__main__":
    sys.exit(main())
