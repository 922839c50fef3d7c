"""Connecting to a dask.distributed cluster and checking it can run a job.

``connect(cluster, source)`` accepts a ``distributed.Client``, a scheduler
address (``tcp://host:8786``) or ``"local:N"`` (a LocalCluster of N worker
processes on loopback, one thread each, closed at the end).  Before any
task runs it checks, in order: the scheduler answers within
``CONNECT_TIMEOUT`` seconds and has workers; every worker runs the same
versions of the packages that shape results or pickling as this process;
every worker opens the source and sees the same shape and dtype.  Each
failure is a :class:`~rankfold.errors.ClusterError` naming the address, the
worker, the path or the package, raised before any result is written.
"""

from __future__ import annotations

import contextlib
import logging
import re
import sys

from rankfold.errors import ClusterError, UsageError

CONNECT_TIMEOUT = 10.0  # seconds to reach a scheduler and to see its first worker
MAX_LOCAL_WORKERS = 256
_LOCAL = re.compile(r"^local:(\d+)$")


def check_cluster_argument(cluster) -> None:
    """Validate ``cluster=`` without importing dask (scipy-like message on failure)."""
    if cluster is None:
        return
    if isinstance(cluster, str):
        text = cluster.strip()
        if text.startswith("local"):
            m = _LOCAL.match(text)
            if not m or not 1 <= int(m.group(1)) <= MAX_LOCAL_WORKERS:
                raise UsageError(f"cluster must be a scheduler address (tcp://host:8786) or 'local:N' with "
                                 f"N from 1 to {MAX_LOCAL_WORKERS} worker processes; got {cluster!r}")
            return
        if not text or any(c.isspace() for c in text):
            raise UsageError(f"cluster must be a scheduler address (tcp://host:8786) or 'local:N'; got {cluster!r}")
        return
    distributed = sys.modules.get("distributed")
    if distributed is not None and isinstance(cluster, distributed.Client):
        return
    raise UsageError("cluster must be a distributed.Client, a scheduler address (tcp://host:8786) or "
                     f"'local:N'; got {type(cluster).__name__}")


class ClusterSession:
    """A connected, checked cluster; what :func:`rankfold.cluster.passes.cluster_pass` needs.

    Attributes
    ----------
    client : distributed.Client
    address : str
        The scheduler's address.
    threads : int
        Worker threads in the cluster when the session started.
    blas_limits : dict
        BLAS threads per worker, keyed by the worker's host (``tcp://10.0.0.5``).
    bytes_moved : int
        Bytes of task arguments and results sent between processes so far
        (states, bases, recipes; never data blocks).
    tasks : int
        Tasks submitted so far.
    """

    def __init__(self, client, label: str):
        self.client = client
        self.label = label
        self.address = client.scheduler.address
        info = client.scheduler_info()["workers"]
        self.workers = sorted(info)
        self.threads = sum(int(w["nthreads"]) for w in info.values()) or 1
        self.blas_limits: dict = {}
        self.bytes_moved = 0
        self.tasks = 0
        self.outputs_checked: set[str] = set()

    @property
    def tasks_per_pass(self) -> int:
        """How many ranges a pass is cut into: a few per worker thread, so a slow worker does not hold all back."""
        from rankfold.cluster.passes import TASKS_PER_THREAD

        return TASKS_PER_THREAD * self.threads

    def set_blas_limits(self) -> None:
        """Each host's cores divided among the worker threads it runs (at least 1)."""
        self.blas_limits = self._blas_limits(self.client.scheduler_info()["workers"])

    def _blas_limits(self, info: dict) -> dict:
        cores = self.client.run(_host_cores)
        threads: dict[str, int] = {}
        host_cores: dict[str, int] = {}
        for addr, w in info.items():
            host = addr.rsplit(":", 1)[0]
            threads[host] = threads.get(host, 0) + int(w["nthreads"])
            host_cores[host] = cores.get(addr, (None, 1))[1]
        return {h: max(1, host_cores[h] // max(1, threads[h])) for h in threads}

    def check_versions(self) -> None:
        """Refuse workers whose package versions differ from this process's."""
        from rankfold.cluster.worker import versions

        mine = client_versions()
        try:
            theirs = self.client.run(versions)
        except Exception as exc:  # typically: rankfold is not installed where the workers run
            raise ClusterError(f"the workers of {self.address} cannot run rankfold's checks "
                               f"({type(exc).__name__}: {exc}); install rankfold {mine['rankfold']} and the "
                               "same packages on every worker") from None
        for addr in sorted(theirs):
            diff = [f"{name} {theirs[addr].get(name)} (here {mine[name]})" for name in mine
                    if theirs[addr].get(name) != mine[name]]
            if diff:
                raise ClusterError(
                    f"worker {addr} runs different versions from this process: {', '.join(diff)}; install the "
                    "same versions on every worker (the same environment image) so that results and "
                    "pickled tasks agree")

    def check_source(self, source) -> None:
        """Every worker must open ``source`` from its recipe and see the same table."""
        from rankfold.cluster.worker import probe

        spec = source.spec()
        _refuse_failures(self.client.run(probe, spec), f"cannot read {spec.path}",
                         "Workers open the data themselves: put it on storage every worker sees at the same "
                         "path (a shared file system or an fsspec URL such as s3://bucket/table.zarr)")

    def check_output(self, plan) -> None:
        """Every worker must open the store it will write rows into (a :class:`~rankfold.sample_outputs.StoredRows`)."""
        from rankfold.cluster.worker import probe_group

        if plan.group in self.outputs_checked:
            return
        _refuse_failures(self.client.run(probe_group, plan.group, plan.names), f"cannot write to {plan.group}",
                         "Workers write the per-sample outputs themselves: put the output on storage every "
                         "worker sees at the same path (a shared file system or an fsspec URL such as "
                         "s3://bucket/pca.zarr)")
        self.outputs_checked.add(plan.group)

    def summary(self) -> dict:
        """What the store records about the cluster run."""
        return {"scheduler": self.address, "kind": self.label, "workers": len(self.workers),
                "threads": self.threads, "tasks": self.tasks, "bytes_moved": int(self.bytes_moved)}


def _refuse_failures(answers: dict, what: str, advice: str) -> None:
    """Raise a ClusterError naming the first worker whose probe answered with a reason (None is fine)."""
    bad = {addr: why for addr, why in sorted(answers.items()) if why}
    if bad:
        addr, why = next(iter(bad.items()))
        more = f" (and {len(bad) - 1} more worker(s))" if len(bad) > 1 else ""
        raise ClusterError(f"worker {addr}{more} {what}: {why}. {advice}")


def client_versions() -> dict:
    from rankfold.cluster.worker import versions

    return versions()


def _host_cores():
    from rankfold.cluster.worker import host_cores

    return host_cores()


@contextlib.contextmanager
def connect(cluster, source=None, timeout: float | None = None):
    """Connect (or start a local cluster), check it, yield a :class:`ClusterSession`, clean up.

    Parameters
    ----------
    cluster : distributed.Client, str
        A client (left open at the end), a scheduler address, or ``"local:N"``.
    source : Source, optional
        Checked to be readable by every worker.
    timeout : float, optional
        Seconds to wait for the scheduler and for its first worker
        (default ``CONNECT_TIMEOUT``).

    Raises
    ------
    UsageError
        ``cluster`` is malformed.
    ClusterError
        Unreachable scheduler, no workers, version mismatch, data not visible.
    """
    check_cluster_argument(cluster)
    timeout = CONNECT_TIMEOUT if timeout is None else float(timeout)
    stack = contextlib.ExitStack()
    with stack:
        client, label = _client(cluster, timeout, stack)
        try:
            client.wait_for_workers(1, timeout=timeout)
        except Exception:
            raise ClusterError(f"the dask scheduler at {client.scheduler.address} has no workers after "
                               f"{timeout:g} s; start workers with `dask worker {client.scheduler.address}`") from None
        session = ClusterSession(client, label)
        session.check_versions()
        session.set_blas_limits()
        if source is not None:
            session.check_source(source)
        yield session


def optional_session(cluster, source=None):
    """:func:`connect` when ``cluster`` is given; a context yielding None (a serial run) otherwise."""
    if cluster is None:
        return contextlib.nullcontext()
    return connect(cluster, source)


def _client(cluster, timeout: float, stack: contextlib.ExitStack):
    """A client for ``cluster``; what must be closed goes on ``stack``."""
    from distributed import Client

    if isinstance(cluster, Client):
        return cluster, "client"
    m = _LOCAL.match(cluster.strip())
    if m:
        from distributed import LocalCluster

        try:
            local = LocalCluster(n_workers=int(m.group(1)), threads_per_worker=1, processes=True,
                                 host="127.0.0.1", dashboard_address=None, silence_logs=logging.ERROR)
        except Exception as exc:
            raise ClusterError(f"cannot start a local cluster of {m.group(1)} worker process(es): "
                               f"{type(exc).__name__}: {exc}") from None
        stack.callback(local.close)
        client = Client(local, set_as_default=False)
        stack.callback(client.close)
        return client, f"local:{m.group(1)}"
    address = cluster.strip()
    # The client logs every failed attempt; the one message that matters is ours.
    logger = logging.getLogger("distributed")
    level = logger.level
    logger.setLevel(logging.CRITICAL)
    try:
        client = Client(address, timeout=timeout, set_as_default=False)
    except Exception as exc:
        raise ClusterError(f"cannot reach the dask scheduler at {address} within {timeout:g} s "
                           f"({type(exc).__name__}: {exc}); check the address and that "
                           "`dask scheduler` is running there") from None
    finally:
        logger.setLevel(level)
    stack.callback(client.close)
    return client, "scheduler"
