"""The dask.distributed cluster a batch runs on: a LocalCluster of worker processes,
a running scheduler, or SLURM/PBS jobs through dask-jobqueue.
"""

from __future__ import annotations

import contextlib
import os
import sys

from tempofield.batch.config import JOBQUEUE_PASS_THROUGH, UsageError


class Connection:
    """A client on the batch's cluster, and the cluster if the runner started it."""

    def __init__(self, client, cluster=None, expected_threads: int = 1, description: str = ""):
        self.client = client
        self.cluster = cluster
        self.expected_threads = expected_threads
        self.description = description

    @property
    def dashboard(self) -> str | None:
        try:
            services = self.client.scheduler_info().get("services", {})
        except Exception:  # noqa: BLE001 - informational only
            return None
        return self.client.dashboard_link if "dashboard" in services else None

    def close(self):
        with contextlib.suppress(Exception):
            self.client.close(timeout=10)
        if self.cluster is not None:
            with contextlib.suppress(Exception):
                self.cluster.close(timeout=10)


def make_jobqueue_cluster(settings: dict):
    """A dask-jobqueue SLURMCluster or PBSCluster from the [cluster] table; no job is submitted.

    ``cluster.job_script()`` shows the batch script each job will run.
    """
    kind = settings["kind"]
    try:
        import dask_jobqueue
    except ImportError:
        raise UsageError(f"[cluster] kind = {kind!r} needs dask-jobqueue: pip install 'tempofield[cluster]'.") from None
    missing = [k for k in ("cores", "memory") if k not in settings]
    if missing:
        raise UsageError(f"[cluster] kind = {kind!r} needs {' and '.join(missing)} (per job), "
                         "e.g. cores = 8 and memory = \"32GB\".")
    kwargs = {k: settings[k] for k in JOBQUEUE_PASS_THROUGH if k in settings}
    kwargs.setdefault("job_name", "tempofield")
    kwargs.setdefault("python", sys.executable)
    kwargs["scheduler_options"] = {"dashboard_address": settings.get("dashboard_address", ":8787")}
    if kind == "pbs":
        if "resource_spec" in settings:
            kwargs["resource_spec"] = settings["resource_spec"]
        return dask_jobqueue.PBSCluster(**kwargs)
    return dask_jobqueue.SLURMCluster(**kwargs)


def connect(settings: dict) -> Connection:
    """Start or join the cluster described by ``settings`` and return a default client on it.

    Order: an explicit scheduler address (``--scheduler`` or ``[cluster]
    scheduler``), then ``DASK_SCHEDULER_ADDRESS``, then ``kind`` (local,
    slurm, pbs).
    """
    import dask
    from distributed import Client, LocalCluster

    address = settings.get("scheduler") or os.environ.get("DASK_SCHEDULER_ADDRESS") \
        or dask.config.get("scheduler-address", None)
    if "allowed_failures" in settings:
        dask.config.set({"distributed.scheduler.allowed-failures": settings["allowed_failures"]})
    if address:
        try:
            client = Client(address, timeout="30s")
        except (OSError, TimeoutError) as exc:
            raise UsageError(f"cannot reach the dask scheduler at {address!r}: {exc}. Is it running? "
                             "Check the address (tcp://HOST:PORT) and DASK_SCHEDULER_ADDRESS.") from None
        threads = sum(client.nthreads().values()) or 1
        return Connection(client, None, threads, f"scheduler {address}")
    kind = settings["kind"]
    if kind == "local":
        n = settings.get("n_workers", max(1, (os.cpu_count() or 2) // settings.get("threads_per_worker", 1)))
        tpw = settings.get("threads_per_worker", 1)
        kwargs = dict(n_workers=n, threads_per_worker=tpw, processes=True,
                      dashboard_address=settings.get("dashboard_address", ":0"))
        if "memory_limit" in settings:
            kwargs["memory_limit"] = settings["memory_limit"]
        cluster = LocalCluster(**kwargs)
        return Connection(Client(cluster), cluster, n * tpw, f"local cluster, {n} worker processes x {tpw} thread(s)")
    cluster = make_jobqueue_cluster(settings)
    if "minimum_jobs" in settings or "maximum_jobs" in settings:
        cluster.adapt(minimum_jobs=settings.get("minimum_jobs", 0),
                      maximum_jobs=settings.get("maximum_jobs", settings.get("jobs", 1)))
    else:
        cluster.scale(jobs=settings.get("jobs", 1))
    jobs = settings.get("maximum_jobs", settings.get("jobs", 1))
    return Connection(Client(cluster), cluster, max(1, jobs * settings["cores"]),
                      f"{kind.upper()} jobs via dask-jobqueue ({jobs} x {settings['cores']} cores)")
