"""Tests of the demo study generator (glmeeg.demo)."""

from __future__ import annotations

import doctest
from pathlib import Path

import numpy as np
import pandas as pd
import pytest

from glmeeg.demo import study as simulate
from glmeeg.sensors import standard_position
from glmeeg.demo import DEMO_DESIGN, DEMO_TRUTH, write_demo_study
from glmeeg.spec import load_design

REPO = Path(__file__).resolve().parents[1]
SMALL = dict(n_subjects=4, n_trials=60, seed=7)
STUDY_FILES = ("design.toml", "trials.csv", "subjects.csv", "channels.tsv")


@pytest.fixture(scope="module")
def small_study(tmp_path_factory: pytest.TempPathFactory) -> Path:
    root = tmp_path_factory.mktemp("demo")
    write_demo_study(root, **SMALL)
    return root


def _all_files(root: Path) -> dict[str, bytes]:
    return {p.relative_to(root).as_posix(): p.read_bytes() for p in sorted(root.rglob("*")) if p.is_file()}


def test_files_and_columns(small_study: Path) -> None:
    for name in STUDY_FILES:
        assert (small_study / name).is_file(), name
    trials = pd.read_csv(small_study / "trials.csv")
    assert list(trials.columns) == ["subject", "trial", "epoch", "urgency", "loudness_db", "response_time"]
    assert set(trials["urgency"]) == {"low", "medium", "high"}
    assert trials["loudness_db"].between(-6.0, 6.0).all()
    # Loudness is rounded to 0.1 dB; 1e-9 absorbs the float representation of tenths.
    assert np.allclose(trials["loudness_db"] * 10, np.round(trials["loudness_db"] * 10), rtol=0, atol=1e-9)
    rt = trials["response_time"]
    assert rt.isna().any()  # a few are missing (1-3 %)
    assert rt.isna().mean() < 0.06
    assert rt.dropna().between(0.15, 3.0).all()

    subjects = pd.read_csv(small_study / "subjects.csv")
    assert list(subjects.columns) == ["subject", "role", "age"]
    assert list(subjects["subject"]) == ["s01", "s02", "s03", "s04"]
    assert sorted(subjects["role"]) == ["pilot", "pilot", "trainee", "trainee"]
    assert subjects["age"].between(21, 58).all()
    assert set(trials["subject"]) == set(subjects["subject"])

    channels = pd.read_csv(small_study / "channels.tsv", sep="\t")
    assert list(channels.columns) == ["name", "x", "y", "z"]
    assert tuple(channels["name"]) == DEMO_TRUTH.channels and len(channels) == 32
    expected = np.array([standard_position(n) for n in channels["name"]])
    # Positions are written rounded to 6 decimals.
    np.testing.assert_allclose(channels[["x", "y", "z"]].to_numpy(), expected, rtol=0, atol=5e-7)


def test_epoch_arrays(small_study: Path) -> None:
    trials = pd.read_csv(small_study / "trials.csv")
    for subject, rows in trials.groupby("subject"):
        epochs = np.load(small_study / "epochs" / f"{subject}.npy", allow_pickle=False)
        assert epochs.dtype == np.float32
        assert epochs.shape == (SMALL["n_trials"], 32, 250)
        assert np.isfinite(epochs).all()
        # Between 85 % and 100 % of the trials are kept.
        assert 0.85 * SMALL["n_trials"] <= len(rows) <= SMALL["n_trials"]
        idx = rows["epoch"].to_numpy()
        assert idx.min() >= 0 and idx.max() < len(epochs)
        assert len(np.unique(idx)) == len(idx)
        np.testing.assert_array_equal(rows["trial"].to_numpy(), idx + 1)


def test_design_file_written_and_valid(small_study: Path) -> None:
    assert (small_study / "design.toml").read_text(encoding="utf-8") == DEMO_DESIGN
    spec = load_design(small_study / "design.toml")
    assert spec.data.sampling_rate == 250.0 and spec.data.time_start == -0.2
    assert [t.name for t in spec.test] == ["urgency-high-vs-low", "urgency-any", "loudness",
                                          "urgency-pilots-vs-trainees"]


def test_repository_design_matches_constant() -> None:
    path = REPO / "designs" / "alarm-urgency.toml"
    assert path.read_text(encoding="utf-8") == DEMO_DESIGN
    load_design(path)


def test_same_seed_same_bytes_other_seed_differs(small_study: Path, tmp_path: Path) -> None:
    write_demo_study(tmp_path / "again", **SMALL)
    assert _all_files(tmp_path / "again") == _all_files(small_study)
    write_demo_study(tmp_path / "other", **{**SMALL, "seed": 8})
    other = _all_files(tmp_path / "other")
    assert other["epochs/s01.npy"] != _all_files(small_study)["epochs/s01.npy"]
    assert other["trials.csv"] != _all_files(small_study)["trials.csv"]


def test_subject_data_do_not_depend_on_number_of_subjects(small_study: Path, tmp_path: Path) -> None:
    write_demo_study(tmp_path, **{**SMALL, "n_subjects": 2})
    for sid in ("s01", "s02"):
        assert (tmp_path / "epochs" / f"{sid}.npy").read_bytes() == \
            (small_study / "epochs" / f"{sid}.npy").read_bytes()


def test_demo_folder_of_someone_else_is_refused_and_an_earlier_demo_reused(tmp_path: Path) -> None:
    from glmeeg.errors import GlmeegError

    theirs = tmp_path / "theirs"
    theirs.mkdir()
    (theirs / "notes.txt").write_text("keep me")
    (theirs / "trials.csv").write_text("their own trials")
    with pytest.raises(GlmeegError, match="holds files the demo did not write"):
        write_demo_study(theirs, n_subjects=2, n_trials=12, seed=3)
    assert (theirs / "notes.txt").read_text() == "keep me"
    assert (theirs / "trials.csv").read_text() == "their own trials"
    assert sorted(p.name for p in theirs.iterdir()) == ["notes.txt", "trials.csv"]
    demo = tmp_path / "demo"
    write_demo_study(demo, n_subjects=3, n_trials=12, seed=3)
    write_demo_study(demo, n_subjects=2, n_trials=12, seed=3)  # an earlier demo is the demo's own
    assert (demo / "trials.csv").read_text().startswith("subject,")
    assert (demo / "epochs" / "s03.npy").is_file()  # still listed, so a third demo may replace it
    write_demo_study(demo, n_subjects=2, n_trials=12, seed=3)
    (tmp_path / "a-file").write_text("")
    with pytest.raises(GlmeegError, match="not a folder"):
        write_demo_study(tmp_path / "a-file", n_subjects=2, n_trials=12, seed=3)


@pytest.mark.parametrize("kwargs", [dict(n_subjects=1), dict(n_trials=5)])
def test_bad_sizes_rejected(tmp_path: Path, kwargs: dict) -> None:
    with pytest.raises(ValueError):
        write_demo_study(tmp_path, **kwargs)


def test_default_trial_count_and_balance(tmp_path: Path) -> None:
    # Default n_trials with the default seed, two volunteers only, to stay fast.
    write_demo_study(tmp_path, n_subjects=2)
    trials = pd.read_csv(tmp_path / "trials.csv")
    for subject in ("s01", "s02"):
        assert np.load(tmp_path / "epochs" / f"{subject}.npy").shape == (240, 32, 250)
    # Rejection removes trials, so the kept counts per level are at most 80 and at least 80 - 36.
    counts = trials.groupby(["subject", "urgency"]).size()
    assert counts.between(80 - 36, 80).all()


def test_planted_effects_are_zero_on_noise_only_channels() -> None:
    noise_only = set(DEMO_TRUTH.noise_only)
    assert {"O1", "Oz", "O2", "PO3", "PO4", "T7", "T8"} <= noise_only
    rows = [DEMO_TRUTH.channels.index(c) for c in sorted(noise_only)]
    for effect in (DEMO_TRUTH.urgency, DEMO_TRUTH.loudness, DEMO_TRUTH.evoked):
        weights = effect.weights()
        assert all(weights[c] == 0.0 for c in noise_only), effect.name
        pattern = effect.pattern()
        assert pattern.shape == (32, 250)
        assert np.all(pattern[rows] == 0.0)
        # Zero outside the time window as well.
        times = -0.2 + np.arange(250) / 250
        outside = (times <= effect.window[0]) | (times >= effect.window[1])
        assert np.all(pattern[:, outside] == 0.0)
        assert pattern.max() == pytest.approx(1.0, abs=0.01)  # peak weight x window ~ 1
    assert np.all(simulate._evoked()[rows] == 0.0)
    assert {"Cz", "CP1", "CP2", "Pz"} <= set(DEMO_TRUTH.urgency.channels)
    assert {"Fz", "FC1", "FC2", "Cz"} <= set(DEMO_TRUTH.loudness.channels)


def test_truth_values() -> None:
    assert DEMO_TRUTH.urgency.window == (0.30, 0.55)
    assert DEMO_TRUTH.loudness.per_unit_uv == 0.15
    pilot, trainee = DEMO_TRUTH.urgency_step("pilot"), DEMO_TRUTH.urgency_step("trainee")
    assert pilot / trainee == pytest.approx(1.6, rel=1e-12)
    assert (pilot + trainee) / 2 == pytest.approx(1.5, rel=1e-12)
    text = str(DEMO_TRUTH)
    assert "noise only" in text and "Oz" in text
    with pytest.raises(AttributeError):
        DEMO_TRUTH.pilot_to_trainee = 2.0  # frozen


def test_docstring_examples() -> None:
    result = doctest.testmod(simulate, optionflags=doctest.ELLIPSIS)
    assert result.failed == 0
