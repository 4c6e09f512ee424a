"""Torch threads of the workers of a running dask scheduler, so that they never outnumber their machine's cores.

A LocalCluster's workers get ``cores ÷ workers`` threads from each tile's
task (:class:`plantation.mapping.tiles.Settings`); the workers of a running
scheduler may sit on other machines with other cores, several to a machine,
each with several dask threads running tiles at once (each calling torch with
its own thread team). :class:`TorchThreads` sets, in every worker as it starts
(a worker restarted after a death too), ``cores of its machine ÷ dask threads
of all workers on that machine``. Imported only when a run uses a scheduler
(it needs ``distributed``).
"""

from __future__ import annotations

import os
from collections import defaultdict
from typing import Any

from distributed import Client
from distributed.diagnostics.plugin import WorkerPlugin


def machine_cores() -> int:
    """Cores this process may run on."""
    return len(os.sched_getaffinity(0)) if hasattr(os, "sched_getaffinity") else (os.cpu_count() or 1)


def threads_by_host(workers: dict[str, dict[str, Any]], cores: dict[str, int]) -> dict[str, int]:
    """Torch threads per task on each host: its cores ÷ the dask threads of all its workers (at least 1).

    ``workers``: the scheduler's ``scheduler_info()["workers"]`` (address →
    ``host``, ``nthreads``); ``cores``: each worker's cores by address.
    """
    threads: dict[str, int] = defaultdict(int)
    for w in workers.values():
        threads[w["host"]] += int(w["nthreads"])
    out: dict[str, int] = {}
    for addr, w in workers.items():
        out[w["host"]] = max(1, int(cores.get(addr, 1)) // max(threads[w["host"]], 1))
    return out


class TorchThreads(WorkerPlugin):
    """Set torch's threads in each worker as it starts (see the module docstring)."""

    name = "plantation-torch-threads"

    def __init__(self, by_host: dict[str, int]) -> None:
        self.by_host = by_host

    def setup(self, worker: Any) -> None:
        import torch

        n = self.by_host.get(worker.ip)
        if n is None:  # a worker that joined after the run started: its own share
            n = max(1, machine_cores() // max(int(worker.state.nthreads), 1))
        torch.set_num_threads(n)


def limit_torch_threads(client: Client) -> dict[str, int]:
    """Register :class:`TorchThreads` on the scheduler's workers; returns the threads per host."""
    info = client.scheduler_info()["workers"]
    by_host = threads_by_host(info, client.run(machine_cores))
    client.register_plugin(TorchThreads(by_host), name=TorchThreads.name)
    return by_host
