"""Exports: lossless netCDF round trip, the JSON Schema of summary.json, `glmeeg schema`."""

from __future__ import annotations

import copy
import json

import numpy as np
import pytest
from typer.testing import CliRunner

import glmeeg
from glmeeg.testing import write_study
from glmeeg.cli import app
from glmeeg.results import load_netcdf, read_netcdf, summary_schema
from glmeeg.results.models import _ARRAYS, _OPTIONAL_ARRAYS

xr = pytest.importorskip("xarray")
pytest.importorskip("h5netcdf")
jsonschema = pytest.importorskip("jsonschema")

TESTS = """\
[[test]]
name = "b-vs-a-cluster"
subject_contrast = "condition[T.b]"
correction = "cluster"
permutations = 100

[[test]]
name = "b-vs-a-tfce"
subject_contrast = "condition[T.b]"
correction = "tfce"
permutations = 100

[[test]]
name = "condition"
subject_contrast = ["condition[T.b]", "condition[T.c]"]
correction = "fdr"
"""


@pytest.fixture(scope="module")
def runs(tmp_path_factory):
    """A channel x time run and a channel x frequency x time run, both saved."""
    root = tmp_path_factory.mktemp("exports")
    out = {}
    for label, freqs in (("ct", None), ("cft", 3)):
        design = write_study(root / label, n_subjects=8, n_trials=15, n_channels=4, n_times=6,
                             n_freqs=freqs, seed=3, effect=1.5, tests=TESTS)
        run = glmeeg.run_analysis(design)
        folder = glmeeg.write_run(run, root / f"{label}-out")
        out[label] = (run, folder)
    return out


def same_bits(a: np.ndarray, b: np.ndarray) -> bool:
    return a.dtype == b.dtype and a.shape == b.shape and a.tobytes() == b.tobytes()


@pytest.mark.parametrize("label,name", [("ct", "b-vs-a-cluster"), ("ct", "b-vs-a-tfce"),
                                        ("ct", "condition"), ("cft", "b-vs-a-cluster"),
                                        ("cft", "condition")])
def test_netcdf_round_trip_is_lossless(runs, tmp_path, label, name):
    t = runs[label][0].test(name)
    ds = t.to_xarray()
    path = t.to_netcdf(tmp_path / "t.nc")
    assert path.is_file() and not list(tmp_path.glob(".*partial"))
    back = read_netcdf(path)
    assert set(back.variables) == set(ds.variables)
    for v in ds.variables:
        assert back[v].dims == ds[v].dims, v
        if ds[v].dtype.kind == "U":
            assert back[v].dtype.kind == "U" and list(back[v].values) == list(ds[v].values), v
        else:
            assert same_bits(ds[v].values, back[v].values), v
    assert back.attrs.keys() == ds.attrs.keys()
    for k, v in ds.attrs.items():
        assert back.attrs[k] == v, k
    # Every map that the result holds is there, with its own dtype.
    for field in ("estimate", "standard_error", "statistic", "p", "p_corrected", "significant",
                  "effect_size", "effect_size_corrected", "effect_size_low", "effect_size_high",
                  "p_permutation", "tfce", "cluster", "residual_skewness", "residual_kurtosis",
                  "normality_p", "subject_estimates", "group_design", "null_distribution"):
        value = getattr(t, field)
        assert (field in back) == (value is not None), field
        if value is not None and field not in ("subject_estimates", "group_design", "null_distribution"):
            assert same_bits(back[field].values, t.map(field)), field
    assert back["significant"].dtype == bool
    assert back["statistic"].dims == t.axes.dims
    assert back["estimate"].dims == ("contrast",) + t.axes.dims
    if t.cluster is not None:
        assert back["cluster"].dtype == t.cluster.dtype
    assert back.attrs["kind"] == t.kind and back.attrs["correction_method"] == t.correction.method
    settings = json.loads(back.attrs["settings_json"])
    assert settings["name"] == t.name and len(settings["clusters"]) == len(t.clusters)


@pytest.mark.parametrize("label", ["ct", "cft"])
def test_netcdf_loads_back_the_same_result(runs, tmp_path, label):
    for t in runs[label][0].tests:
        back = load_netcdf(t.to_netcdf(tmp_path / f"{t.name}.nc"))
        for field in _ARRAYS + _OPTIONAL_ARRAYS:
            a, b = getattr(t, field), getattr(back, field)
            assert (a is None and b is None) or same_bits(a, b), field
        arrays = set(_ARRAYS + _OPTIONAL_ARRAYS)
        assert back.model_dump(exclude=arrays) == t.model_dump(exclude=arrays)
        assert str(back) == str(t)


def test_netcdf_keeps_nan_bits_and_replaces_atomically(runs, tmp_path):
    t = runs["ct"][0].test("condition")
    p = np.array(t.p, copy=True)
    p[:3] = [np.nan, -np.nan, -0.0]
    nan_result = t.model_copy(update={"p": glmeeg.results.models._frozen_array(p)})
    path = tmp_path / "t.nc"
    t.to_netcdf(path)  # an earlier export of glmeeg's is replaced
    nan_result.to_netcdf(path)
    assert same_bits(read_netcdf(path)["p"].values, nan_result.map("p"))
    assert [f.name for f in tmp_path.iterdir()] == ["t.nc"]  # no temporary file left


def test_netcdf_never_replaces_a_file_glmeeg_did_not_write(runs, tmp_path):
    t = runs["ct"][0].test("condition")
    mine = tmp_path / "mine.nc"
    mine.write_text("someone's own file")
    xr.Dataset({"x": ("a", [1.0])}).to_netcdf(tmp_path / "other.nc", engine="h5netcdf")
    before = (tmp_path / "other.nc").read_bytes()
    for path in (mine, tmp_path / "other.nc"):
        with pytest.raises(glmeeg.GlmeegError, match="exists and is a file glmeeg did not write"):
            t.to_netcdf(path)
    assert mine.read_text() == "someone's own file"
    assert (tmp_path / "other.nc").read_bytes() == before


def test_netcdf_errors_are_one_line(runs, tmp_path):
    t = runs["ct"][0].test("condition")
    with pytest.raises(glmeeg.GlmeegError, match="is a folder"):
        t.to_netcdf(tmp_path)
    with pytest.raises(glmeeg.GlmeegError, match="does not exist"):
        t.to_netcdf(tmp_path / "missing" / "t.nc")
    with pytest.raises(glmeeg.GlmeegError, match="no such file"):
        read_netcdf(tmp_path / "none.nc")
    (tmp_path / "bad.nc").write_text("not netcdf")
    with pytest.raises(glmeeg.GlmeegError, match="bad.nc: not a readable netCDF"):
        read_netcdf(tmp_path / "bad.nc")
    xr.Dataset({"x": ("a", [1.0])}).to_netcdf(tmp_path / "other.nc", engine="h5netcdf")
    with pytest.raises(glmeeg.GlmeegError, match="not a glmeeg result"):
        read_netcdf(tmp_path / "other.nc")


def test_missing_engine_names_the_extra(runs, tmp_path, monkeypatch):
    import sys

    monkeypatch.setitem(sys.modules, "h5netcdf", None)  # makes `import h5netcdf` fail
    with pytest.raises(glmeeg.GlmeegError, match=r"pip install 'glmeeg\[netcdf\]'"):
        runs["ct"][0].test("condition").to_netcdf(tmp_path / "t.nc")
    assert not list(tmp_path.iterdir())
    with pytest.raises(glmeeg.GlmeegError, match=r"glmeeg\[netcdf\]"):
        read_netcdf(tmp_path / "t.nc")


def test_schema_validates_every_saved_summary(runs):
    schema = summary_schema()
    jsonschema.Draft202012Validator.check_schema(schema)
    assert schema["$id"] and schema["title"] and schema["version"] == glmeeg.results.SCHEMA_VERSION
    validator = jsonschema.Draft202012Validator(schema)
    n = 0
    for _, folder in runs.values():
        for summary in folder.glob("*/summary.json"):
            validator.validate(json.loads(summary.read_text()))
            n += 1
    assert n == 6


def test_schema_rejects_missing_key_and_wrong_type(runs):
    validator = jsonschema.Draft202012Validator(summary_schema())
    good = json.loads((runs["cft"][1] / "b-vs-a-cluster" / "summary.json").read_text())
    assert good["findings"]["peak"]["frequency"] in (4.0, 6.0, 8.0)
    for mutate in (lambda d: d.pop("findings"), lambda d: d.pop("resampling"),
                   lambda d: d.__setitem__("n_subjects", "eight"),
                   lambda d: d.__setitem__("kind", "z"),
                   lambda d: d["findings"].__setitem__("n_significant", 1.5),
                   lambda d: d["findings"]["channels"].append({"channel": "Cz"}),
                   lambda d: d.__setitem__("unexpected", 1)):
        bad = copy.deepcopy(good)
        mutate(bad)
        assert not validator.is_valid(bad)


def test_cli_schema_prints_and_writes(tmp_path):
    runner = CliRunner()
    result = runner.invoke(app, ["schema"])
    assert result.exit_code == 0, result.output
    assert json.loads(result.stdout) == summary_schema()
    target = tmp_path / "summary.schema.json"
    result = runner.invoke(app, ["schema", "--out", str(target)])
    assert result.exit_code == 0, result.output
    assert json.loads(target.read_text()) == summary_schema()
    assert not list(tmp_path.glob(".*partial"))
    for bad in (tmp_path, tmp_path / "missing" / "s.json"):
        result = runner.invoke(app, ["schema", "--out", str(bad)])
        assert result.exit_code == 2
        lines = result.output.strip().splitlines()
        assert len(lines) == 1 and lines[0].startswith("error: --out") and str(bad) in lines[0]
        assert "Traceback" not in result.output
