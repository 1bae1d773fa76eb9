"""Exports of a result: the tidy table of points, ``xarray`` datasets and netCDF-4 files."""

from __future__ import annotations

import json
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd
from pydantic import ValidationError

from ..axes import Axes
from ..errors import GlmeegError
from ..group_level.effect_sizes import size_label
from .files import _need, _write_atomically
from .models import _ARRAYS, _MAPS, _OPTIONAL_ARRAYS, TestResult, _plain

NETCDF_FORMAT = "glmeeg test result"


def read_netcdf(path: str | Path):
    """Read a file written by :meth:`TestResult.to_netcdf` into memory.

    Parameters
    ----------
    path : str or Path

    Returns
    -------
    xarray.Dataset
        The same variables, coordinates and attributes as :meth:`TestResult.to_xarray`, every
        variable bit for bit with its dtype.

    Raises
    ------
    GlmeegError
        The file is missing, is not netCDF, was not written by glmeeg, or xarray / h5netcdf
        are not installed.
    """
    path = Path(path)
    xr = _need("xarray", "read_netcdf", "netcdf")
    _need("h5netcdf", "read_netcdf", "netcdf")
    _need("h5py", "read_netcdf", "netcdf")
    if not path.is_file():
        raise GlmeegError(f"{path}: no such file")
    try:
        ds = xr.load_dataset(path, engine="h5netcdf")
    except (OSError, ValueError, TypeError, KeyError) as e:
        raise GlmeegError(f"{path}: not a readable netCDF file ({e or type(e).__name__})") from None
    if ds.attrs.get("format") != NETCDF_FORMAT:
        raise GlmeegError(f"{path}: not a glmeeg result (no attribute format = {NETCDF_FORMAT!r})")
    for name in list(ds.variables):
        var = ds[name]
        if var.dtype == object:  # variable-length strings some engines read back as objects
            ds[name] = var.astype(str)
        var = ds[name]
        var.encoding.pop("_FillValue", None)
    return ds


def load_netcdf(path: str | Path) -> TestResult:
    """Read a file written by :meth:`TestResult.to_netcdf` back into the :class:`TestResult`.

    Parameters
    ----------
    path : str or Path

    Returns
    -------
    TestResult
        Equal to the one written, every array bit for bit.

    Raises
    ------
    GlmeegError
        As :func:`read_netcdf`, or the file's settings do not make a valid result.
    """
    ds = read_netcdf(path)
    try:
        meta = json.loads(ds.attrs["settings_json"])
        n_point_dims = len(Axes.model_validate(meta["axes"]).dims)
    except (KeyError, ValueError, TypeError) as e:
        raise GlmeegError(f"{path}: not a glmeeg result (settings_json: {e})") from None
    arrays = {}
    for f in _ARRAYS + _OPTIONAL_ARRAYS:
        if f not in ds:
            continue
        value = ds[f].values
        if f in _MAPS or f == "subject_estimates":
            value = value.reshape(value.shape[:value.ndim - n_point_dims] + (-1,))
        arrays[f] = value
    try:
        return TestResult.model_validate({**meta, **arrays})
    except ValidationError as e:
        err = e.errors()[0]
        where = ".".join(map(str, err["loc"])) or "(top level)"
        raise GlmeegError(f"{path}: not a valid glmeeg result ({where}: {err['msg']})") from None


def points_frame(result: TestResult) -> pd.DataFrame:
    """:meth:`TestResult.to_frame` (documented there)."""
    df = result.axes.point_labels()
    if result.kind == "t":
        df["estimate"] = result.estimate[0]
        if result.estimate_low is not None:
            df["estimate_low"] = result.estimate_low
            df["estimate_high"] = result.estimate_high
        df["standard_error"] = result.standard_error
    else:
        df["estimate"] = np.nan
        for lab, row in zip(result.estimate_labels, result.estimate):
            df[f"estimate: {lab}"] = row
    df["statistic"] = result.statistic
    if result.tfce is not None:
        df["tfce"] = result.tfce
    df["p"] = result.p
    if result.p_permutation is not None:
        df["p_permutation"] = result.p_permutation
    df["p_corrected"] = result.p_corrected
    df["significant"] = result.significant
    if result.cluster is not None:
        df["cluster"] = pd.array(np.where(result.cluster > 0, result.cluster, 0), dtype="Int64")
        df.loc[result.cluster == 0, "cluster"] = pd.NA
    df["effect_size"] = result.effect_size
    if result.effect_size_low is not None:
        df["effect_size_low"] = result.effect_size_low
        df["effect_size_high"] = result.effect_size_high
    df["effect_size_corrected"] = result.effect_size_corrected
    if result.kind == "t":
        df["effect_size_label"] = size_label(result.effect_size)
    for name in ("residual_skewness", "residual_kurtosis", "normality_p"):
        if getattr(result, name) is not None:
            df[name] = getattr(result, name)
    return df


def to_xarray(result: TestResult):
    """:meth:`TestResult.to_xarray` (documented there)."""
    xr = _need("xarray", "to_xarray", "xarray")
    dims = result.axes.dims
    coords: dict[str, Any] = {"channel": np.array(result.axes.channels, dtype=str),
                              "time": np.array(result.axes.times, dtype=np.float64),
                              "contrast": np.array(result.estimate_labels, dtype=str),
                              "subject": np.array(result.subjects, dtype=str),
                              "subject_contrast_row": np.array(result.subject_contrast_labels, dtype=str),
                              "subject_column": np.array(result.subject_columns, dtype=str),
                              "group_contrast_row": np.array(result.group_contrast_labels, dtype=str),
                              "group_column": np.array(result.group_columns, dtype=str)}
    if result.axes.frequencies is not None:
        coords["frequency"] = np.array(result.axes.frequencies, dtype=np.float64)
    data: dict[str, Any] = {}
    for f in _MAPS:
        value = getattr(result, f)
        if value is None:
            continue
        if f in ("estimate", "estimate_low", "estimate_high") and np.ndim(value) == 2:
            data[f] = (("contrast",) + dims, result.map(f))
        else:
            data[f] = (tuple(f"{f}_row{i}" for i in range(np.ndim(value) - 1)) + dims, result.map(f))
    extra = {"subject_estimates": ("subject", "subject_contrast_row"),
             "group_design": ("subject", "group_column"),
             "subject_contrast": ("subject_contrast_row", "subject_column"),
             "group_contrast": ("group_contrast_row", "group_column"),
             "null_distribution": ("resampling",)}
    for f, lead in extra.items():
        value = getattr(result, f)
        if value is None:
            continue
        value = np.asarray(value)
        if f == "subject_estimates" and value.ndim == 3 and value.shape[-1] == result.axes.n_points:
            data[f] = (lead + dims, result.axes.unflatten(value))
        elif value.ndim == len(lead):
            data[f] = (lead, value)
        else:  # a layout this export does not know: keep it, with plain dim names
            data[f] = (tuple(f"{f}_dim{i}" for i in range(value.ndim)), value)
    used = {d for v in data.values() for d in v[0]}
    coords = {k: v for k, v in coords.items() if k in used or k in dims}
    return xr.Dataset(data, coords=coords, attrs=netcdf_attributes(result))


def netcdf_attributes(result: TestResult) -> dict[str, Any]:
    """Scalar settings as netCDF-safe attributes (no None, no booleans)."""
    attrs: dict[str, Any] = {"title": f"glmeeg test {result.name}", "format": NETCDF_FORMAT,
                             "schema_version": result.schema_version, "test": result.name,
                             "kind": result.kind, "df_numerator": float(result.df[0]),
                             "df_denominator": float(result.df[1]), "alternative": result.alternative,
                             "alpha": float(result.alpha), "confidence_level": float(result.confidence_level),
                             "n_subjects": result.n_subjects, "group_formula": result.group_formula,
                             "effect_size_name": result.effect_size_name,
                             "effect_size_corrected_name": result.effect_size_corrected_name,
                             "correction": result.correction.describe()}
    for key, value in result.correction.model_dump().items():
        attrs[f"correction_{key}"] = value
    if result.resampling is not None:
        for key, value in result.resampling.model_dump().items():
            attrs[f"resampling_{key}"] = value
    attrs["glmeeg_version"] = result.provenance.glmeeg_version
    attrs["created"] = result.provenance.created
    attrs["settings_json"] = json.dumps(result.model_dump(mode="json", exclude=set(_ARRAYS) | set(_OPTIONAL_ARRAYS)),
                                        default=_plain)
    return {k: (int(v) if isinstance(v, bool) else v) for k, v in attrs.items() if v is not None}


def to_netcdf(result: TestResult, path: str | Path) -> Path:
    """:meth:`TestResult.to_netcdf` (documented there)."""
    ds = result.to_xarray()
    _need("h5netcdf", "to_netcdf", "netcdf")
    _need("h5py", "to_netcdf", "netcdf")
    # No fill value: nothing is masked on reading, so every NaN comes back with its bits.
    encoding = {name: {"_FillValue": None} for name in ds.variables
                if ds[name].dtype.kind == "f"}
    return _write_atomically(Path(path), lambda tmp: ds.to_netcdf(tmp, engine="h5netcdf",
                                                                  encoding=encoding),
                             label=str(path), kind="netcdf")
