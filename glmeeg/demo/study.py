"""The demo study: alarm urgency at a maritime training centre (invented data).

:func:`write_demo_study` writes a complete study in glmeeg's layout (trials table, subjects
table, sensors table, one epoch array per volunteer and a design file) with known effects
planted in it, so that the demo, the examples and the tests can check what glmeeg finds against
the truth in :data:`DEMO_TRUTH`.

What is planted, per volunteer and trial (microvolts)::

    epoch = offset + gain * (evoked + urgency_step * u * U(ch, t) + loudness_slope * dB * L(ch, t))
            + noise_level * noise

with ``u`` = 0, 1, 2 for low, medium, high urgency and ``dB`` the loudness jitter. ``U`` and
``L`` are a spatial weight times a Hann-shaped time window; both are exactly zero outside the
effect's channels and window. The urgency step is 60 % larger in pilots than in trainees. The
evoked response (N1/P2) is the same in every condition, so it is not an effect.

The noise is AR(1) in time (coefficient 0.9 at 250 Hz) and smooth across the scalp
(correlation exp(-d^2 / 0.6^2) between sensors at chord distance d, plus a 5 % nugget); its SD
is about 6 µV at the vertex and 11-12 µV on the outer ring. Volunteers differ in offset, gain,
noise level and effect sizes (SD 20 % of the mean), and 1-3 % of each volunteer's kept trials
carry a 50-150 µV drift or spike on a few neighbouring channels.
"""

from __future__ import annotations

from dataclasses import dataclass
from pathlib import Path

import numpy as np
import pandas as pd
from scipy.signal import lfilter

from ..sensors.positions import standard_position
from .folder import _earlier_demo_files, _move_into_place, check_demo_folder

DEMO_DESIGN = """\
# glmeeg demo: alarm urgency at a maritime training centre (invented data).
# Written by `glmeeg.demo.write_demo_study`; the planted truth is `glmeeg.demo.DEMO_TRUTH`.
[data]
trials = "trials.csv"
subjects = "subjects.csv"
channels = "channels.tsv"
epochs = "epochs/{subject}.npy"
time_start = -0.2
sampling_rate = 250.0

[subject_model]
formula = "urgency + loudness_db"
levels = { urgency = ["low", "medium", "high"] }

[group_model]
formula = "1"
levels = { role = ["trainee", "pilot"] }

# 1. Where and when does urgency change the response? Threshold-free cluster enhancement with
#    5000 sign-flips of the volunteers' contrast maps (family-wise error over all points).
[[test]]
name = "urgency-high-vs-low"
subject_contrast = "urgency[T.high]"
group_contrast = "Intercept"
correction = "tfce"
permutations = 5000
seed = 1
alpha = 0.05

# The same question asked of all three levels at once (joint F, cluster-mass test).
[[test]]
name = "urgency-any"
subject_contrast = ["urgency[T.medium]", "urgency[T.high]"]
correction = "cluster"
permutations = 5000
seed = 2

# 2. Does loudness matter once urgency is accounted for? A brief, weaker effect: the
#    max-statistic correction makes a claim about every single point.
[[test]]
name = "loudness"
subject_contrast = "loudness_db"
correction = "max-statistic"
permutations = 5000
seed = 3

# 3. Do pilots differ from trainees in their urgency effect (age as a covariate)?
#    Volunteers are permuted between roles (Freedman-Lane, age as nuisance).
[[test]]
name = "urgency-pilots-vs-trainees"
subject_contrast = "urgency[T.high]"
group_formula = "role + age"
group_contrast = "role[T.pilot]"
correction = "tfce"
permutations = 5000
seed = 4
"""


CHANNELS: tuple[str, ...] = (
    "Fp1", "Fp2", "AF3", "AF4", "F7", "F3", "Fz", "F4", "F8", "FC5", "FC1", "FC2", "FC6",
    "T7", "C3", "Cz", "C4", "T8", "CP5", "CP1", "CP2", "CP6", "P7", "P3", "Pz", "P4", "P8",
    "PO3", "PO4", "O1", "Oz", "O2",
)


SAMPLING_RATE = 250.0


TIME_START = -0.2


N_SAMPLES = 250


URGENCY_LEVELS = ("low", "medium", "high")


ROLES = ("pilot", "trainee")


def _spatial_weights(centre: str, plateau_deg: float, radius_deg: float) -> np.ndarray:
    """Weight 1 within ``plateau_deg`` of ``centre``, a cos^2 taper to exactly 0 at ``radius_deg``."""
    pos = np.array([standard_position(c) for c in CHANNELS])
    angle = np.degrees(np.arccos(np.clip(pos @ standard_position(centre), -1.0, 1.0)))
    ramp = np.cos(0.5 * np.pi * (angle - plateau_deg) / (radius_deg - plateau_deg)) ** 2
    return np.where(angle <= plateau_deg, 1.0, np.where(angle < radius_deg, ramp, 0.0))


def _hann_window(start: float, stop: float) -> np.ndarray:
    """Hann bump over ``[start, stop]`` seconds on the demo time axis, exactly 0 outside."""
    t = TIME_START + np.arange(N_SAMPLES) / SAMPLING_RATE
    inside = (t > start) & (t < stop)
    return np.where(inside, np.sin(np.pi * (t - start) / (stop - start)) ** 2, 0.0)


@dataclass(frozen=True)
class PlantedEffect:
    """One planted effect: where, when and how large.

    Attributes
    ----------
    name : str
        Trials-table column the effect depends on.
    per_unit_uv : float
        Peak size at full spatial weight, microvolts per unit (per urgency step averaged over
        pilots and trainees, or per dB).
    window : tuple of float
        Start and stop (s) of the Hann-shaped time course; zero outside.
    centre : str
        10-10 position at the centre of the spatial weight.
    plateau_deg, radius_deg : float
        The weight is 1 up to ``plateau_deg`` (angle from the centre on the head sphere) and
        falls to exactly 0 at ``radius_deg``.
    """

    name: str
    per_unit_uv: float
    window: tuple[float, float]
    centre: str
    plateau_deg: float
    radius_deg: float

    def weights(self) -> dict[str, float]:
        """Spatial weight of every demo channel (0 where the effect is absent)."""
        w = _spatial_weights(self.centre, self.plateau_deg, self.radius_deg)
        return dict(zip(CHANNELS, w.tolist()))

    @property
    def channels(self) -> tuple[str, ...]:
        """Channels with a non-zero weight."""
        return tuple(c for c, w in self.weights().items() if w > 0)

    def pattern(self) -> np.ndarray:
        """Channels x samples map at ``per_unit_uv`` = 1: spatial weight times time window."""
        w = _spatial_weights(self.centre, self.plateau_deg, self.radius_deg)
        return np.outer(w, _hann_window(*self.window))


@dataclass(frozen=True)
class DemoTruth:
    """Ground truth planted by :func:`write_demo_study`.

    Attributes
    ----------
    urgency, loudness : PlantedEffect
        The two planted effects (urgency per step low -> medium -> high; loudness per dB).
    pilot_to_trainee : float
        Urgency step of pilots divided by that of trainees (role x urgency interaction).
    evoked : PlantedEffect
        The condition-independent evoked response's support (not an effect; listed so that the
        noise-only channels can be checked to carry nothing at all).
    """

    urgency: PlantedEffect
    loudness: PlantedEffect
    pilot_to_trainee: float
    evoked: PlantedEffect

    @property
    def channels(self) -> tuple[str, ...]:
        """The 32 demo channels, in file order."""
        return CHANNELS

    @property
    def noise_only(self) -> tuple[str, ...]:
        """Channels where every planted signal (effects and evoked response) is exactly zero."""
        used = set(self.urgency.channels) | set(self.loudness.channels) | set(self.evoked.channels)
        return tuple(c for c in CHANNELS if c not in used)

    def urgency_step(self, role: str) -> float:
        """Mean urgency step (µV) of ``role`` ("pilot" or "trainee"); their average is 1.5 µV."""
        trainee = 2.0 * self.urgency.per_unit_uv / (1.0 + self.pilot_to_trainee)
        return {"trainee": trainee, "pilot": self.pilot_to_trainee * trainee}[role]

    def __str__(self) -> str:
        lines = ["Planted effects (ground truth):"]
        for e, unit in ((self.urgency, "µV per urgency step"), (self.loudness, "µV per dB")):
            lines.append(f"  {e.name:<12} {e.per_unit_uv:g} {unit}, {e.window[0] * 1000:.0f}-"
                         f"{e.window[1] * 1000:.0f} ms, at {', '.join(e.channels)}")
        lines.append(f"  role x urgency: pilots' urgency step is {self.pilot_to_trainee:g} x trainees' "
                     f"({self.urgency_step('pilot'):.2f} vs {self.urgency_step('trainee'):.2f} µV)")
        lines.append(f"  noise only:  {', '.join(self.noise_only)}")
        return "\n".join(lines)


DEMO_TRUTH = DemoTruth(
    urgency=PlantedEffect("urgency", 1.5, (0.30, 0.55), "CPz", 18.5, 44.0),
    loudness=PlantedEffect("loudness_db", 0.15, (0.08, 0.16), "FCz", 18.5, 41.0),
    pilot_to_trainee=1.6,
    evoked=PlantedEffect("evoked", 1.0, (0.05, 0.26), "Cz", 30.0, 55.0),
)


# Noise settings (µV, s). Chosen so that with 28 volunteers high-vs-low urgency and loudness
# survive Holm correction over all 8000 points while noise-only channels stay clean.
# Single-trial noise SD grows from the vertex (cleanest in real recordings) towards the rim,
# where eye movements (front), muscle (temples) and alpha (back) add to it.
_NOISE_SD_VERTEX = 6.0


_NOISE_SD_RIM = 14.0       # at 90 degrees from Cz; the outer 10 % ring (72 degrees) gets ~11.5


_AR_COEF = 0.9             # lag-one autocorrelation at 250 Hz (~40 ms time constant)


_SPATIAL_LENGTH = 0.6      # length scale of exp(-d^2 / l^2) on the unit sphere


_NUGGET = 0.05             # independent share per channel (keeps the covariance well conditioned)


_SLOPE_SD = 0.2            # between-volunteer SD of effect sizes, relative to the mean


_REJECT_MAX = 0.15         # up to 15 % of epochs rejected (left out of trials.csv)


# Blinks the rejection let through: in 3-12 % of a volunteer's kept trials, 80-200 µV at the
# frontal pole, 200-400 ms long at a random time, falling off with distance from the eyes.
_BLINK_SHARE = (0.03, 0.12)


_BLINK_UV = (80.0, 200.0)


_BLINK_SPREAD = 0.8        # exp(-d / spread), d the chord distance from the frontal pole


def _noise_mixing() -> np.ndarray:
    """Noise SD per channel times the Cholesky factor of the correlation exp(-d^2/l^2) (+ nugget)."""
    pos = np.array([standard_position(c) for c in CHANNELS])
    d2 = ((pos[:, None, :] - pos[None, :, :]) ** 2).sum(-1)
    cov = (np.exp(-d2 / _SPATIAL_LENGTH**2) + _NUGGET * np.eye(len(CHANNELS))) / (1.0 + _NUGGET)
    vertex_angle = 1.0 - pos @ standard_position("Cz")  # 1 - cos(angle from Cz)
    sd = _NOISE_SD_VERTEX + (_NOISE_SD_RIM - _NOISE_SD_VERTEX) * vertex_angle
    return sd[:, None] * np.linalg.cholesky(cov)


def _evoked() -> np.ndarray:
    """Condition-independent N1 (about -5 µV, 100 ms) and P2 (about +6 µV, 190 ms)."""
    w = _spatial_weights("Cz", DEMO_TRUTH.evoked.plateau_deg, DEMO_TRUTH.evoked.radius_deg)
    return np.outer(w, -5.0 * _hann_window(0.05, 0.15) + 6.0 * _hann_window(0.13, 0.26))


def _blink_pattern() -> np.ndarray:
    """Share of a blink's frontal-pole amplitude seen at each channel (1 at the pole)."""
    pos = np.array([standard_position(c) for c in CHANNELS])
    pole = standard_position("Fp1") + standard_position("Fp2")
    pole = pole / np.linalg.norm(pole)
    return np.exp(-np.linalg.norm(pos - pole, axis=1) / _BLINK_SPREAD)


def _blinks(rng: np.random.Generator, n: int) -> np.ndarray:
    """``n`` epochs holding one blink each: a positive Hann bump of 200-400 ms at a random time."""
    out = np.zeros((n, len(CHANNELS), N_SAMPLES))
    pattern = _blink_pattern()
    t_end = TIME_START + N_SAMPLES / SAMPLING_RATE
    for k in range(n):
        length = rng.uniform(0.2, 0.4)
        start = rng.uniform(TIME_START - 0.5 * length, t_end - 0.5 * length)
        out[k] = rng.uniform(*_BLINK_UV) * np.outer(pattern, _hann_window(start, start + length))
    return out


def _artefacts(rng: np.random.Generator, n: int, low: float, high: float,
               neighbours: np.ndarray) -> np.ndarray:
    """``n`` artefact epochs: a drift or a 40 ms spike of ``low``-``high`` µV on 1-4 adjacent channels."""
    out = np.zeros((n, len(CHANNELS), N_SAMPLES))
    t = np.arange(N_SAMPLES) / N_SAMPLES
    for k in range(n):
        amp = rng.uniform(low, high) * rng.choice([-1.0, 1.0])
        if rng.random() < 0.5:
            start = rng.uniform(0.0, 0.6)
            shape = np.clip((t - start) / (1.0 - start), 0.0, None)  # drift from a random onset
        else:
            shape = np.exp(-0.5 * ((t - rng.uniform(0.05, 0.95)) / 0.04) ** 2)
        chans = neighbours[rng.integers(len(CHANNELS)), : rng.integers(1, 5)]
        out[k, chans] = amp * rng.uniform(0.6, 1.0, size=(len(chans), 1)) * shape
    return out


def _subject(seed_seq: np.random.SeedSequence, role: str, n_trials: int, mixing: np.ndarray,
             neighbours: np.ndarray) -> tuple[pd.DataFrame, np.ndarray]:
    """Trials table (kept trials only) and float32 epochs (all trials) of one volunteer."""
    rng = np.random.default_rng(seed_seq)
    urgency = rng.permutation(np.resize(np.arange(len(URGENCY_LEVELS)), n_trials))
    loudness = np.round(rng.uniform(-6.0, 6.0, size=n_trials), 1) + 0.0  # no '-0.0'
    # Response times: faster for more urgent alarms; a log-normal spread around ~0.45 s.
    log_rt = np.log(0.48) + rng.normal(0.0, 0.1) - 0.05 * urgency + rng.normal(0.0, 0.2, size=n_trials)
    rt = np.round(0.15 + np.exp(log_rt), 3)
    rt[rng.random(n_trials) < rng.uniform(0.01, 0.03)] = np.nan

    # Signal: the volunteer's own effect sizes and gain.
    step = DEMO_TRUTH.urgency_step(role) * (1.0 + _SLOPE_SD * rng.standard_normal())
    per_db = DEMO_TRUTH.loudness.per_unit_uv * (1.0 + _SLOPE_SD * rng.standard_normal())
    gain = np.exp(rng.normal(0.0, 0.15))
    signal = (_evoked()[None]
              + step * urgency[:, None, None] * DEMO_TRUTH.urgency.pattern()[None]
              + per_db * loudness[:, None, None] * DEMO_TRUTH.loudness.pattern()[None])

    # Noise: AR(1) in time (stationary from the first sample), then mixed across channels.
    white = rng.standard_normal((n_trials, len(CHANNELS), N_SAMPLES))
    white[..., 0] /= np.sqrt(1.0 - _AR_COEF**2)
    noise = mixing @ lfilter([np.sqrt(1.0 - _AR_COEF**2)], [1.0, -_AR_COEF], white, axis=-1)
    level = np.exp(rng.normal(0.0, 0.1))
    offset = 0.3 * (mixing @ rng.standard_normal(len(CHANNELS)))[:, None]
    epochs = offset + gain * signal + level * noise

    # Rejected epochs hold gross artefacts and are left out of the table; a few kept ones hold
    # large artefacts too, for robust fitting to deal with.
    n_rejected = int(rng.integers(0, int(_REJECT_MAX * n_trials) + 1))
    order = rng.permutation(n_trials)
    rejected, kept = np.sort(order[:n_rejected]), np.sort(order[n_rejected:])
    n_bad = min(len(kept), max(1, int(round(rng.uniform(0.01, 0.03) * n_trials))))
    bad = rng.choice(kept, size=n_bad, replace=False)
    epochs[rejected] += _artefacts(rng, n_rejected, 150.0, 300.0, neighbours)
    epochs[bad] += _artefacts(rng, n_bad, 50.0, 150.0, neighbours)
    # Blinks come from a stream of their own, so adding them left every other value unchanged.
    blink_rng = np.random.default_rng(seed_seq.spawn(1)[0])
    n_blink = int(round(blink_rng.uniform(*_BLINK_SHARE) * len(kept)))
    blinked = blink_rng.choice(kept, size=n_blink, replace=False)
    epochs[blinked] += _blinks(blink_rng, n_blink)

    table = pd.DataFrame({
        "artefact": np.isin(kept, bad) | np.isin(kept, blinked),
        "trial": kept + 1,
        "epoch": kept,
        "urgency": np.asarray(URGENCY_LEVELS, dtype=object)[urgency[kept]],
        "loudness_db": loudness[kept],
        "response_time": rt[kept],
    })
    return table, epochs.astype(np.float32)


def write_demo_study(directory: str | Path, *, n_subjects: int = 28, n_trials: int = 240,
                     seed: int = 20261201) -> Path:
    """Write the alarm-urgency demo study, with planted effects, in glmeeg's study layout.

    Parameters
    ----------
    directory : str or Path
        Folder to write into; created if missing. It must be empty or an earlier demo's folder
        (every file listed in its ``demo.json``, which the demo writes): nothing else is ever
        overwritten.
    n_subjects : int, default 28
        Number of volunteers, named ``s01``, ``s02`` ...; half pilots, half trainees.
    n_trials : int, default 240
        Epochs per volunteer (urgency levels balanced, random order). 0-15 % of them are rejected
        and left out of ``trials.csv``; the epoch arrays keep all of them.
    seed : int, default 20261201
        Seed of :class:`numpy.random.SeedSequence`. Each volunteer draws from its own child
        stream, so a volunteer's data do not depend on ``n_subjects``.

    Returns
    -------
    pathlib.Path
        Path of the written ``design.toml``.

    Raises
    ------
    ValueError
        ``n_subjects`` is not 2-99 or ``n_trials`` is less than 12.
    GlmeegError
        ``directory`` exists and is not a folder, or holds files the demo did not write.

    Notes
    -----
    Files: ``trials.csv`` (subject, trial, epoch, urgency, loudness_db, response_time; a few
    response times are empty), ``subjects.csv`` (subject, role, age), ``channels.tsv`` (name,
    x, y, z on the unit sphere), ``epochs/<subject>.npy`` (float32, trials x 32 channels x 250
    samples, µV, 250 Hz from -0.2 s), ``design.toml``. The planted truth is :data:`DEMO_TRUTH`;
    ``planted_artefacts.csv`` (subject, epoch) lists the kept trials that carry a large
    artefact: a blink (3-12 % of a volunteer's kept trials, 80-200 µV at the frontal pole,
    falling off over the scalp) or a spike or drift on 1-4 channels (1-3 %); ground truth for
    checks, never read by the analysis.

    Examples
    --------
    >>> import tempfile
    >>> with tempfile.TemporaryDirectory() as tmp:
    ...     design = write_demo_study(tmp, n_subjects=2, n_trials=30)
    ...     print(design.name, np.load(design.parent / "epochs" / "s01.npy").shape)
    design.toml (30, 32, 250)
    """
    if not 2 <= n_subjects <= 99:
        raise ValueError(f"n_subjects must be between 2 and 99, got {n_subjects}")
    if n_trials < 12:
        raise ValueError(f"n_trials must be at least 12, got {n_trials}")
    import shutil
    import tempfile

    root = check_demo_folder(directory)
    earlier = _earlier_demo_files(root)
    root.mkdir(parents=True, exist_ok=True)
    # Written into a hidden folder first and moved into place at the end, so an interrupted
    # demo never leaves a study that mixes two demos.
    stage = Path(tempfile.mkdtemp(prefix=".glmeeg-demo.", suffix=".partial", dir=root))
    try:
        design = _write_demo_files(stage, n_subjects=n_subjects, n_trials=n_trials, seed=seed)
        _move_into_place(stage, root, earlier)
    finally:
        shutil.rmtree(stage, ignore_errors=True)
    return root / design.name


def _write_demo_files(root: Path, *, n_subjects: int, n_trials: int, seed: int) -> Path:
    (root / "epochs").mkdir(parents=True, exist_ok=True)

    pos = np.array([standard_position(c) for c in CHANNELS])
    mixing = _noise_mixing()
    neighbours = np.argsort(((pos[:, None] - pos[None]) ** 2).sum(-1), axis=1)
    streams = np.random.SeedSequence(seed).spawn(n_subjects)
    ids = [f"s{i + 1:02d}" for i in range(n_subjects)]
    # Roles are balanced within consecutive pairs; the pair's first stream tosses the coin.
    roles, ages, tables = [], [], []
    for i, (sid, stream) in enumerate(zip(ids, streams)):
        person, data = stream.spawn(2)
        person_rng = np.random.default_rng(person)
        coin = bool(person_rng.random() < 0.5)  # drawn by everyone so streams stay aligned
        if i % 2 == 0:
            first_is_pilot = coin
        roles.append(ROLES[(i % 2) ^ int(not first_is_pilot)])
        # Pilots tend to be older than trainees; ages span 21-58.
        ages.append(int(person_rng.integers(27, 59) if roles[-1] == "pilot" else person_rng.integers(21, 46)))
        table, epochs = _subject(data, roles[-1], n_trials, mixing, neighbours)
        tables.append(table.assign(subject=sid))
        np.save(root / "epochs" / f"{sid}.npy", epochs, allow_pickle=False)

    trials = pd.concat(tables, ignore_index=True)
    # Ground truth of the simulation, kept apart from the data the analysis reads.
    trials.loc[trials["artefact"], ["subject", "epoch"]].to_csv(root / "planted_artefacts.csv", index=False)
    trials = trials[["subject", "trial", "epoch", "urgency", "loudness_db", "response_time"]]
    trials.to_csv(root / "trials.csv", index=False)
    pd.DataFrame({"subject": ids, "role": roles, "age": ages}).to_csv(root / "subjects.csv", index=False)
    pd.DataFrame({"name": CHANNELS, "x": pos[:, 0].round(6), "y": pos[:, 1].round(6),
                  "z": pos[:, 2].round(6)}).to_csv(root / "channels.tsv", sep="\t", index=False)
    design = root / "design.toml"
    design.write_text(DEMO_DESIGN, encoding="utf-8", newline="\n")
    return design
