"""Reading a study: trials table, subjects table, sensors table and per-subject epoch arrays.

This is the only stage that reads study files. Tables are read eagerly (they are small); epoch
arrays are opened memory-mapped and read one subject at a time, only the epochs the trials table
keeps. Every problem is reported as a :class:`~glmeeg.errors.StudyError` naming the file, subject,
row or column at fault.
"""

from __future__ import annotations

import csv
import os
import re
from collections import Counter
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np
import pandas as pd

from .axes import Axes
from .errors import StudyError
from .spec import DataSpec

__all__ = ["Study", "read_epoch_file", "read_neighbour_table", "read_study", "read_table"]

_SAFE_ID = re.compile(r"[A-Za-z0-9][A-Za-z0-9._-]{0,99}")  # used with fullmatch

# Bounds on a table, checked before pandas reads it (documented in the README).
MAX_TABLE_BYTES = 2**30
MAX_TABLE_COLUMNS = 5000
MAX_HEADER_CHARS = 2**20


def read_table(path: Path, *, sep: str, label: str, required: tuple[str, ...],
               text_columns: tuple[str, ...] = ()) -> pd.DataFrame:
    """Read a CSV/TSV table strictly: UTF-8, the expected separator, required columns present."""
    kind = "tab-separated" if sep == "\t" else "comma-separated"
    if path.is_dir():
        raise StudyError(f"{label}: is a folder ({path}); expected a {kind} table")
    if not path.is_file():
        raise StudyError(f"{label}: file not found ({path})")
    size = path.stat().st_size
    if size > MAX_TABLE_BYTES:
        raise StudyError(f"{label}: {size / 2**20:.0f} MiB; tables of more than "
                         f"{MAX_TABLE_BYTES // 2**20} MiB are not read")
    with open(path, "rb") as fh:
        head = fh.read(4 * MAX_HEADER_CHARS + 4)  # UTF-8: at most 4 bytes a character
    if b"\n" not in head and len(head) > 4 * MAX_HEADER_CHARS:
        raise StudyError(f"{label}: the header row is longer than {MAX_HEADER_CHARS} characters")
    raw = path.read_bytes()
    try:
        text = raw.decode("utf-8-sig")
    except UnicodeDecodeError as e:
        raise StudyError(f"{label}: not UTF-8 text (byte {e.start}); save the file as UTF-8") from None
    if not text.strip():
        raise StudyError(f"{label}: the file is empty; expected a {kind} table with a header row")
    end = text.find("\n", 0, MAX_HEADER_CHARS + 1)
    if end < 0 and len(text) > MAX_HEADER_CHARS:
        raise StudyError(f"{label}: the header row is longer than {MAX_HEADER_CHARS} characters")
    header = text[:end] if end >= 0 else text
    for other, name in ((";", "semicolons"), ("\t", "tabs"), (",", "commas")):
        if other != sep and other in header and sep not in header:
            raise StudyError(f"{label}: the header is separated by {name}; expected a {kind} table")
    # The width is bounded and repeated names are found on the header itself, before pandas
    # reads the table (pandas renames repeats 'a', 'a.1', which would hide them).
    try:
        names = [c.strip() for c in next(csv.reader([header.rstrip("\r")], delimiter=sep))]
    except (csv.Error, StopIteration) as e:
        raise StudyError(f"{label}: the header row cannot be read ({e})") from None
    if len(names) > MAX_TABLE_COLUMNS:
        raise StudyError(f"{label}: {len(names)} columns; tables may have at most {MAX_TABLE_COLUMNS}")
    counts = Counter(names)
    dupes = sorted(c for c, k in counts.items() if k > 1)
    if dupes:
        raise StudyError(f"{label}: repeated column name(s) {', '.join(dupes[:10])}")
    try:
        table = pd.read_csv(path, sep=sep, dtype={c: str for c in text_columns},
                            keep_default_na=True, encoding="utf-8-sig", quoting=csv.QUOTE_MINIMAL)
    except (pd.errors.ParserError, pd.errors.EmptyDataError, ValueError) as e:
        raise StudyError(f"{label}: cannot be read as a {kind} table: {str(e).splitlines()[0]}") from None
    table.columns = [str(c).strip() for c in table.columns]
    if len(set(table.columns)) != len(table.columns):
        raise StudyError(f"{label}: repeated column names")
    table = _unprefix_text(table)
    missing = [c for c in required if c not in table.columns]
    if missing:
        raise StudyError(f"{label}: no column {', '.join(map(repr, missing))} "
                         f"(columns: {', '.join(table.columns)})")
    if table.shape[0] == 0:
        raise StudyError(f"{label}: has a header but no rows")
    return table


def _unprefix_text(table: pd.DataFrame) -> pd.DataFrame:
    """Remove the ``'`` that glmeeg's CSV writer puts before text starting like a spreadsheet
    formula (:func:`glmeeg.results.csv_safe`), so its tables read back as written."""
    for col in table.columns:
        if not (table[col].dtype == object or pd.api.types.is_string_dtype(table[col])):
            continue
        values = table[col]
        marked = values.map(lambda v: isinstance(v, str) and len(v) > 1 and v[0] == "'"
                            and v[1] in "=+-@\t\r")
        if marked.any():
            table[col] = values.where(~marked, values.map(lambda v: v[1:] if isinstance(v, str) else v))
    return table


@dataclass(frozen=True)
class Study:
    """A study's tables, axes and (unread) epoch files.

    Attributes
    ----------
    trials : pandas.DataFrame
        The trials table with ``subject`` as text and ``epoch`` as the 0-based index of each row's
        epoch in its subject's array (filled in from the row order when the table has none).
    subjects : pandas.DataFrame
        One row per subject that has trials, index ``subject``; the subjects table's columns.
    sensors : pandas.DataFrame
        The sensors table (``name`` and optional ``x``, ``y``, ``z``).
    axes : Axes
    subject_ids : tuple of str
        Subjects in analysis order (the subjects table's order, else first appearance).
    epoch_files : dict
        Subject -> path of its epoch array.
    epoch_counts : dict
        Subject -> number of epochs in its array.
    input_files : dict
        Label -> path of every file the study reads (for provenance).
    warnings : tuple of str
    epoch_itemsizes : dict
        Subject -> bytes per value of its epoch array (4 for float32, 8 for float64).
    """

    root: Path
    trials: pd.DataFrame
    subjects: pd.DataFrame
    sensors: pd.DataFrame
    axes: Axes
    subject_ids: tuple[str, ...]
    epoch_files: dict[str, Path]
    epoch_counts: dict[str, int]
    input_files: dict[str, Path]
    warnings: tuple[str, ...] = field(default=())
    epoch_itemsizes: dict[str, int] = field(default_factory=dict)

    def subject_trials(self, subject: str) -> pd.DataFrame:
        """The trials-table rows of one subject, in table order."""
        return self.trials[self.trials["subject"] == subject]

    def epoch_label(self, subject: str) -> str:
        return _relative(self.epoch_files[subject], self.root)

    def read_epochs(self, subject: str, epochs: np.ndarray) -> np.ndarray:
        """Epochs ``epochs`` (0-based indices) of one subject as ``(len(epochs), n_points)``.

        The array keeps its on-disk dtype (float32 or float64); conversion to float64 happens
        block by block in the fit.
        """
        return read_epoch_file(self.epoch_files[subject], epochs, subject=subject,
                               label=self.epoch_label(subject))


def read_epoch_file(path: str | Path, epochs: np.ndarray, *, subject: str, label: str) -> np.ndarray:
    """Epochs ``epochs`` of one epoch file as ``(len(epochs), n_points)``, in the file's dtype.

    The file is memory-mapped. When every epoch is used in file order the mapping itself is
    returned (nothing is copied: the fit streams it from disk); otherwise the chosen epochs are
    copied out.
    """
    arr = _open_epochs(Path(path), subject, label)
    idx = np.asarray(epochs, dtype=np.intp)
    if arr.dtype.isnative and idx.size == arr.shape[0] and np.array_equal(idx, np.arange(idx.size)):
        return arr.reshape(arr.shape[0], -1)
    data = np.asarray(arr[idx])
    if not data.dtype.isnative:  # arrays written on a big-endian machine
        data = data.astype(data.dtype.newbyteorder("="))
    return data.reshape(data.shape[0], -1)


def _relative(path: Path, root: Path) -> str:
    try:
        return str(path.relative_to(root))
    except ValueError:
        return str(path)


@dataclass(frozen=True)
class _Header:
    shape: tuple[int, ...]
    dtype: np.dtype

    @property
    def ndim(self) -> int:
        return len(self.shape)


def _epoch_header(path: Path, subject: str, label: str) -> _Header:
    """Shape and dtype of an epoch array from its .npy header alone (the file is closed after)."""
    if not path.is_file():
        raise StudyError(f"subject {subject}: epoch file {label} not found")
    readers = {(1, 0): np.lib.format.read_array_header_1_0, (2, 0): np.lib.format.read_array_header_2_0}
    try:
        with open(path, "rb") as fh:
            version = np.lib.format.read_magic(fh)
            reader = readers.get(version)
            if reader is None:  # numpy writes 1.0 or 2.0 for every plain float array
                raise StudyError(f"subject {subject}: {label} is not a readable NumPy .npy "
                                 f"array (format version {version[0]}.{version[1]}; expected "
                                 "1.0 or 2.0, as numpy.save writes a plain float array)")
            shape, _, dtype = reader(fh)
    except StudyError:
        raise
    except (ValueError, OSError, EOFError) as e:
        raise StudyError(f"subject {subject}: {label} is not a readable NumPy .npy array "
                         f"({str(e).splitlines()[0] if str(e) else type(e).__name__})") from None
    if dtype.hasobject:
        raise StudyError(f"subject {subject}: {label} holds Python objects (a pickle); expected "
                         "a plain float32 or float64 array")
    if dtype.kind != "f" or dtype.itemsize not in (4, 8):
        raise StudyError(f"subject {subject}: {label} has dtype {dtype}; expected float32 or float64")
    expected = int(np.prod(shape)) * dtype.itemsize
    if path.stat().st_size < expected:
        raise StudyError(f"subject {subject}: {label} is truncated: its header promises {expected} "
                         "bytes of data")
    return _Header(shape=tuple(int(x) for x in shape), dtype=dtype)


def _open_epochs(path: Path, subject: str, label: str) -> np.ndarray:
    if not path.is_file():
        raise StudyError(f"subject {subject}: epoch file {label} not found")
    try:
        arr = np.load(path, mmap_mode="r", allow_pickle=False)
    except ValueError as e:
        if "pickle" in str(e).lower() or "object" in str(e).lower():
            raise StudyError(f"subject {subject}: {label} holds Python objects (a pickle); expected "
                             "a plain float32 or float64 array") from None
        raise StudyError(f"subject {subject}: {label} is not a readable NumPy .npy array "
                         f"({str(e).splitlines()[0]})") from None
    except (OSError, EOFError) as e:
        raise StudyError(f"subject {subject}: {label} is not a readable NumPy .npy array "
                         f"({str(e).splitlines()[0] if str(e) else type(e).__name__})") from None
    if not isinstance(arr, np.ndarray):
        raise StudyError(f"subject {subject}: {label} is an archive of several arrays; expected one .npy array")
    if arr.dtype.kind != "f" or arr.dtype.itemsize not in (4, 8):
        raise StudyError(f"subject {subject}: {label} has dtype {arr.dtype}; expected float32 or float64")
    return arr


def _resolve(root: Path, rel: str) -> Path:
    p = Path(rel)
    return p if p.is_absolute() else root / p


def _subject_column(table: pd.DataFrame, label: str) -> pd.Series:
    s = table["subject"]
    bad = s.isna() | (s.astype(str).str.strip() == "")
    if bad.any():
        row = int(np.flatnonzero(bad.to_numpy())[0]) + 2
        raise StudyError(f"{label} row {row}: empty subject id")
    s = s.astype(str).str.strip()
    unsafe = [x for x in s.unique() if not _SAFE_ID.fullmatch(x)]
    if unsafe:
        raise StudyError(f"{label}: subject id {unsafe[0]!r} must be letters, digits, '.', '_' or '-' "
                         "(it becomes part of a file name)")
    return s


def read_study(spec: DataSpec, *, root: str | Path) -> Study:
    """Read and cross-check a study's files.

    Parameters
    ----------
    spec : DataSpec
        The ``[data]`` table of a design file.
    root : str or Path
        Folder the paths in ``spec`` are relative to (the design file's folder).

    Returns
    -------
    Study

    Raises
    ------
    StudyError
        A file is missing, empty, not UTF-8, wrongly separated, lacks a required column; subject
        ids are empty, repeated (subjects table) or unsafe; an epoch file is missing, pickled, of
        the wrong dtype, dimension or shape; the ``epoch`` column is out of range or repeated;
        the number of channels or frequencies does not match the data.
    """
    root = Path(os.path.abspath(root))  # absolute: the working folder may be replaced by the run
    files: dict[str, Path] = {}
    warnings: list[str] = []

    trials_path = _resolve(root, spec.trials)
    trials = read_table(trials_path, sep=",", label=spec.trials, required=("subject",),
                        text_columns=("subject",))
    trials["subject"] = _subject_column(trials, spec.trials)
    files["trials"] = trials_path
    subjects = _subjects_table(spec, root, list(dict.fromkeys(trials["subject"])), files, warnings)
    order = list(subjects["subject"])
    sensors = _sensors_table(spec, root, files)
    epochs = _epoch_headers(spec, root, order, n_channels=len(sensors))
    files.update({f"epochs:{s}": path for s, path in epochs.files.items()})
    trials["epoch"] = _epoch_column(trials, spec, epochs, root)
    n_times = epochs.shape[-1]
    times = tuple(float(t) for t in np.round(spec.time_start + np.arange(n_times) / spec.sampling_rate, 12))
    axes = Axes(channels=tuple(sensors["name"]), times=times,
                frequencies=tuple(spec.frequencies) if spec.frequencies is not None else None)
    return Study(root=root, trials=trials, subjects=subjects, sensors=sensors, axes=axes,
                 subject_ids=tuple(order), epoch_files=epochs.files, epoch_counts=epochs.counts,
                 input_files=files, warnings=tuple(warnings), epoch_itemsizes=epochs.itemsizes)




def _subjects_table(spec: DataSpec, root: Path, order: list[str], files: dict, warnings: list) -> pd.DataFrame:
    """The subjects table (or one made of the trials' subjects), rows in the study's order:
    subjects without trials are left out with a warning."""
    if spec.subjects is not None:
        subj_path = _resolve(root, spec.subjects)
        subjects = read_table(subj_path, sep=",", label=spec.subjects, required=("subject",),
                              text_columns=("subject",))
        subjects["subject"] = _subject_column(subjects, spec.subjects)
        dupes = subjects["subject"][subjects["subject"].duplicated()].unique()
        if len(dupes):
            raise StudyError(f"{spec.subjects}: subject {dupes[0]} is listed more than once")
        files["subjects"] = subj_path
        listed = set(subjects["subject"])
        unknown = [s for s in order if s not in listed]
        if unknown:
            raise StudyError(f"subject {unknown[0]} has trials in {spec.trials} but no row in {spec.subjects}")
        without = [s for s in subjects["subject"] if s not in set(order)]
        if without:
            warnings.append(f"{len(without)} subject(s) of {spec.subjects} have no trials and are "
                            f"left out: {', '.join(without[:10])}")
        subjects = subjects[subjects["subject"].isin(set(order))]
        order = list(subjects["subject"])
        subjects = subjects.set_index("subject", drop=False)
    else:
        subjects = pd.DataFrame({"subject": order}, index=pd.Index(order, name=None))
    subjects.index.name = None

    return subjects


def _sensors_table(spec: DataSpec, root: Path, files: dict) -> pd.DataFrame:
    """The sensors table: names non-empty and unique, positions numeric."""
    chan_path = _resolve(root, spec.channels)
    sensors = read_table(chan_path, sep="\t", label=spec.channels, required=("name",),
                         text_columns=("name",))
    empty = sensors["name"].isna() | (sensors["name"].astype(str).str.strip() == "")
    if empty.any():
        raise StudyError(f"{spec.channels} row {int(np.flatnonzero(empty.to_numpy())[0]) + 2}: empty channel name")
    sensors["name"] = sensors["name"].astype(str).str.strip()
    if sensors["name"].duplicated().any():
        raise StudyError(f"{spec.channels}: channel {sensors['name'][sensors['name'].duplicated()].iloc[0]} "
                         "is listed more than once")
    for c in ("x", "y", "z"):
        if c in sensors.columns and not pd.api.types.is_numeric_dtype(sensors[c]):
            raise StudyError(f"{spec.channels}: column {c!r} must hold numbers (sensor positions)")
    files["channels"] = chan_path

    return sensors


@dataclass(frozen=True)
class _EpochHeaders:
    """What the epoch files' headers say: path, epoch count and item size per subject, and the
    shape of one epoch (the same for every subject)."""

    files: dict[str, Path]
    counts: dict[str, int]
    itemsizes: dict[str, int]
    shape: tuple[int, ...]


def _epoch_headers(spec: DataSpec, root: Path, order: list[str], *, n_channels: int) -> _EpochHeaders:
    """Every subject's epoch array header, checked against the sensors, the frequencies and the
    first subject's shape (nothing but the headers is read)."""
    epoch_files: dict[str, Path] = {}
    counts: dict[str, int] = {}
    itemsizes: dict[str, int] = {}
    shape0: tuple[int, ...] | None = None
    first = ""
    for s in order:
        path = _resolve(root, spec.epochs.format(subject=s))
        label = _relative(path, root)
        arr = _epoch_header(path, s, label)
        itemsizes[s] = int(np.dtype(arr.dtype).itemsize)
        if arr.ndim not in (3, 4):
            raise StudyError(f"subject {s}: {label} has {arr.ndim} dimensions; expected 3 (epochs, "
                             "channels, times) or 4 (epochs, channels, frequencies, times)")
        if 0 in arr.shape[1:]:
            raise StudyError(f"subject {s}: {label} has shape {arr.shape}; every dimension but the "
                             "first (epochs) must be at least 1")
        if shape0 is None:
            shape0, first = arr.shape[1:], s
            if arr.shape[1] != n_channels:
                raise StudyError(f"subject {s}: {label} has {arr.shape[1]} channels; {spec.channels} "
                                 f"lists {n_channels}")
            if arr.ndim == 4 and spec.frequencies is None:
                raise StudyError(f"subject {s}: {label} is 4-D (epochs, channels, frequencies, times); "
                                 "give data.frequencies in the design file")
            if arr.ndim == 3 and spec.frequencies is not None:
                raise StudyError(f"subject {s}: {label} is 3-D but data.frequencies is set; leave it "
                                 "out for channel x time data")
            if arr.ndim == 4 and arr.shape[2] != len(spec.frequencies):
                raise StudyError(f"subject {s}: {label} has {arr.shape[2]} frequencies; "
                                 f"data.frequencies lists {len(spec.frequencies)}")
        elif arr.shape[1:] != shape0:
            raise StudyError(f"subject {s}: {label} has epochs of shape {arr.shape[1:]}; subject "
                             f"{first} has {shape0}")
        epoch_files[s] = path
        counts[s] = int(arr.shape[0])

    return _EpochHeaders(files=epoch_files, counts=counts, itemsizes=itemsizes, shape=shape0)


def _epoch_column(trials: pd.DataFrame, spec: DataSpec, epochs: _EpochHeaders, root: Path) -> pd.Series:
    """Which epoch each trials row refers to: the ``epoch`` column checked, or the rows' order."""
    counts, epoch_files = epochs.counts, epochs.files
    if "epoch" in trials.columns:
        ep = pd.to_numeric(trials["epoch"], errors="coerce")
        bad = ep.isna() | (ep != np.floor(ep)) | (ep < 0)
        if bad.any():
            row = int(np.flatnonzero(bad.to_numpy())[0])
            raise StudyError(f"{spec.trials} row {row + 2}: epoch {str(trials['epoch'].iloc[row])!r} is "
                             "not a non-negative whole number")
        ep = ep.astype(np.int64)
        for s, e in ep.groupby(trials["subject"], sort=False):
            e = e.to_numpy()
            if e.max() >= counts[s]:
                raise StudyError(f"subject {s}: {spec.trials} refers to epoch {int(e.max())} but "
                                 f"{_relative(epoch_files[s], root)} has {counts[s]} epochs (0-based indices)")
            if len(np.unique(e)) != len(e):
                dup = pd.Series(e)[pd.Series(e).duplicated()].iloc[0]
                raise StudyError(f"subject {s}: {spec.trials} lists epoch {int(dup)} more than once")
    else:
        for s, rows in trials.groupby("subject", sort=False):
            if len(rows) != counts[s]:
                raise StudyError(f"subject {s}: {_relative(epoch_files[s], root)} has {counts[s]} epochs, "
                                 f"{spec.trials} lists {len(rows)} rows for {s} (add an 'epoch' column "
                                 "to map rows to epochs when some were rejected)")
        ep = trials.groupby("subject", sort=False).cumcount().astype(np.int64)
    return ep


def read_neighbour_table(path: str | Path, *, label: str) -> pd.DataFrame:
    """Read a neighbour file: which sensors are neighbours of which.

    Parameters
    ----------
    path : str or Path
        A comma-separated UTF-8 table with a header row and the columns ``channel`` and
        ``neighbour`` (channel names, read as text, so a channel called ``1`` stays ``"1"``);
        other columns are ignored. One row per pair of neighbours, in either or both directions
        (see :func:`glmeeg.sensors.neighbours_from_table`).
    label : str
        The file's name as the user wrote it (the design file's ``[data] neighbours``), for
        messages.

    Returns
    -------
    pandas.DataFrame
        The table as read; the names are checked against the sensors table by
        :func:`glmeeg.sensors.sensor_graph`.

    Raises
    ------
    StudyError
        The file is missing, empty, not UTF-8, not comma-separated, or lacks a column.
    """
    return read_table(Path(path), sep=",", label=label, required=("channel", "neighbour"),
                      text_columns=("channel", "neighbour"))
