"""Typed, immutable results; saving, loading and exporting them.

A :class:`TestResult` holds one test's maps (flat, one value per point, labelled by its
:class:`~glmeeg.axes.Axes`), its settings and provenance. A :class:`RunResult` holds every test
of a design plus the per-subject summary. Results are saved as a folder per test:

``result.npz``
    every array, bit for bit, plus the settings as JSON; :func:`load_result` reads it back.
``points.csv``
    one row per point: channel, (frequency,) time, estimate, statistic, p, p_corrected,
    significant, effect_size, effect_size_corrected.
``summary.json``
    what was found, in a form other programs can read.

Modules: ``models`` (the result types), ``summary`` (summary.json and its schema), ``text``
(the printed description and cautions), ``exports`` (tables, xarray, netCDF), ``files``
(single files written safely), ``store`` (result files, run folders, atomic swaps, recovery),
``provenance``, ``findings`` (clusters and regions) and ``ownership`` (which files are glmeeg's).
"""

from .exports import NETCDF_FORMAT, load_netcdf, read_netcdf
from .files import csv_safe, png_metadata, write_figure, write_table, write_text
from .findings import CLUSTER_CAUTION, Cluster
from .models import (SCHEMA_VERSION, Provenance, Resampling, ResidualChecks, RunResult, SubjectSummary,
                     TestResult)
from .provenance import provenance
from .store import (check_output_folder, load_result, load_run, load_run_folder, load_run_result,
                    load_test_results, recover_results, write_report, write_run)
from .summary import Summary, summary_schema
from .text import CAUTION, CLINICAL_CAUTION

__all__ = ["Provenance", "SubjectSummary", "TestResult", "RunResult", "Resampling", "ResidualChecks",
           "Cluster", "load_result", "load_test_results", "load_run_folder", "load_run", "load_run_result", "write_run", "write_report",
           "recover_results", "write_table", "write_figure", "write_text", "csv_safe", "png_metadata",
           "check_output_folder", "provenance", "CAUTION", "CLINICAL_CAUTION", "CLUSTER_CAUTION",
           "read_netcdf", "load_netcdf", "Summary", "summary_schema", "NETCDF_FORMAT", "SCHEMA_VERSION"]
