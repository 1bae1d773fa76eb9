"""Where the work runs: in this process, on local worker processes, or on a Dask cluster.

The statistics never branch on the backend. A stage hands a backend a pure function, the data
every task shares and one small item per task; the backend returns the results in item order.
Results are combined in that order by the caller, so they are bitwise the same whatever the
backend, the number of workers or the order in which tasks finish.

Backends:

:class:`InProcess`
    Runs the tasks here, in order, with numba's threads (the default, ``workers=1``).
:class:`DaskBackend`
    Runs them on a ``dask.distributed`` cluster: an existing scheduler (``scheduler=ADDRESS``)
    or a local cluster of worker processes started for the run (``workers=N``). The shared data
    are scattered to every worker once; a task whose worker dies is run again on another one
    (up to Dask's ``distributed.scheduler.allowed-failures`` times).

Security: the local cluster started for ``workers=N`` speaks TLS only, with a certificate made
for the run and held in memory (:meth:`distributed.security.Security.temporary`): scheduler,
workers and glmeeg's client authenticate each other with it, so nobody else on the machine can
connect to the cluster or submit work to it. A client of an existing scheduler takes its
credentials from Dask's configuration (``distributed.comm.tls.*``, or the
``distributed.client.security-loader`` hook), as any Dask client does.

Dask is optional (``pip install "glmeeg[dask]"``); it is imported only when asked for.
"""

from __future__ import annotations

import logging
import math
import os
import re
import warnings
from contextlib import contextmanager
from dataclasses import dataclass
from typing import Any, Callable, Iterator, Protocol, Sequence

from .errors import ExecutionError, GlmeegError

__all__ = ["Backend", "InProcess", "DaskBackend", "open_backend", "parse_size", "default_memory_limit",
           "Progress"]

log = logging.getLogger("glmeeg")


class Progress(Protocol):
    """Receives progress: ``progress(task, done, total)``; ``done == 0`` announces a task."""

    def __call__(self, task: str, done: int, total: int) -> None: ...


class Backend(Protocol):
    """Runs ``fn(shared, item)`` for every item and returns the results in item order."""

    workers: int

    def map(self, fn: Callable[[Any, Any], Any], items: Sequence[Any], *, shared: Any = None,
            labels: Sequence[str] | None = None,
            on_result: Callable[[int, Any], None] | None = None, keep: bool = True) -> list | None:
        """``keep=False`` hands each result to ``on_result`` only and returns None, so results
        need not all be held at once."""


class InProcess:
    """Run every task in this process, one after the other (numba still uses its threads)."""

    workers = 1

    def map(self, fn, items, *, shared=None, labels=None, on_result=None, keep=True) -> list | None:
        out = []
        for i, item in enumerate(items):
            r = fn(shared, item)
            if on_result is not None:
                on_result(i, r)
            if keep:
                out.append(r)
        return out if keep else None

    def __repr__(self) -> str:
        return "InProcess()"


def _run_task(fn, shared, item, threads):
    """A task on a Dask worker, its numba kernels on ``threads`` threads (so that the worker's
    own threads and numba's do not multiply)."""
    import numba

    numba.set_num_threads(max(1, min(int(threads), numba.config.NUMBA_NUM_THREADS)))
    return fn(shared, item)


@dataclass
class DaskBackend:
    """Run tasks on a ``dask.distributed`` client's cluster.

    Parameters
    ----------
    client : distributed.Client
    task_threads : int, default 1
        numba threads of each task. A cluster whose workers run several tasks at once (several
        threads per worker) should keep 1; :func:`open_backend` gives the workers of the local
        cluster it starts one task at a time and the cores shared among them.
    """

    client: Any
    task_threads: int = 1

    @property
    def security(self) -> Any:
        """The client's ``distributed.security.Security``: for the local cluster of
        :func:`open_backend`, the run's temporary TLS credentials (the only ones it accepts)."""
        return self.client.security

    @property
    def workers(self) -> int:
        try:
            info = self.client.scheduler_info(n_workers=-1)
        except TypeError:  # versions before the n_workers argument list every worker
            info = self.client.scheduler_info()
        return max(1, len(info.get("workers", {})))

    def map(self, fn, items, *, shared=None, labels=None, on_result=None, keep=True) -> list | None:
        from distributed import as_completed
        from distributed.scheduler import KilledWorker

        if not items:
            return [] if keep else None
        token = os.urandom(6).hex()
        name = getattr(fn, "__name__", "task")
        out: list = [None] * len(items) if keep else []
        futures: list = []
        shared_f = None

        def what(i: int) -> str:
            return labels[i] if labels is not None else f"task {i + 1} of {len(items)}"

        try:
            if shared is not None:  # shipped to every worker once
                shared_f = self.client.scatter(shared, broadcast=True, hash=False)
            futures = [self.client.submit(_run_task, fn, shared_f, item, self.task_threads,
                                          key=f"glmeeg-{name}-{token}-{i}", pure=False)
                       for i, item in enumerate(items)]
            index = {f.key: i for i, f in enumerate(futures)}
            for fut in as_completed(futures, loop=self.client.loop):
                i = index[fut.key]
                try:
                    r = fut.result()
                except KilledWorker:
                    raise ExecutionError(f"{what(i)}: the Dask worker running it died on every try "
                                         f"({_allowed_failures() + 1} tries); it may need more memory "
                                         "than a worker has (see the workers' logs)") from None
                except GlmeegError:
                    raise
                except Exception as e:  # noqa: BLE001 - a remote failure becomes one line
                    raise ExecutionError(f"{what(i)}: failed on the Dask cluster ({_first_line(e)})") from None
                if keep:
                    out[i] = r
                if on_result is not None:
                    on_result(i, r)
                fut.release()
        except (GlmeegError, KeyboardInterrupt):
            self.client.cancel(futures)
            raise
        except Exception as e:  # noqa: BLE001 - lost scheduler, lost scattered data ...
            self.client.cancel(futures)
            raise ExecutionError(f"the Dask cluster failed while running {name} ({_first_line(e)})") from None
        finally:
            if shared_f is not None:
                shared_f.release()
        return out if keep else None

    def __repr__(self) -> str:
        return f"DaskBackend({self.client.scheduler.address})"


def _first_line(e: BaseException) -> str:
    text = (str(e).strip().splitlines() or [""])[0]
    return f"{type(e).__name__}: {text}" if text else type(e).__name__


def _allowed_failures() -> int:
    import dask

    return int(dask.config.get("distributed.scheduler.allowed-failures", 3))


def _need_distributed(what: str):
    try:
        import distributed
    except ImportError:
        raise ExecutionError(f"{what} needs Dask's distributed scheduler; install it with "
                             "pip install \"glmeeg[dask]\"") from None
    return distributed


def _run_security(distributed, what: str):
    """A self-signed certificate for every role of the run's local cluster, in memory only
    (``Security.temporary``, which requires ``cryptography`` and encryption on every comm)."""
    try:
        return distributed.Security.temporary()
    except ImportError:
        raise ExecutionError(f"{what}: the local Dask cluster's TLS certificate needs the "
                             "cryptography package; install it with pip install \"glmeeg[dask]\"") from None


def _scheduler_security(distributed, scheduler: str):
    """The client's security for an existing scheduler, from Dask's configuration.

    None when a ``distributed.client.security-loader`` is configured: the Client then calls it,
    as it does for any address. Otherwise ``Security()``, which reads ``distributed.comm.tls.*``
    and ``distributed.comm.require-encryption`` (config files or ``DASK_DISTRIBUTED__COMM__...``
    variables); a mismatch of address and configuration is refused here, in one line, because
    the Client would raise a TypeError or RuntimeError mid-connection and leave its event loop
    running.
    """
    import dask
    from distributed.comm import parse_address

    if dask.config.get("distributed.client.security-loader", None):
        return None
    try:
        security = distributed.Security()
    except (ValueError, TypeError, ImportError) as e:  # bad TLS version; OpenSSL before 1.1.1
        raise ExecutionError(f"--scheduler {scheduler}: Dask's TLS configuration is not usable "
                             f"({_first_line(e)})") from None
    try:
        scheme = parse_address(scheduler)[0].lower()
    except (ValueError, TypeError) as e:
        raise ExecutionError(f"--scheduler {scheduler}: not a scheduler address ({_first_line(e)}); "
                             "expected e.g. tcp://10.0.0.5:8786 or tls://10.0.0.5:8786") from None
    if scheme not in ("tcp", "tls", "ws", "wss"):
        raise ExecutionError(f"--scheduler {scheduler}: unknown protocol {scheme!r}; expected "
                             "tcp://, tls://, ws:// or wss:// followed by host:port")
    encrypted = scheme in ("tls", "wss")  # Dask's two comms that take the TLS credentials
    if encrypted and not (security.tls_ca_file and security.tls_client_cert):
        raise ExecutionError(f"--scheduler {scheduler}: a {scheme}:// scheduler needs the client's "
                             "certificate in Dask's configuration (distributed.comm.tls.ca-file, "
                             "distributed.comm.tls.client.cert and .key, or the "
                             "DASK_DISTRIBUTED__COMM__TLS__... environment variables)")
    if security.require_encryption and not encrypted:
        raise ExecutionError(f"--scheduler {scheduler}: Dask's configuration requires encryption "
                             "(distributed.comm.require-encryption); give the scheduler's tls:// "
                             "address")
    return security


@contextmanager
def open_backend(*, workers: int = 1, scheduler: str | None = None, client: Any = None,
                 timeout: float = 10.0, worker_timeout: float = 60.0) -> Iterator[Backend]:
    """The backend of a run, closed (with any cluster it started) on exit.

    Parameters
    ----------
    workers : int, default 1
        Local execution: 1 runs everything in this process; more starts a local Dask cluster of
        that many worker processes (loopback only, TLS with a temporary certificate of the run),
        with the machine's cores shared among them.
    scheduler : str, optional
        Address of an existing Dask scheduler (``tcp://host:8786``, or ``tls://host:8786`` with
        the client's certificate in Dask's ``distributed.comm.tls.*`` configuration); ``workers``
        must then be 1.
    client : distributed.Client, optional
        An existing client to use (it is left open).
    timeout : float, default 10
        Seconds to wait for the scheduler.
    worker_timeout : float, default 60
        Seconds to wait for the scheduler's first worker.

    Raises
    ------
    ExecutionError
        Dask (or, for the local cluster's certificate, ``cryptography``) is not installed, the
        scheduler cannot be reached, refuses the credentials or has no worker, Dask's TLS
        configuration does not fit the scheduler's address, the local cluster does not start,
        ``workers`` < 1, or both ``workers`` and ``scheduler`` are given.
    """
    if client is not None:
        yield DaskBackend(client)
        return
    if scheduler is not None:
        if workers != 1:
            raise ExecutionError(f"--workers {workers} and --scheduler {scheduler}: give one of them "
                                 "(the scheduler's cluster has its own workers)")
        distributed = _need_distributed("--scheduler")
        security = _scheduler_security(distributed, scheduler)
        try:
            c = distributed.Client(scheduler, timeout=timeout, set_as_default=False, security=security)
        # OSError covers ssl.SSLError (a certificate file that cannot be loaded) and Dask's
        # CommClosedError / FatalCommClosedError (credentials the scheduler refuses).
        except (OSError, TimeoutError, ValueError, TypeError) as e:
            raise ExecutionError(f"--scheduler {scheduler}: cannot reach the Dask scheduler "
                                 f"({_first_line(e)})") from None
        try:
            try:
                c.wait_for_workers(1, timeout=worker_timeout)
            except (TimeoutError, OSError):
                raise ExecutionError(f"--scheduler {scheduler}: no worker joined the cluster within "
                                     f"{worker_timeout:g} s") from None
            yield DaskBackend(c)
        finally:
            c.close()
        return
    if workers < 1:
        raise ExecutionError(f"--workers must be at least 1; got {workers}")
    if workers == 1:
        yield InProcess()
        return
    distributed = _need_distributed(f"--workers {workers}")
    security = _run_security(distributed, f"--workers {workers}")
    threads = max(1, (os.cpu_count() or 1) // workers)
    try:
        with warnings.catch_warnings():  # "port 8787 in use" when another cluster runs: harmless
            warnings.simplefilter("ignore", UserWarning)
            # One task at a time per worker (memory: one subject per worker), numba sharing
            # the cores among the workers. Loopback alone does not keep other local users out:
            # every comm is TLS with the run's certificate, required both ways.
            cluster = distributed.LocalCluster(n_workers=workers, threads_per_worker=1, processes=True,
                                               host="127.0.0.1", dashboard_address=None,
                                               silence_logs=logging.ERROR, security=security,
                                               protocol="tls")
    except Exception as e:  # noqa: BLE001 - no sockets, no processes ...
        raise ExecutionError(f"--workers {workers}: the local Dask cluster did not start "
                             f"({_first_line(e)})") from None
    try:
        c = distributed.Client(cluster, set_as_default=False, security=security)
        try:
            yield DaskBackend(c, task_threads=threads)
        finally:
            c.close()
    finally:
        cluster.close()


_UNITS = {"b": 1, "kb": 10**3, "mb": 10**6, "gb": 10**9, "tb": 10**12,
          "kib": 2**10, "mib": 2**20, "gib": 2**30, "tib": 2**40}


def parse_size(text: str | int, *, where: str = "--memory-limit") -> int:
    """Bytes of a size such as ``"2GB"``, ``"512MiB"`` or ``"1.5 GiB"`` (an int is bytes).

    Raises
    ------
    GlmeegError
        Not a positive size with a unit (B, kB, MB, GB, TB, KiB, MiB, GiB, TiB).
    """
    if isinstance(text, int) and not isinstance(text, bool):
        value = text
    else:
        m = re.fullmatch(r"\s*([0-9]*\.?[0-9]+)\s*([a-zA-Z]+)\s*", str(text))
        if m is None or m.group(2).lower() not in _UNITS:
            raise GlmeegError(f"{where}: {text!r} is not a size; expected a number and a unit, "
                              "e.g. 2GB or 512MiB")
        number = float(m.group(1)) * _UNITS[m.group(2).lower()]
        if not math.isfinite(number) or number > 2**62:
            raise GlmeegError(f"{where}: {text[:40]!r}... is larger than any machine's memory")
        value = int(number)
    if value <= 0:
        raise GlmeegError(f"{where}: {text!r}; expected a positive size")
    return value


def default_memory_limit() -> int:
    """Half of this machine's memory, between 1 GiB and 16 GiB (the default budget)."""
    try:
        total = os.sysconf("SC_PAGE_SIZE") * os.sysconf("SC_PHYS_PAGES")
    except (ValueError, OSError, AttributeError):
        total = 8 * 2**30
    return int(min(max(total // 2, 2**30), 16 * 2**30))


def format_size(n: float) -> str:
    """``n`` bytes as MiB or GiB, for messages."""
    if n >= 2**30:
        return f"{n / 2**30:.2f} GiB"
    return f"{n / 2**20:.0f} MiB" if n >= 2**20 else f"{n / 2**10:.0f} KiB"
