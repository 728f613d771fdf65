"""Where the heavy, independent pieces run: in this process, or on a Dask cluster.

With ``[compute].scheduler`` unset, everything runs here (the members' fits may use
local cores through joblib, ``[bootstrap].n_jobs``). With ``scheduler = "local"`` a
``dask.distributed.LocalCluster`` is started for the run; with an address such as
``"tcp://host:8786"`` the run connects to that scheduler. Then the per-run partial
Grams and the batches of ensemble members become Dask tasks.

Results are always gathered in submission order and summed in that order, so the model
is the same, bit for bit, whatever the number of workers. Dask is an optional extra
(``pip install "discover[dask]"``).
"""

from __future__ import annotations

from contextlib import contextmanager

from .exceptions import ConfigError


class Executor:
    """Runs independent tasks and returns their results in submission order.

    Here in this process (``client`` None; ``n_jobs`` > 1 spreads tasks over local
    cores with joblib), or as tasks of a ``dask.distributed.Client``. Stages take an
    executor instead of branching on where they run.
    """

    def __init__(self, client=None, n_jobs=1):
        self.client, self.n_jobs = client, n_jobs

    def map(self, function, items, *shared, progress=None, sizes=None):
        """``[function(item, *shared) for item in items]``, in order.

        ``progress`` names a progress bar (terminals only) advanced by ``sizes[i]``
        (default 1) as item i completes.
        """
        items = list(items)
        if self.client is not None:
            return map_in_order(self.client, function, items, *shared)
        from joblib import Parallel, delayed
        from tqdm.auto import tqdm

        sizes = sizes or [1] * len(items)
        results = []
        with tqdm(total=sum(sizes), desc=progress, disable=None if progress else True, leave=False) as bar:
            if self.n_jobs == 1:
                for item, size in zip(items, sizes):
                    results.append(function(item, *shared))
                    bar.update(size)
                return results
            tasks = (delayed(function)(item, *shared) for item in items)
            for result, size in zip(Parallel(n_jobs=self.n_jobs, return_as="generator")(tasks), sizes):
                results.append(result)
                bar.update(size)
        return results


@contextmanager
def cluster(compute, where="config"):
    """Yield a ``dask.distributed.Client`` for the ``[compute]`` settings' scheduler, or None."""
    address = compute.scheduler
    if address is None:
        yield None
        return
    try:
        from dask.distributed import Client, LocalCluster
    except ImportError:
        raise ConfigError(
            f"{where}: [compute].scheduler = {address!r} needs Dask: "
            'pip install "discover[dask]" (or dask[distributed]).'
        ) from None
    if address == "local":
        with LocalCluster(n_workers=compute.workers, threads_per_worker=1, processes=compute.processes,
                          dashboard_address=None) as local, Client(local) as client:
            yield client
        return
    try:
        client = Client(address, timeout=compute.timeout)
    except OSError as err:
        raise ConfigError(f"{where}: cannot reach the Dask scheduler at [compute].scheduler = "
                          f"{address!r} ({err}).") from None
    try:
        yield client
    finally:
        client.close()


def map_in_order(client, function, items, *shared):
    """``[function(item, *shared) for item in items]``, on the cluster when there is one.

    Shared arguments are scattered once to every worker; results come back in the
    order of ``items``.
    """
    if client is None:
        return [function(item, *shared) for item in items]
    scattered = [client.scatter(value, broadcast=True) for value in shared]
    futures = [client.submit(function, item, *scattered, pure=False) for item in items]
    return client.gather(futures)
