"""A cached subject fit is used only once it passes every check; anything else is refitted.

A small study is run once so that ``OUT/subject-fits`` holds one entry per subject. Each case
copies that output folder, forges or damages subject s03's entry, and re-runs ``glmeeg run``:
the run must exit 0 with results bitwise equal to the original run's, print exactly one note
line naming s03 and the reason (no traceback), and leave a valid entry in place of the forged
one. The deflate bomb runs in a child process under an address-space limit, so that inflating
it, or allocating the array its header declares, fails the test.
"""

from __future__ import annotations

import hashlib
import io
import json
import logging
import os
import shutil
import struct
import subprocess
import sys
import zipfile
import zlib
from pathlib import Path
from types import SimpleNamespace

import numpy as np
import pytest
from numpy.lib import format as npy_format
from typer.testing import CliRunner

from glmeeg.testing import HANG_TIMEOUT, SMALL_STUDY, run_glmeeg, write_study
from glmeeg.subject_level.cache import CACHE_FOLDER, FitCache
from glmeeg.cli import app
from glmeeg.results import load_test_results
from glmeeg.subject_level.jobs import FIT_FORMAT, SubjectFit

# SMALL_STUDY: 6 subjects x 12 trials x 3 channels x 5 times; every run takes about a second.
SHAPE = (4, 15)  # design columns (intercept, b, c, intensity) x points (3 channels x 5 times)
VICTIM = "s03"


def _arrays(folder: Path) -> dict:
    out = {}
    for t in load_test_results(folder):
        for name in ("estimate", "statistic", "p", "p_corrected", "subject_estimates"):
            a = getattr(t, name)
            if a is not None:
                out[(t.name, name)] = a.tobytes()
    return out


def _read_entry(path: Path) -> tuple[np.ndarray, dict]:
    """Betas and metadata of an entry glmeeg wrote (trusted: the original run's)."""
    with np.load(path, allow_pickle=False) as z:
        return np.array(z["betas"]), json.loads(str(z["meta"][()]))


def _npy(array: np.ndarray) -> bytes:
    buf = io.BytesIO()
    npy_format.write_array(buf, array, allow_pickle=False)
    return buf.getvalue()


def _meta_npy(meta) -> bytes:
    return _npy(np.array(meta if isinstance(meta, str) else json.dumps(meta, sort_keys=True)))


def _write_zip(path: Path, members: dict[str, bytes], *, compress: set[str] = frozenset()) -> None:
    with zipfile.ZipFile(path, "w") as zf:
        for name, data in members.items():
            zf.writestr(name, data, compress_type=zipfile.ZIP_DEFLATED if name in compress else zipfile.ZIP_STORED)


def _write_entry(path: Path, betas: np.ndarray, meta, **kw) -> None:
    _write_zip(path, {"betas.npy": _npy(betas), "meta.npy": _meta_npy(meta)}, **kw)


def _sha(betas: np.ndarray) -> str:
    return hashlib.sha256(np.ascontiguousarray(betas, dtype="<f8").tobytes()).hexdigest()


@pytest.fixture(scope="module")
def original(tmp_path_factory) -> SimpleNamespace:
    root = tmp_path_factory.mktemp("cache-integrity")
    design = write_study(root / "study", **SMALL_STUDY)
    out = root / "out"
    result = CliRunner().invoke(app, ["run", str(design), "--out", str(out), "-q", "--no-report"])
    assert result.exit_code == 0, result.output
    entries = {}
    for path in (out / CACHE_FOLDER).glob("*.npz"):
        betas, meta = _read_entry(path)
        entries[meta["subject"]] = SimpleNamespace(path=path, key=path.stem, betas=betas, meta=meta)
    assert sorted(entries) == [f"s{i:02d}" for i in range(1, 7)]
    assert entries[VICTIM].betas.shape == SHAPE
    return SimpleNamespace(design=design, out=out, arrays=_arrays(out), entries=entries)


# --- the forgeries ---------------------------------------------------------------------------
# Each is called as forge(path, entry, entries) on s03's entry in a copy of the output folder.

def _times_1000(path, e, _):  # the digest kept from the original
    _write_entry(path, e.betas * 1000, e.meta)


def _nan(path, e, _):  # with its own digest: the finiteness check must refuse it
    b = e.betas.copy()
    b[1, 3] = np.nan
    _write_entry(path, b, {**e.meta, "sha256": _sha(b)})


def _inf(path, e, _):
    b = e.betas.copy()
    b[0, 0] = -np.inf
    _write_entry(path, b, {**e.meta, "sha256": _sha(b)})


def _wrong_shape(path, e, _):  # consistent with its metadata and digest
    b = np.ascontiguousarray(e.betas[:, :-1])
    _write_entry(path, b, {**e.meta, "sha256": _sha(b), "shape": list(b.shape)})


def _wrong_shape_header_only(path, e, _):  # metadata claims the expected shape
    b = np.ascontiguousarray(e.betas[:-1])
    _write_entry(path, b, {**e.meta, "sha256": _sha(b)})


def _transposed(path, e, _):  # same bytes, same digest, another shape
    b = np.ascontiguousarray(e.betas).reshape(SHAPE[::-1])
    _write_entry(path, b, {**e.meta, "shape": list(b.shape)})


def _fortran_order(path, e, _):
    _write_entry(path, np.asfortranarray(e.betas), e.meta)


def _float32(path, e, _):
    b = e.betas.astype(np.float32)
    _write_entry(path, b, {**e.meta, "sha256": hashlib.sha256(b.tobytes()).hexdigest()})


def _big_endian(path, e, _):  # the same values, another byte order
    _write_entry(path, e.betas.astype(">f8"), e.meta)


def _meta(**changes):
    def forge(path, e, _):
        _write_entry(path, e.betas, {**e.meta, **changes})
    return forge


def _meta_text(text):
    def forge(path, e, _):
        _write_entry(path, e.betas, text)
    return forge


def _other_subjects_entry(path, e, entries):  # a whole valid entry, of s04, under s03's key
    shutil.copyfile(entries["s04"].path, path)


def _not_a_zip(path, e, _):
    path.write_bytes(b"not a zip file at all\n" * 40)


def _empty(path, e, _):
    path.write_bytes(b"")


def _extra_member(path, e, _):
    _write_zip(path, {"betas.npy": _npy(e.betas), "meta.npy": _meta_npy(e.meta), "extra.npy": _npy(e.betas)})


def _duplicate_member(path, e, _):
    with pytest.warns(UserWarning, match="Duplicate name"):
        _write_zip(path, {"betas.npy": _npy(e.betas), "meta.npy": _meta_npy(e.meta)})
        with zipfile.ZipFile(path, "a") as zf:
            zf.writestr("betas.npy", _npy(e.betas * 2))


def _member_too_large(path, e, _):  # betas.npy far beyond header + 4 x 15 x 8 bytes
    _write_zip(path, {"betas.npy": _npy(e.betas) + bytes(32 * 1024), "meta.npy": _meta_npy(e.meta)})


def _trailing_bytes(path, e, _):  # within the size bound, but more than the array
    _write_zip(path, {"betas.npy": _npy(e.betas) + bytes(8), "meta.npy": _meta_npy(e.meta)})


def _meta_too_large(path, e, _):  # over the metadata's 64 KiB, the file within its bound
    _write_entry(path, e.betas, {**e.meta, "subject": "s03" + " " * 16_200})


def _file_too_large(path, e, _):  # a valid archive behind 1 MiB of padding (zip allows that)
    path.write_bytes(bytes(1 << 20) + e.path.read_bytes())


def _compressed_meta(path, e, _):  # small and otherwise valid, but not glmeeg's layout
    _write_entry(path, e.betas, e.meta, compress={"meta.npy"})


def _compressed_betas(path, e, _):
    _write_entry(path, e.betas, e.meta, compress={"betas.npy"})


def _small_bomb(path, e, _):  # a deflated betas member declaring 64 MB, within the file bound
    header = io.BytesIO()
    npy_format.write_array_header_1_0(header, {"shape": (4, 2 * 10**6), "fortran_order": False,
                                               "descr": "<f8"})
    _write_zip(path, {"betas.npy": header.getvalue() + bytes(64 * 10**6), "meta.npy": _meta_npy(e.meta)},
               compress={"betas.npy"})


def _deep_json(path, e, _):
    _write_entry(path, e.betas, "[" * 5_000 + "]" * 5_000)


def _bad_code_point(path, e, _):  # a '<U' string holding 0xFFFFFFFF, not a character
    good = _meta_npy(e.meta)
    _write_zip(path, {"betas.npy": _npy(e.betas), "meta.npy": good[:-4] + b"\xff\xff\xff\xff"})


FORGERIES = {
    "times-1000": (_times_1000, "digest mismatch"),
    "nan": (_nan, "NaN or infinite"),
    "inf": (_inf, "NaN or infinite"),
    "wrong-shape": (_wrong_shape, "shape [4, 14], expected [4, 15]"),
    "wrong-shape-header": (_wrong_shape_header_only, "shape (3, 15)"),
    "transposed": (_transposed, "shape [15, 4]"),
    "fortran-order": (_fortran_order, "Fortran order"),
    "float32": (_float32, "<f4 array"),
    "big-endian": (_big_endian, ">f8 array"),
    "df-resid-string": (_meta(df_resid="7"), "df_resid '7'"),
    "df-resid-bool": (_meta(df_resid=True), "'df_resid' holds a bool"),
    "df-resid-negative": (_meta(df_resid=-1), "df_resid -1"),
    "df-resid-float": (_meta(df_resid=7.0), "'df_resid' holds a float"),
    "df-resid-nested": (_meta(df_resid={"value": 7}), "'df_resid' holds a dict"),
    "nested-list": (_meta(robust_iterations_max=[1, [2]]), "'robust_iterations_max' holds a list"),
    "robust-half": (_meta(robust_iterations_max=3), "robust fields (3, None)"),
    "unconverged-too-many": (_meta(robust_iterations_max=3, robust_unconverged_points=16),
                             "robust_unconverged_points 16, more than the 15 points"),
    "shape-nested": (_meta(shape=[4, [15]]), "'shape' holds a list"),
    "extra-field": (_meta(note={"a": 1}), "unexpected: 'note'"),
    "missing-field": (_meta_text('{"format": 2}'), "missing"),
    "not-an-object": (_meta_text("[1, 2]"), "JSON list"),
    "not-json": (_meta_text("{df_resid: 7"), "JSONDecodeError"),
    "duplicate-field": (_meta_text('{"df_resid": 7, "df_resid": 8}'), "repeats a field"),
    "deep-json": (_deep_json, "RecursionError"),
    "bad-code-point": (_bad_code_point, "UnicodeDecodeError"),
    "bad-digest-text": (_meta(sha256="x" * 64), "not a SHA-256"),
    "wrong-key": (_meta(key="0" * 64), "metadata key"),
    "old-format": (_meta(format=FIT_FORMAT - 1), f"metadata format {FIT_FORMAT - 1}, expected {FIT_FORMAT}"),
    "other-subject": (_other_subjects_entry, "metadata subject 's04', expected 's03'"),
    "not-a-zip": (_not_a_zip, "BadZipFile"),
    "empty-file": (_empty, "BadZipFile"),
    "extra-member": (_extra_member, "'extra.npy'"),
    "duplicate-member": (_duplicate_member, "members ['betas.npy', 'betas.npy', 'meta.npy']"),
    "member-too-large": (_member_too_large, "betas.npy declares"),
    "trailing-bytes": (_trailing_bytes, "bytes after the data"),
    "meta-too-large": (_meta_too_large, "meta.npy declares"),
    "file-too-large": (_file_too_large, "file of 10"),
    "compressed-meta": (_compressed_meta, "meta.npy is compressed"),
    "compressed-betas": (_compressed_betas, "betas.npy is compressed"),
    "small-bomb": (_small_bomb, "betas.npy is compressed"),
}


def _check_rerun(original, out: Path, stderr: str, reason: str) -> None:
    """Results as the original run's, one note naming s03 and the reason, a valid entry again."""
    victim = original.entries[VICTIM]
    notes = [line for line in stderr.splitlines() if "cached fit" in line]
    assert len(notes) == 1, stderr
    assert notes[0].startswith(f"glmeeg: subject {VICTIM}: cached fit {victim.key[:12]} "), notes[0]
    assert notes[0].endswith("; refitting") and reason in notes[0], notes[0]
    # Nothing else on stderr but the progress line.
    assert [line for line in stderr.splitlines() if line not in notes] == \
        [line for line in stderr.splitlines() if line.startswith("fitting subjects: 6/6 done")], stderr
    assert _arrays(out) == original.arrays
    betas, meta = _read_entry(out / CACHE_FOLDER / f"{victim.key}.npz")
    assert betas.tobytes() == victim.betas.tobytes() and meta == victim.meta
    fit = FitCache(out / CACHE_FOLDER).load(victim.key, subject=VICTIM, shape=SHAPE)
    assert fit is not None and fit.betas.tobytes() == victim.betas.tobytes()


@pytest.mark.parametrize("case", list(FORGERIES))
def test_forged_entry_is_refitted_with_one_note(original, tmp_path, case):
    forge, reason = FORGERIES[case]
    out = tmp_path / "out"
    shutil.copytree(original.out, out)
    victim = original.entries[VICTIM]
    forge(out / CACHE_FOLDER / f"{victim.key}.npz", victim, original.entries)
    result = CliRunner().invoke(app, ["run", str(original.design), "--out", str(out), "--no-report"])
    assert result.exit_code == 0, result.output
    assert "Traceback" not in result.output and result.exception is None
    _check_rerun(original, out, result.stderr, reason)


# The CLI in a child process limited to LIMIT bytes of address space (the CLI needs about
# 0.7 GB of it, mostly shared libraries); it writes its peak resident memory (KiB) to argv[4].
LIMIT = 3 * 2**30 // 2
RUN_LIMITED = """\
import resource, sys
limit, design, out, peak = sys.argv[1:]
resource.setrlimit(resource.RLIMIT_AS, (int(limit), int(limit)))
import glmeeg.cli as cli
sys.argv = ["glmeeg", "run", design, "--out", out, "--no-report"]
try:
    cli.main()
finally:
    with open(peak, "w") as fh:
        fh.write(str(resource.getrusage(resource.RUSAGE_SELF).ru_maxrss))
"""
BOMB_SHAPE = (5, 5 * 10**7)  # 2 GB of float64 zeros: more than LIMIT, inflated or allocated


def _zip_member(name: bytes, method: int, crc: int, data: bytes, size: int, offset: int):
    """Local header + data, and the central-directory record, of one zip member (APPNOTE 4.3;
    every size below 4 GiB, so no zip64 record)."""
    fields = (20, 0, method, 0, 0x21, crc, len(data), size, len(name))  # version 2.0, 1980-01-01
    local = struct.pack("<IHHHHHIIIHH", 0x04034B50, *fields, 0) + name + data
    central = struct.pack("<IHHHHHHIIIHHHHHII", 0x02014B50, 20, *fields, 0, 0, 0, 0, 0, offset) + name
    return local, central


def _deflate_bomb(path: Path, meta: dict) -> None:
    """An entry whose betas member inflates to BOMB_SHAPE zeros; about 2 MB on disk.

    Deflating 2 GB takes seconds, so 16 MiB of zeros are deflated once and the block repeated:
    after a full flush the compressor starts afresh, so each chunk's block is the same bytes and
    the blocks concatenate into one valid stream (RFC 1951; zlib's Z_FULL_FLUSH)."""
    header = io.BytesIO()
    npy_format.write_array_header_1_0(header, {"shape": BOMB_SHAPE, "fortran_order": False,
                                               "descr": "<f8"})
    chunk = bytes(1 << 24)
    repeats, rest = divmod(8 * BOMB_SHAPE[0] * BOMB_SHAPE[1], len(chunk))
    deflate = zlib.compressobj(6, zlib.DEFLATED, -15)  # raw deflate, as zip members are
    head = deflate.compress(header.getvalue()) + deflate.flush(zlib.Z_FULL_FLUSH)
    block = deflate.compress(chunk) + deflate.flush(zlib.Z_FULL_FLUSH)
    data = head + block * repeats + deflate.compress(bytes(rest)) + deflate.flush()
    crc = zlib.crc32(header.getvalue())
    for _ in range(repeats):
        crc = zlib.crc32(chunk, crc)
    crc = zlib.crc32(bytes(rest), crc)
    size = len(header.getvalue()) + repeats * len(chunk) + rest
    meta_bytes = _meta_npy(meta)
    betas = _zip_member(b"betas.npy", 8, crc, data, size, 0)
    stored = _zip_member(b"meta.npy", 0, zlib.crc32(meta_bytes), meta_bytes, len(meta_bytes),
                         len(betas[0]))
    central = betas[1] + stored[1]
    end = struct.pack("<IHHHHIIH", 0x06054B50, 0, 0, 2, 2, len(central),
                      len(betas[0]) + len(stored[0]), 0)
    path.write_bytes(betas[0] + stored[0] + central + end)


@pytest.mark.slow  # a real glmeeg process
def test_deflate_bomb_is_refused_before_inflating(original, tmp_path):
    out = tmp_path / "out"
    shutil.copytree(original.out, out)
    victim = original.entries[VICTIM]
    path = out / CACHE_FOLDER / f"{victim.key}.npz"
    _deflate_bomb(path, victim.meta)
    assert path.stat().st_size < 3 * 2**20
    with zipfile.ZipFile(path) as zf:
        assert zf.getinfo("betas.npy").file_size > LIMIT
    peak = tmp_path / "peak"
    proc = subprocess.run([sys.executable, "-c", RUN_LIMITED, str(LIMIT), str(original.design), str(out),
                           str(peak)], capture_output=True, text=True, timeout=HANG_TIMEOUT)
    assert proc.returncode == 0, proc.stderr[-3000:]
    assert "Traceback" not in proc.stderr
    # Refused on the file's size (2 MB where the shape allows 70 kB) before the zip is opened;
    # were that check gone, the compressed member would be refused before inflating.
    _check_rerun(original, out, proc.stderr, "file of ")
    assert int(peak.read_text()) * 1024 < LIMIT  # implied by the limit; the figure is in the report


@pytest.mark.slow  # a real glmeeg process
def test_file_that_is_not_an_entry_is_refitted_in_a_real_process(original, tmp_path):
    """Outside the test runner too (the real stderr, warnings shown): one note line."""
    out = tmp_path / "out"
    shutil.copytree(original.out, out)
    victim = original.entries[VICTIM]
    _times_1000(out / CACHE_FOLDER / f"{victim.key}.npz", victim, original.entries)
    proc = run_glmeeg("run", original.design, "--out", out, "--no-report")
    assert proc.returncode == 0, proc.stderr
    _check_rerun(original, out, proc.stderr, "digest mismatch")


# --- FitCache itself ---------------------------------------------------------------------------

def _values(shape) -> np.ndarray:
    """Betas holding the awkward float64 values: signed zeros, subnormals, extremes."""
    rng = np.random.default_rng(3)
    b = rng.standard_normal(shape) * 10.0 ** rng.integers(-300, 300, shape)
    b.flat[:6] = [-0.0, 0.0, 5e-324, -np.finfo(float).max, np.finfo(float).tiny, np.nextafter(1.0, 2.0)]
    return b


def test_store_and_load_round_trip_bitwise(tmp_path, caplog):
    cache = FitCache(tmp_path / CACHE_FOLDER)
    key = hashlib.sha256(b"a job").hexdigest()
    betas = _values((3, 40))
    for given in (betas, np.asfortranarray(betas), betas.astype(">f8")):
        cache.store(key, SubjectFit(subject="s01", betas=given, df_resid=17,
                                    robust_iterations_max=9, robust_unconverged_points=0))
        with caplog.at_level(logging.WARNING, logger="glmeeg"):
            fit = cache.load(key, subject="s01", shape=(3, 40))
        assert not caplog.records
        assert fit.betas.tobytes() == betas.tobytes() and fit.betas.dtype == np.float64
        assert fit.betas.flags.c_contiguous and fit.betas.flags.writeable
        assert (fit.df_resid, fit.robust_iterations_max, fit.robust_unconverged_points) == (17, 9, 0)
    # The layout load accepts, written by store: stored members, the digest of the betas' bytes.
    with zipfile.ZipFile(cache.folder / f"{key}.npz") as zf:
        assert sorted(zf.namelist()) == ["betas.npy", "meta.npy"]
        assert {i.compress_type for i in zf.infolist()} == {zipfile.ZIP_STORED}
    meta = _read_entry(cache.folder / f"{key}.npz")[1]
    assert meta == {"format": FIT_FORMAT, "subject": "s01", "key": key, "df_resid": 17,
                    "robust_iterations_max": 9, "robust_unconverged_points": 0, "shape": [3, 40],
                    "dtype": "<f8", "sha256": hashlib.sha256(betas.astype("<f8").tobytes()).hexdigest(),
                    "unusable_points": 0, "unusable_sha256": None}
    # Points without an estimate travel as a third member, with their own digest.
    cache.store(key, SubjectFit(subject="s01", betas=betas, df_resid=17, unusable=np.array([2, 7, 39])))
    fit = cache.load(key, subject="s01", shape=(3, 40))
    assert fit.unusable.tolist() == [2, 7, 39]
    with zipfile.ZipFile(cache.folder / f"{key}.npz") as zf:
        assert sorted(zf.namelist()) == ["betas.npy", "meta.npy", "unusable.npy"]
    meta = _read_entry(cache.folder / f"{key}.npz")[1]
    assert meta["unusable_points"] == 3
    assert meta["unusable_sha256"] == hashlib.sha256(np.array([2, 7, 39], dtype="<i8").tobytes()).hexdigest()
    # An entry whose metadata and member disagree is refitted.
    _write_entry(cache.folder / f"{key}.npz", betas, meta)  # the member left out
    with caplog.at_level(logging.WARNING, logger="glmeeg"):
        assert cache.load(key, subject="s01", shape=(3, 40)) is None
    assert "unusable.npy absent" in caplog.records[-1].getMessage()
    caplog.clear()
    # Least squares: no robust facts.
    cache.store(key, SubjectFit(subject="s01", betas=betas, df_resid=0))
    fit = cache.load(key, subject="s01", shape=(3, 40))
    assert (fit.df_resid, fit.robust_iterations_max, fit.robust_unconverged_points) == (0, None, None)


def test_missing_entry_is_silent_and_a_forged_one_is_one_line(tmp_path, caplog):
    cache = FitCache(tmp_path / CACHE_FOLDER)
    key = hashlib.sha256(b"a job").hexdigest()
    with caplog.at_level(logging.WARNING, logger="glmeeg"):
        assert cache.load(key, subject="s01", shape=(2, 3)) is None
    assert not caplog.records
    cache.store(key, SubjectFit(subject="s01", betas=np.ones((2, 3)), df_resid=4))
    # A header line break or control character from a foreign file stays out of the note.
    path = cache.folder / f"{key}.npz"
    _write_zip(path, {"betas.npy": b"\x93NUMPY\x01\x00\x10\x00{'a':\n\x1b[2J}   \n", "meta.npy":
                      _meta_npy(_read_entry_meta(path))})
    with caplog.at_level(logging.WARNING, logger="glmeeg"):
        assert cache.load(key, subject="s01", shape=(2, 3)) is None
    (record,) = caplog.records
    message = record.getMessage()
    assert message.startswith(f"subject s01: cached fit {key[:12]} unreadable (ValueError: ")
    assert message.isprintable() and len(message) < 250


def _read_entry_meta(path: Path) -> dict:
    return _read_entry(path)[1]


def test_fifo_in_place_of_an_entry_does_not_block(tmp_path, caplog):
    """(A run refuses such an output folder before fitting; the cache does not rely on it.)"""
    cache = FitCache(tmp_path / CACHE_FOLDER)
    key = hashlib.sha256(b"a job").hexdigest()
    cache.folder.mkdir()
    os.mkfifo(cache.folder / f"{key}.npz")
    with caplog.at_level(logging.WARNING, logger="glmeeg"):
        assert cache.load(key, subject="s01", shape=(2, 3)) is None
    (record,) = caplog.records
    assert record.getMessage().endswith("failed verification (not a regular file); refitting")
    cache.store(key, SubjectFit(subject="s01", betas=np.ones((2, 3)), df_resid=4))
    assert cache.load(key, subject="s01", shape=(2, 3)).betas.tobytes() == np.ones((2, 3)).tobytes()
