"""Runs on a real Dask cluster give bitwise the same results as runs in this process.

A ``dask.distributed.LocalCluster`` of 2 worker processes on the loopback interface runs the
demo study's four tests (TFCE with sign-flipping, a cluster-mass F test, max-statistic, and a
TFCE group comparison under permutation) with few resamplings; every array of every result
must equal the in-process run bit for bit. One test kills a worker process mid-run.

The local cluster glmeeg starts itself (``--workers``) speaks TLS with a certificate of the
run: clients without it are refused, and a ``tls://`` scheduler's client takes its
certificate from Dask's configuration.
"""

from __future__ import annotations

import functools
import operator
import os
import signal
import subprocess
import sys
from pathlib import Path

import dask
import distributed  # in the test extra: these tests never skip
import pytest
from distributed.comm.core import CommClosedError, FatalCommClosedError
from distributed.security import Security
from typer.testing import CliRunner

from glmeeg.cli import app
from glmeeg.errors import ExecutionError
from glmeeg.pipeline import run_analysis
from glmeeg.results import load_test_results
from glmeeg.demo import write_demo_study
from glmeeg.testing import HANG_TIMEOUT, assert_results_identical

# Two clusters at once (the module's and one a test starts) share the default HTTP port; Dask
# moves the second one elsewhere and says so.
pytestmark = pytest.mark.filterwarnings("ignore:Port 8787 is already in use:UserWarning")


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
    # Tests below kill this cluster's workers again and again. lost-worker-timeout (15 s) after
    # a worker is lost, Dask's SpecCluster closes its nanny for good if no worker of that name
    # is registered (distributed/deploy/spec.py, _update_worker_status): a timer of an earlier
    # kill firing while the nanny restarts a later one left the cluster a worker short (seen:
    # wait_for_workers(2) timing out, and once no worker at all, so the die test hung).
    with dask.config.set({"distributed.deploy.lost-worker-timeout": "1h"}):
        cluster = distributed.LocalCluster(n_workers=2, threads_per_worker=1, processes=True,
                                           host="127.0.0.1", dashboard_address=None)
        c = distributed.Client(cluster, set_as_default=False)
        yield c
        c.close()
        cluster.close()


@pytest.fixture(scope="module")
def own_cluster():
    """The backend of ``--workers 2``: the TLS LocalCluster glmeeg starts, and its client."""
    from glmeeg.parallel import open_backend

    with open_backend(workers=2) as backend:
        yield backend


@pytest.mark.slow  # a Dask cluster of worker processes
def test_local_cluster_equals_in_process(study, in_process, client):
    assert len(client.scheduler_info()["workers"]) == 2
    on_dask = run_analysis(study, client=client)
    assert_results_identical(on_dask, in_process)
    # The demo's planted urgency effect is found, so the comparison covers significant points,
    # TFCE values and clusters, not only empty maps.
    assert in_process.test("urgency-high-vs-low").significant.any()


@pytest.mark.slow  # a Dask cluster of worker processes
def test_scheduler_address_equals_in_process(study, in_process, client):
    """The API's scheduler= (what --scheduler passes) connects a client of its own."""
    assert_results_identical(run_analysis(study, scheduler=client.scheduler.address), in_process)


@pytest.mark.slow  # a Dask cluster of worker processes
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
    assert_results_identical(on_dask, in_process)


@pytest.mark.slow  # a Dask cluster of worker processes
def test_workers_option_starts_a_local_cluster(study, in_process, tmp_path):
    """The CLI's --workers 2 (a LocalCluster it starts and stops) writes the same results."""
    out = tmp_path / "out"
    result = CliRunner().invoke(app, ["run", str(study), "--out", str(out), "--workers", "2", "-q",
                                      "--no-report"])
    assert result.exit_code == 0, result.output
    saved = {t.name: t for t in load_test_results(out)}
    for t in in_process.tests:
        for name in ("statistic", "p_corrected", "null_distribution", "subject_estimates"):
            x = getattr(t, name)
            assert x.tobytes() == getattr(saved[t.name], name).tobytes(), (t.name, name)


@pytest.mark.slow  # a Dask client retrying a refused connection until its timeout
def test_unreachable_scheduler_is_one_line_exit_2(study, tmp_path, monkeypatch):
    # Nothing listens on port 9, so every connection attempt is refused and Dask retries until
    # the client's timeout (10 s by default): waiting for the failure is all the timeout bounds
    # here, and 2 s give the same error sooner. run_analysis looks open_backend up when called.
    import glmeeg.parallel

    monkeypatch.setattr(glmeeg.parallel, "open_backend",
                        functools.partial(glmeeg.parallel.open_backend, timeout=2.0))
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


@pytest.mark.slow  # a Dask cluster of worker processes
def test_a_scheduler_without_workers_is_one_error():
    from glmeeg.parallel import open_backend

    with distributed.LocalCluster(n_workers=0, processes=True, host="127.0.0.1",
                                  dashboard_address=None) as empty:
        with pytest.raises(ExecutionError, match=r"no worker joined the cluster within 2 s$"):
            with open_backend(scheduler=empty.scheduler_address, worker_timeout=2):
                pass


def _die(_shared, _item):
    os._exit(3)


@pytest.mark.slow  # a Dask cluster of worker processes
def test_a_task_whose_worker_dies_on_every_try_is_one_error(client):
    """A task that kills its worker each time: after Dask's allowed failures the run stops
    with one ExecutionError naming the task, not a hang or a Dask traceback."""
    from glmeeg.parallel import DaskBackend

    with pytest.raises(ExecutionError, match=r"^subject s99: the Dask worker running it died on every try"):
        DaskBackend(client).map(_die, [0], labels=["subject s99"])
    # The nannies restart the killed workers; on a loaded machine that may take minutes, so the
    # bound only guards against a hang (seen: 60 s were not enough on a busy 2-core machine).
    client.wait_for_workers(2, timeout=HANG_TIMEOUT)


# A client's connection attempt fails at once when refused; the timeout only bounds a hang (and
# the positive control's connection, which a loaded machine may slow down).
REFUSED_TIMEOUT = HANG_TIMEOUT


@pytest.mark.slow  # a Dask cluster of worker processes
def test_the_workers_cluster_refuses_clients_without_the_runs_certificate(own_cluster):
    """Nobody but glmeeg's client can connect to (or submit work to) its local cluster."""
    address = own_cluster.client.scheduler.address
    # LocalCluster(protocol="tls") listens on tls:// only (distributed/deploy/local.py).
    assert address.startswith("tls://127.0.0.1:"), address
    # Security.temporary: require_encryption=True and one self-signed certificate as the CA and
    # every role's certificate (distributed/security.py).
    assert own_cluster.security.require_encryption

    # Positive control: the run's own credentials connect and run a task, so the refusals
    # below are refusals of the credentials, not of any connection.
    with distributed.Client(address, security=own_cluster.security, timeout=REFUSED_TIMEOUT,
                            set_as_default=False) as own:
        assert own.submit(operator.add, 1, 2).result(timeout=HANG_TIMEOUT) == 3

    # (a) No credentials, plain TCP: the TLS listener drops the connection, which Dask reports
    # as CommClosedError (ConnectionResetError seen; distributed/comm/tcp.py,
    # convert_stream_closed_error).
    with pytest.raises(CommClosedError):
        distributed.Client(address.replace("tls://", "tcp://"), timeout=REFUSED_TIMEOUT,
                           set_as_default=False)
    # (b) Another temporary certificate: the client cannot verify the scheduler's certificate
    # (SSLCertVerificationError, raised by TLSConnector.connect as FatalCommClosedError "TLS
    # certificate does not match", distributed/comm/tcp.py).
    with pytest.raises(FatalCommClosedError, match="TLS certificate does not match"):
        distributed.Client(address, security=Security.temporary(), timeout=REFUSED_TIMEOUT,
                           set_as_default=False)
    # (c) A client that trusts the scheduler's certificate (it is sent in every handshake, so
    # it is no secret) but shows its own: the scheduler requires a client certificate signed by
    # the run's key (Security._get_tls_context: "Bidirectional authentication",
    # ssl.CERT_REQUIRED) and drops the connection. Under TLS 1.3 the client learns it on its
    # first read, as the scheduler's "unknown ca" alert (FatalCommClosedError) or, when the
    # close wins the race, as SSLEOFError (CommClosedError): both seen, both CommClosedError
    # (convert_stream_closed_error, distributed/comm/tcp.py).
    other = Security.temporary()
    forged = Security(require_encryption=True, tls_ca_file=own_cluster.security.tls_ca_file,
                      tls_client_cert=other.tls_client_cert, tls_client_key=other.tls_client_key)
    with pytest.raises(CommClosedError, match="UNKNOWN_CA|SSLEOFError"):
        distributed.Client(address, security=forged, timeout=REFUSED_TIMEOUT, set_as_default=False)
    # The refused clients left the cluster as it was: glmeeg's client still runs tasks.
    assert own_cluster.map(operator.add, [1, 2], shared=10) == [11, 12]


@pytest.mark.slow  # a Dask cluster of worker processes
def test_a_tls_scheduler_takes_its_certificate_from_dasks_configuration(own_cluster, tmp_path):
    """--scheduler tls://... with the client's certificate in DASK_DISTRIBUTED__COMM__TLS__...
    environment variables (what a user of an existing TLS cluster sets) connects and runs."""
    files = {}
    for name, pem in (("ca", own_cluster.security.tls_ca_file),
                      ("cert", own_cluster.security.tls_client_cert),
                      ("key", own_cluster.security.tls_client_key)):
        files[name] = tmp_path / f"{name}.pem"
        files[name].write_text(pem)
        files[name].chmod(0o600)
    # Dask reads DASK_* variables when it is imported: "__" nests keys and "_" equals "-"
    # (dask/config.py, collect_env). A fresh process, so this process's configuration is
    # left alone.
    env = dict(os.environ, DASK_DISTRIBUTED__COMM__TLS__CA_FILE=str(files["ca"]),
               DASK_DISTRIBUTED__COMM__TLS__CLIENT__CERT=str(files["cert"]),
               DASK_DISTRIBUTED__COMM__TLS__CLIENT__KEY=str(files["key"]))
    proc = subprocess.run([sys.executable, "-c", USE_TLS_SCHEDULER, own_cluster.client.scheduler.address],
                          env=env, capture_output=True, text=True, timeout=HANG_TIMEOUT)
    assert proc.returncode == 0, proc.stderr
    assert proc.stdout.strip() == "DaskBackend [11, 12]", proc.stdout


USE_TLS_SCHEDULER = """
import operator, sys
from glmeeg.parallel import open_backend
with open_backend(scheduler=sys.argv[1]) as backend:
    print(type(backend).__name__, backend.map(operator.add, [1, 2], shared=10))
"""


@pytest.mark.slow  # a Dask cluster of worker processes
def test_a_tls_scheduler_without_a_configured_certificate_is_one_line_exit_2(study, own_cluster,
                                                                             tmp_path):
    """Without Dask TLS configuration a tls:// client has no ssl_context, on which Dask's
    connector raises TypeError mid-connection (distributed/comm/tcp.py, _expect_tls_context);
    glmeeg says what to configure instead."""
    address = own_cluster.client.scheduler.address
    out = tmp_path / "out"
    with dask.config.set({"distributed.comm.tls.ca-file": None, "distributed.comm.tls.client.cert": None,
                          "distributed.comm.tls.client.key": None}):
        result = CliRunner().invoke(app, ["run", str(study), "--out", str(out), "--scheduler", address])
    assert result.exit_code == 2, result.output
    line = result.stderr.strip()
    assert line.count("\n") == 0 and line.startswith(
        f"error: --scheduler {address}: a tls:// scheduler needs the client's certificate in Dask's "
        "configuration (distributed.comm.tls.ca-file"), line
    assert not out.exists()


def test_missing_cryptography_is_a_clear_error(study, monkeypatch, tmp_path):
    """Security.temporary imports cryptography (distributed/security.py)."""
    monkeypatch.setitem(sys.modules, "cryptography", None)  # import cryptography -> ImportError
    result = CliRunner().invoke(app, ["run", str(study), "--out", str(tmp_path / "o"), "--workers", "2"])
    assert result.exit_code == 2, result.output
    assert result.stderr.startswith("error: --workers 2: the local Dask cluster's TLS certificate needs "
                                    "the cryptography package; install it with pip install")
    assert not (tmp_path / "o").exists()
