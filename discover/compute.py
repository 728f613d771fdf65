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


@contextmanager
def cluster(config):
    """Yield a ``dask.distributed.Client`` for the config's scheduler, or None."""
    section = config["compute"]
    address = section["scheduler"]
    if address is None:
        yield None
        return
    try:
        from dask.distributed import Client, LocalCluster
    except ImportError:
        raise ConfigError(
            f"{config['_source']}: [compute].scheduler = {address!r} needs Dask: "
            'pip install "discover[dask]" (or dask[distributed]).'
        ) from None
    if address == "local":
        with LocalCluster(n_workers=section["workers"], threads_per_worker=1, processes=section["processes"],
                          dashboard_address=None) as local, Client(local) as client:
            yield client
        return
    try:
        client = Client(address, timeout=section["timeout"])
    except OSError as err:
        raise ConfigError(f"{config['_source']}: cannot reach the Dask scheduler at [compute].scheduler = "
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
