"""Runs on a real Dask cluster give bitwise the same results as runs in this process.

A ``dask.distributed.LocalCluster`` of 2 worker processes on the loopback interface runs the
demo study's four tests (TFCE with sign-flipping, a cluster-mass F test, max-statistic, and a
TFCE group comparison under permutation) with few resamplings; every array of every result
must equal the in-process run bit for bit. One test kills a worker process mid-run.
"""

from __future__ import annotations

import os
import signal
import sys
from pathlib import Path

import distributed  # in the test extra: these tests never skip
import pytest
from typer.testing import CliRunner

from glmeeg.cli import app
from glmeeg.errors import ExecutionError
from glmeeg.pipeline import run_analysis
from glmeeg.results import load_run
from glmeeg.simulate import write_demo_study

# Two clusters at once (the module's and one a test starts) share the default HTTP port; Dask
# moves the second one elsewhere and says so.
pytestmark = pytest.mark.filterwarnings("ignore:Port 8787 is already in use:UserWarning")


ARRAYS = ("estimate", "standard_error", "statistic", "p", "p_corrected", "significant", "effect_size",
          "effect_size_corrected", "effect_size_low", "effect_size_high", "p_permutation", "tfce",
          "cluster", "null_distribution", "subject_estimates", "residual_skewness", "normality_p")


@pytest.fixture(scope="module")
def study(tmp_path_factory) -> Path:
    design = write_demo_study(tmp_path_factory.mktemp("dask") / "study", n_subjects=10, n_trials=60,
                              seed=5)
    design.write_text(design.read_text().replace("permutations = 5000", "permutations = 300"))
    return design


@pytest.fixture(scope="module")
def in_process(study):
    return run_analysis(study)


@pytest.fixture(scope="module")
def client():
    cluster = distributed.LocalCluster(n_workers=2, threads_per_worker=1, processes=True,
                                       host="127.0.0.1", dashboard_address=None)
    c = distributed.Client(cluster, set_as_default=False)
    yield c
    c.close()
    cluster.close()


def assert_identical(a, b) -> None:
    """Every array of every test equal bit for bit (NaN where NaN), and the same clusters."""
    assert [t.name for t in a.tests] == [t.name for t in b.tests]
    for ta, tb in zip(a.tests, b.tests):
        for name in ARRAYS:
            x, y = getattr(ta, name), getattr(tb, name)
            assert (x is None) == (y is None), (ta.name, name)
            if x is not None:
                assert x.dtype == y.dtype and x.shape == y.shape, (ta.name, name)
                assert x.tobytes() == y.tobytes(), (ta.name, name)
        assert ta.clusters == tb.clusters, ta.name
        assert ta.resampling == tb.resampling, ta.name
    assert a.subjects == b.subjects


def test_local_cluster_equals_in_process(study, in_process, client):
    assert len(client.scheduler_info()["workers"]) == 2
    on_dask = run_analysis(study, client=client)
    assert_identical(in_process, on_dask)
    # The demo's planted urgency effect is found, so the comparison covers significant points,
    # TFCE values and clusters, not only empty maps.
    assert in_process.test("urgency-high-vs-low").significant.any()


def test_scheduler_address_equals_in_process(study, in_process, client):
    """The API's scheduler= (what --scheduler passes) connects a client of its own."""
    assert_identical(in_process, run_analysis(study, scheduler=client.scheduler.address))


def test_a_worker_killed_mid_run_changes_nothing(study, in_process, client):
    """SIGKILL one worker process while it holds subject fits: Dask reruns its tasks on the
    other worker (the nanny restarts the dead one) and the result is bitwise unchanged."""
    killed = []

    def progress(task, done, total):
        if task == "fitting subjects" and done == 1 and not killed:
            busy = {w: keys for w, keys in client.processing().items() if keys}
            assert busy, "no worker holds a task: nothing to kill"
            worker = sorted(busy)[0]
            pid = client.run(os.getpid, workers=[worker])[worker]
            os.kill(pid, signal.SIGKILL)
            killed.append((worker, len(busy[worker])))

    on_dask = run_analysis(study, client=client, progress=progress)
    assert killed and killed[0][1] >= 1
    assert_identical(in_process, on_dask)


def test_workers_option_starts_a_local_cluster(study, in_process, tmp_path):
    """The CLI's --workers 2 (a LocalCluster it starts and stops) writes the same results."""
    out = tmp_path / "out"
    result = CliRunner().invoke(app, ["run", str(study), "--out", str(out), "--workers", "2", "-q",
                                      "--no-report"])
    assert result.exit_code == 0, result.output
    saved = {t.name: t for t in load_run(out)}
    for t in in_process.tests:
        for name in ("statistic", "p_corrected", "null_distribution", "subject_estimates"):
            x = getattr(t, name)
            assert x.tobytes() == getattr(saved[t.name], name).tobytes(), (t.name, name)


def test_unreachable_scheduler_is_one_line_exit_2(study, tmp_path):
    out = tmp_path / "out"
    result = CliRunner().invoke(app, ["run", str(study), "--out", str(out),
                                      "--scheduler", "tcp://127.0.0.1:9"])
    assert result.exit_code == 2, result.output
    line = result.stderr.strip()
    assert line.count("\n") == 0 and line.startswith("error: --scheduler tcp://127.0.0.1:9: cannot "
                                                      "reach the Dask scheduler"), line
    assert not out.exists()


def test_workers_and_scheduler_together_are_refused(study, tmp_path):
    result = CliRunner().invoke(app, ["run", str(study), "--out", str(tmp_path / "o"), "--workers", "2",
                                      "--scheduler", "tcp://127.0.0.1:9"])
    assert result.exit_code == 2
    assert result.stderr.startswith("error: --workers 2 and --scheduler tcp://127.0.0.1:9: give one")
    assert not (tmp_path / "o").exists()


def test_missing_dask_is_a_clear_error(study, monkeypatch, tmp_path):
    monkeypatch.setitem(sys.modules, "distributed", None)  # import distributed -> ImportError
    result = CliRunner().invoke(app, ["run", str(study), "--out", str(tmp_path / "o"), "--workers", "2"])
    assert result.exit_code == 2
    assert result.stderr.startswith("error: --workers 2 needs Dask's distributed scheduler")


def test_a_scheduler_without_workers_is_one_error():
    from glmeeg.parallel import open_backend

    with distributed.LocalCluster(n_workers=0, processes=True, host="127.0.0.1",
                                  dashboard_address=None) as empty:
        with pytest.raises(ExecutionError, match=r"no worker joined the cluster within 2 s$"):
            with open_backend(scheduler=empty.scheduler_address, worker_timeout=2):
                pass


def _die(_shared, _item):
    os._exit(3)


def test_a_task_whose_worker_dies_on_every_try_is_one_error(client):
    """A task that kills its worker each time: after Dask's allowed failures the run stops
    with one ExecutionError naming the task, not a hang or a Dask traceback."""
    from glmeeg.parallel import DaskBackend

    with pytest.raises(ExecutionError, match=r"^subject s99: the Dask worker running it died on every try"):
        DaskBackend(client).map(_die, [0], labels=["subject s99"])
    client.wait_for_workers(2, timeout=60)
