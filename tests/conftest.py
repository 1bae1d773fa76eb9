"""Shared fixtures: small synthetic studies written in glmeeg's study layout.

Invented data for synthetic tests only; every reference value the tests compare against comes
from an outside source named beside the check.
"""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pandas as pd
import pytest

DESIGN = """\
[data]
trials = "trials.csv"
subjects = "subjects.csv"
channels = "channels.tsv"
epochs = "epochs/{{subject}}.npy"
time_start = -0.1
sampling_rate = 100.0
{extra_data}
[subject_model]
formula = "{formula}"
levels = {{ condition = ["a", "b", "c"] }}

[group_model]
formula = "1"

{tests}
"""

DEFAULT_TESTS = """\
[[test]]
name = "b-vs-a"
subject_contrast = "condition[T.b]"
correction = "holm"
"""


def write_study(root: Path, *, n_subjects: int = 10, n_trials: int = 30, n_channels: int = 4,
                n_times: int = 8, n_freqs: int | None = None, seed: int = 0,
                formula: str = "condition + intensity", tests: str = DEFAULT_TESTS,
                effect: float = 0.0, dtype=np.float32, with_epoch_column: bool = True,
                extra_data: str = "") -> Path:
    """Write a small study (conditions a/b/c, a covariate 'intensity', groups 'x'/'y', age)
    and its design file; return the design file's path.

    ``effect`` is added to condition b epochs at channel 1, time samples 2-4, so tests can
    check that something planted is found.
    """
    rng = np.random.default_rng(seed)
    root.mkdir(parents=True, exist_ok=True)
    (root / "epochs").mkdir(exist_ok=True)
    rows = []
    for i in range(n_subjects):
        s = f"s{i + 1:02d}"
        cond = np.array(["a", "b", "c"])[np.arange(n_trials) % 3]
        rng.shuffle(cond)
        shape = (n_trials, n_channels) + ((n_freqs,) if n_freqs else ()) + (n_times,)
        y = rng.standard_normal(shape)
        y[cond == "b", 1, ..., 2:5] += effect
        np.save(root / "epochs" / f"{s}.npy", y.astype(dtype))
        intensity = rng.normal(50, 10, n_trials).round(2)
        for j in range(n_trials):
            rows.append({"subject": s, "epoch": j, "condition": cond[j], "intensity": intensity[j],
                         "rt": round(float(rng.uniform(0.3, 0.9)), 3)})
    trials = pd.DataFrame(rows)
    if not with_epoch_column:
        trials = trials.drop(columns="epoch")
    trials.to_csv(root / "trials.csv", index=False)
    pd.DataFrame({"subject": [f"s{i + 1:02d}" for i in range(n_subjects)],
                  "group": ["x", "y"] * (n_subjects // 2) + ["x"] * (n_subjects % 2),
                  "age": rng.integers(20, 60, n_subjects)}).to_csv(root / "subjects.csv", index=False)
    names = ["Fz", "Cz", "Pz", "Oz", "C3", "C4", "P3", "P4"][:n_channels]
    names += [f"E{k}" for k in range(len(names), n_channels)]
    pd.DataFrame({"name": names}).to_csv(root / "channels.tsv", sep="\t", index=False)
    if n_freqs and "frequencies" not in extra_data:
        extra_data += f"\nfrequencies = {[float(4 + 2 * k) for k in range(n_freqs)]}\n"
    design = root / "design.toml"
    design.write_text(DESIGN.format(formula=formula, tests=tests, extra_data=extra_data))
    return design


@pytest.fixture
def study(tmp_path: Path) -> Path:
    """Design file of a default small study with a planted condition-b effect."""
    return write_study(tmp_path / "study", effect=1.5, seed=1)
