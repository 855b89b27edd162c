"""Connecting to a Dask cluster for the sharded jobs (evaluation by users, encoding by items).

xrec does not schedule anything itself: :mod:`dask.distributed` runs the shard tasks,
retries the shards of a worker that dies, and moves the data. This module only decides
which cluster to use:

* ``client=`` an existing :class:`distributed.Client` — used as it is and left open;
* ``scheduler="tcp://host:8786"`` — the address of a running scheduler (started with
  ``dask scheduler`` and ``dask worker ADDRESS``); the workers must be able to import
  xrec and read the same files (data, embedding cache) as the caller;
* neither — a :class:`distributed.LocalCluster` on this machine: ``workers`` processes
  with one thread each (default: one per CPU core), closed again when the job ends.
"""

from __future__ import annotations

import contextlib
import logging
import os
from collections.abc import Iterator, Sequence
from typing import TYPE_CHECKING, Any

from xrec._validation import check_int
from xrec.errors import ConfigError, XrecError

if TYPE_CHECKING:
    from distributed import Client

#: Seconds to wait for a scheduler given by address before giving up.
CONNECT_TIMEOUT = 30


def check_cluster_options(scheduler: Any = None, workers: Any = None, *, where: str = "") -> None:
    """Raise :class:`ConfigError` unless ``scheduler`` is ``None`` or an address and ``workers`` ``None`` or an int >= 1.

    ``where`` prefixes the field names in messages (e.g. ``"evaluate."`` for a spec).
    """
    if scheduler is not None and (not isinstance(scheduler, str) or not scheduler.strip()):
        raise ConfigError(f"{where}scheduler: give a scheduler address such as 'tcp://127.0.0.1:8786', got {scheduler!r}")
    if workers is not None:
        check_int(workers, f"{where}workers", low=1)
    if scheduler is not None and workers is not None:
        raise ConfigError(
            f"{where}workers: the number of workers is set only for a local cluster; "
            f"a running scheduler ({scheduler}) has the workers that were started for it"
        )


def check_shard_size(shard_size: Any) -> None:
    """Raise :class:`ConfigError` unless ``shard_size`` is ``None`` or an int >= 1."""
    if shard_size is not None:
        check_int(shard_size, "shard_size", low=1)


def blas_threads_here() -> int | None:
    """Threads the BLAS library of this process uses now (``None`` when numpy has no BLAS to ask)."""
    from threadpoolctl import threadpool_info

    counts = [int(pool["num_threads"]) for pool in threadpool_info() if pool.get("user_api") == "blas"]
    return max(counts) if counts else None


def resolve_blas_threads(blas_threads: Any) -> int | None:
    """``"same"`` -> :func:`blas_threads_here`; an int >= 1 as it is; ``None`` -> leave the workers' setting.

    Raises
    ------
    ConfigError
        Anything else.
    """
    if blas_threads is None:
        return None
    if blas_threads == "same":
        return blas_threads_here()
    return check_int(blas_threads, "blas_threads", low=1, expected="'same', None or an integer >= 1")


def default_workers() -> int:
    """Workers of a local cluster when none is asked for: one per CPU core."""
    return max(1, os.cpu_count() or 1)


@contextlib.contextmanager
def open_client(
    scheduler: str | None = None,
    workers: int | None = None,
    *,
    client: Client | None = None,
) -> Iterator[Client]:
    """A Dask client for the duration of a ``with`` block.

    Parameters
    ----------
    scheduler
        Address of a running Dask scheduler; ``None`` starts a local cluster.
    workers
        Worker processes of the local cluster (one thread each); default one per core.
        Not allowed together with ``scheduler``.
    client
        An open client to use instead (then ``scheduler`` and ``workers`` must be ``None``);
        it is not closed at the end.

    Yields
    ------
    distributed.Client

    Raises
    ------
    ConfigError
        Bad options, or no scheduler answering at ``scheduler``.
    """
    if client is not None:
        if scheduler is not None or workers is not None:
            raise ConfigError("give either an open client or scheduler/workers, not both")
        yield client
        return
    check_cluster_options(scheduler, workers)
    from distributed import Client, LocalCluster

    if scheduler is not None:
        try:
            connected = Client(scheduler, timeout=CONNECT_TIMEOUT)
        except (OSError, TimeoutError) as exc:
            raise ConfigError(f"scheduler: cannot reach a Dask scheduler at {scheduler!r}: {exc}") from exc
        with connected:
            yield connected
        return
    n = workers or default_workers()
    with LocalCluster(
        n_workers=n,
        threads_per_worker=1,
        processes=True,
        dashboard_address=":0",  # any free port: several clusters may run side by side
        silence_logs=logging.ERROR,
    ) as cluster, Client(cluster) as local:
        yield local


def scatter_to_all(client: Client, value: Any) -> Any:
    """``value`` copied once to every worker; returns its future (pass it to ``client.submit``).

    Every worker holds a copy, so a worker that dies loses nothing: its replacement
    fetches the value from another worker.
    """
    # A list of one, so a list or dict value is sent whole rather than element by element.
    return client.scatter([value], broadcast=True, hash=False)[0]


def run_shards(
    client: Client,
    task: Any,
    shared: Sequence[Any],
    shards: Sequence[tuple],
    *,
    desc: str,
    progress: bool = False,
    rounds: int = 3,
) -> list[Any]:
    """Run ``task(*shared, *shard)`` for every shard on the cluster; results in shard order.

    ``shared`` values are sent once to every worker (:func:`scatter_to_all`); each shard's
    own arguments travel with its task. When a worker dies, Dask runs its unfinished
    shards again on another worker. When every worker holding the shared values died
    (e.g. the only one), the shards still waiting are cancelled by Dask; they are sent
    again with the shared values, up to ``rounds`` times in all. Results are placed by
    shard number, so each shard counts exactly once. A progress bar (``desc``) moves as
    shards finish; the first error raised by a task is raised here, and the remaining
    tasks are cancelled.

    Raises
    ------
    XrecError
        Shards still not run after ``rounds`` sendings.
    """
    from distributed import as_completed
    from distributed.client import FutureCancelledError
    from tqdm.auto import tqdm

    results: list[Any] = [None] * len(shards)
    pending = list(range(len(shards)))
    with tqdm(total=len(shards), desc=desc, unit="shard", disable=not progress) as bar:
        for _ in range(rounds):
            client.wait_for_workers(1, timeout=CONNECT_TIMEOUT)
            shared_f = [scatter_to_all(client, value) for value in shared]
            number = {}
            for i in pending:
                number[client.submit(task, *shared_f, *shards[i], pure=False)] = i
            lost = []
            try:
                for future in as_completed(list(number)):
                    try:
                        results[number[future]] = future.result()
                    except FutureCancelledError:  # its shared inputs died with the workers holding them
                        lost.append(number[future])
                        continue
                    bar.update()
            finally:
                client.cancel([*number, *shared_f])
            pending = sorted(lost)
            if not pending:
                return results
    raise XrecError(f"{len(pending)} of {len(shards)} shards could not be run: the workers holding their inputs kept dying")


def worker_count(client: Client) -> int:
    """Workers the client's scheduler has now (at least 1)."""
    return max(1, len(client.scheduler_info(n_workers=-1).get("workers", {})))
