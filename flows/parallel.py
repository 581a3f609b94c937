"""Where a flow's tasks run: Prefect's default thread pool, a temporary local Dask cluster, or a Dask scheduler.

``task_runner("local")`` gives a ``DaskTaskRunner`` that starts a ``LocalCluster`` for one flow run and stops it
afterwards; ``task_runner("tcp://host:8786")`` connects to a running scheduler; ``task_runner(None)`` reads
``ENTIVEC_DASK_ADDRESS`` and, when that is unset too, keeps the flow's own runner. ``run_flow`` runs a flow
with the chosen runner and makes sure the Dask workers report to the same Prefect server as the flow.

Only work submitted from a flow body reaches the runner: cross-fitting folds (``tasks/evidence/crossfit.py``), sweep
candidates (``flows.sweep``), whole train runs (``flows.sweep.train_many``), and the train flow's per-partition
ingestion, counting and encoding, which take the runner's client (``flow_dask_client``).
"""

from __future__ import annotations

import ipaddress
import os
import socket
from collections.abc import Iterator
from contextlib import contextmanager
from typing import Any
from urllib.parse import urlsplit

from prefect import Flow
from prefect.settings import PREFECT_API_URL, temporary_settings
from prefect.task_runners import TaskRunner

ADDRESS_VARIABLE = "ENTIVEC_DASK_ADDRESS"
LOCAL = "local"
DEFAULT_WORKERS = 2


def local_cluster_options(workers: int = DEFAULT_WORKERS) -> dict[str, Any]:
    """``LocalCluster`` settings: ``workers`` processes of one thread each, nothing listening beyond loopback.

    One thread per worker because a network's training sets torch's process-wide thread count (and the
    project's machines have 2 cores); processes rather than threads so that folds really run side by side.
    No dashboard: it would open a web port that nobody asked for.
    """
    if workers < 1:
        raise ValueError(f"a local Dask cluster needs at least one worker, got {workers}")
    return {
        "n_workers": workers,
        "threads_per_worker": 1,
        "processes": True,
        "host": "127.0.0.1",
        "dashboard_address": None,
    }


def resolve_address(dask: str | None) -> str | None:
    """The Dask setting in force: the argument, else ``ENTIVEC_DASK_ADDRESS``, else None (no Dask)."""
    value = dask if dask is not None else os.environ.get(ADDRESS_VARIABLE)
    value = (value or "").strip()
    return value or None


def task_runner(dask: str | None = None, *, workers: int = DEFAULT_WORKERS) -> TaskRunner | None:
    """A ``DaskTaskRunner`` for ``dask`` ("local" or a scheduler address), or None to keep the flow's runner."""
    address = resolve_address(dask)
    if address is None:
        return None
    from distributed import LocalCluster
    from prefect_dask import DaskTaskRunner

    if address == LOCAL:
        return DaskTaskRunner(cluster_class=LocalCluster, cluster_kwargs=local_cluster_options(workers))
    return DaskTaskRunner(address=address)


@contextmanager
def local_cluster(workers: int = DEFAULT_WORKERS) -> Iterator[Any]:
    """A ``LocalCluster`` for several flow runs in a row (pass ``cluster.scheduler_address`` on); always stopped."""
    from distributed import LocalCluster

    with LocalCluster(**local_cluster_options(workers)) as cluster:
        yield cluster


def _is_loopback(address: str) -> bool:
    host = urlsplit(address if "://" in address else f"tcp://{address}").hostname or ""
    if host == "localhost":
        return True
    try:
        return ipaddress.ip_address(host).is_loopback
    except ValueError:
        try:
            return ipaddress.ip_address(socket.gethostbyname(host)).is_loopback
        except OSError:
            return False


@contextmanager
def prefect_api_for_workers(runner: TaskRunner | None) -> Iterator[None]:
    """Give Dask workers the flow's Prefect server.

    Workers learn the server from the flow's settings, which prefect-dask ships with every task. When
    ``PREFECT_API_URL`` is unset, a flow talks to a temporary server it starts itself and the settings name no
    address: each worker process would then start a temporary server of its own and record its task runs
    there. So the temporary server is started here, before the flow, and its address put into the settings.
    A scheduler on another machine cannot reach this machine's loopback server: that needs a real server.
    """
    address = getattr(runner, "address", None)
    is_dask = type(runner).__name__ == "DaskTaskRunner"
    if not is_dask or PREFECT_API_URL.value():
        yield
        return
    if address and not _is_loopback(address):
        raise ValueError(
            f"the Dask scheduler {address} is on another machine, and its workers cannot reach a temporary "
            "Prefect server on this one: set PREFECT_API_URL to a Prefect server that both can reach"
        )
    from prefect.server.api.server import SubprocessASGIServer

    server = SubprocessASGIServer()
    server.start()
    with temporary_settings(updates={PREFECT_API_URL: server.api_url}):
        yield


def flow_dask_client() -> Any | None:
    """The Dask client of the running flow's task runner, or None when the flow does not run on Dask (its work
    then stays in this process)."""
    from prefect.context import FlowRunContext

    runner = getattr(FlowRunContext.get(), "task_runner", None)
    if type(runner).__name__ != "DaskTaskRunner":
        return None
    return runner.client


def run_flow(flow: Flow, dask: str | None = None, *, workers: int = DEFAULT_WORKERS, **parameters: Any) -> Any:
    """Run ``flow(**parameters)`` on the task runner ``dask`` selects (see ``task_runner``)."""
    runner = task_runner(dask, workers=workers)
    chosen = flow.with_options(task_runner=runner) if runner is not None else flow
    with prefect_api_for_workers(runner):
        return chosen(**parameters)
