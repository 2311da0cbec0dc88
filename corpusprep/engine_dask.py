"""Running the per-batch stages on a Dask cluster (``dask.distributed``).

:func:`dask_mapper` is a :data:`corpusprep.pool.Mapper`: the pipeline hands it a
pure batch function and an iterable of batches, and it yields the results in
the order of the batches. Each batch is submitted as one task; at most
``in_flight`` tasks are outstanding, and results are taken from the head of a
queue kept in submission order, so the order is decided by position, never by
which task finishes first. The output bytes are therefore those of the local
engine, whatever the number of workers or the order in which they answer.

The batch function is submitted once per map as a task of its own, replicated
to every worker, and every batch task depends on it: a large function (a
trained tokenizer) travels to the scheduler once, not once per batch, and if
the workers holding it die, the scheduler can compute it again (data sent
with ``Client.scatter`` could not be recomputed). Replication matters: with
one copy, Dask's placement favours the worker that holds it and the batches
pile up there (measured on 2 workers: 14 of 20 tasks on one, against 10 and 10).

Worker failures follow Dask's documented behaviour: a task whose worker dies is
given to another worker, because every task here is a pure function of its
batch; a task that has been on ``distributed.scheduler.allowed-failures`` + 1
dying workers (default 3 + 1) fails with ``KilledWorker``, which this module
turns into :class:`corpusprep.errors.WorkerDiedError`. The pipeline then removes
its partial folder, so nothing is published.

:func:`dask_engine` owns the lifetime of the client and, without a scheduler
address, of a :class:`distributed.LocalCluster` on this machine (worker
processes with one thread each, loopback only, no dashboard).

Every map of a run goes through here: first-pass file runs, exact-duplicate
key partitions, LSH band groups, pair checks, encoding and shard writing (see
:mod:`corpusprep.barriers`). Tasks read and write the run's work folder by
path, so with a remote scheduler the output folder must be on storage that
every worker mounts at the same path. The union-find, the split and the
tokenizer training run in the driver.

Install the engine with ``pip install 'corpusprep[cluster]'`` (``dask[distributed]``).
"""

from __future__ import annotations

import contextlib
import uuid
from collections import deque
from collections.abc import Callable, Iterable, Iterator
from typing import TYPE_CHECKING, Any

import corpusprep
from corpusprep.errors import CorpusprepError, WorkerDiedError
from corpusprep.pool import Mapper

if TYPE_CHECKING:
    from distributed import Client, Future

__all__ = ["ClusterError", "dask_engine", "dask_mapper", "default_in_flight"]

INSTALL_HINT = "pip install 'corpusprep[cluster]' (it installs dask[distributed])"
#: ``dashboard_address=None`` turns the dashboard off, but the scheduler still starts its small HTTP
#: server (health and metrics routes) on the default port 8787 (distributed/scheduler.py,
#: ``start_http_server(routes, dashboard_address, default_port=8787)``). An ephemeral loopback
#: port keeps two local clusters from colliding and keeps it off other interfaces.
_SCHEDULER_HTTP = {"dashboard_address": "127.0.0.1:0"}
#: Tasks kept outstanding per worker thread: one running, one waiting, as in the local pool.
_PER_THREAD = 2
#: Dask starts worker processes with ``MALLOC_TRIM_THRESHOLD_=65536`` (its config
#: ``distributed.nanny.pre-spawn-environ``), so glibc hands freed memory back to the system
#: at once. Our tasks allocate and free many NumPy temporaries; with that setting, shingling
#: the same 600 documents took 0.64 s in a Dask worker against 0.41 s in a plain process, and
#: 0.42-0.51 s in a worker started without it (measured here, 2 cores). The local clusters
#: this module starts therefore leave glibc's default, dynamic threshold in place.
_UNSET_IN_WORKERS = ("MALLOC_TRIM_THRESHOLD_",)


class ClusterError(CorpusprepError, ConnectionError):
    """The Dask engine cannot start, cannot reach its scheduler, or lost it; nothing was published."""


def _require_distributed() -> None:
    try:
        import distributed  # noqa: F401
    except ImportError:
        raise ClusterError(
            f"the dask engine needs dask.distributed, which is not installed: {INSTALL_HINT}"
        ) from None


def _untyped(value: Any) -> Any:
    """``distributed`` leaves many methods unannotated; calls through this stay checked by name only."""
    return value


def _identity(value: Any) -> Any:
    return value


def _apply(function: Callable[[Any], Any], item: Any) -> Any:
    return function(item)


def _worker_version() -> str:
    return corpusprep.__version__


def default_in_flight(client: Client) -> int:
    """Outstanding tasks allowed for ``client``: two per worker thread, at least two."""
    threads: dict[str, int] = _untyped(client).nthreads()
    return max(_PER_THREAD, _PER_THREAD * sum(threads.values()))


def _died(done: int, error: BaseException) -> WorkerDiedError:
    return WorkerDiedError(
        f"batch {done + 1} was on Dask workers that ended abruptly (killed, or out of memory) "
        f"more times than distributed.scheduler.allowed-failures allows ({error}); nothing was "
        "published. Run again, perhaps with more memory per worker or smaller inputs."
    )


def _lost(done: int, error: BaseException) -> ClusterError:
    return ClusterError(
        f"the Dask scheduler was lost while batch {done + 1} was being processed "
        f"({type(error).__name__}: {error}); nothing was published. Check the scheduler and run again."
    )


def _ordered_map(
    client: Any, function: Callable[[Any], Any], items: Iterable[Any], in_flight: int
) -> Iterator[Any]:
    from distributed import CancelledError, KilledWorker
    from distributed.comm.core import CommClosedError

    tag = uuid.uuid4().hex[:12]
    name = getattr(function, "__name__", None) or getattr(getattr(function, "func", None), "__name__", "map")
    shared = client.submit(_identity, function, key=f"corpusprep-{name}-function-{tag}", pure=False)
    # On every worker, so where it lives does not pull the batches to one worker.
    client.replicate([shared])
    pending: deque[Future[Any]] = deque()
    done = 0
    try:
        for position, item in enumerate(items):
            key = f"corpusprep-{name}-{tag}-{position}"
            pending.append(client.submit(_apply, shared, item, key=key, pure=False))
            if len(pending) >= in_flight:
                yield pending.popleft().result()
                done += 1
        while pending:
            yield pending.popleft().result()
            done += 1
    except KilledWorker as error:
        raise _died(done, error) from None
    except (CancelledError, CommClosedError) as error:
        raise _lost(done, error) from None
    finally:
        if pending:
            with contextlib.suppress(Exception):
                client.cancel(list(pending))
        pending.clear()
        _untyped(shared).release()


def dask_mapper(client: Client, *, in_flight: int | None = None) -> Mapper:
    """A mapper that runs each batch as one task on ``client``'s cluster, results in input order.

    At most ``in_flight`` tasks are outstanding (default :func:`default_in_flight`);
    the items are drawn lazily, so memory in the driver stays bounded by that
    many batches. The function and the items must be picklable.
    """
    if in_flight is not None and in_flight < 1:
        raise ValueError(f"in_flight = {in_flight}: must be at least 1")

    def mapper(function: Callable[[Any], Any], items: Iterable[Any]) -> Iterator[Any]:
        limit = in_flight if in_flight is not None else default_in_flight(client)
        return _ordered_map(client, function, items, limit)

    return mapper


def _check_workers(client: Any, where: str) -> None:
    """Every worker must import the same corpusprep version as the driver (results are its objects)."""
    try:
        versions: dict[str, str] = client.run(_worker_version)
    except Exception as error:
        raise ClusterError(
            f"{where}: the Dask workers cannot run corpusprep ({type(error).__name__}: {error}); "
            f"install corpusprep {corpusprep.__version__} in every worker's environment"
        ) from None
    if not versions:
        raise ClusterError(f"{where}: the Dask scheduler has no workers; start some and run again")
    other = {address: version for address, version in versions.items() if version != corpusprep.__version__}
    if other:
        listed = ", ".join(f"{address} has {version}" for address, version in sorted(other.items()))
        raise ClusterError(
            f"{where}: Dask workers run another corpusprep version than this one "
            f"({corpusprep.__version__}): {listed}; install the same version everywhere"
        )


@contextlib.contextmanager
def dask_engine(scheduler: str | None, workers: int) -> Iterator[Mapper]:
    """A Dask mapper, with the client (and without ``scheduler``, a local cluster) it needs.

    With ``scheduler`` (an address such as ``tcp://10.0.0.5:8786``) it connects
    a client to that running cluster and leaves the cluster running afterwards;
    ``workers`` is then ignored. Without it, it starts a ``LocalCluster`` of
    ``workers`` processes with one thread each, on 127.0.0.1 with no dashboard,
    and closes it on exit. The connection timeout is Dask's
    ``distributed.comm.timeouts.connect``.
    """
    _require_distributed()
    from distributed import Client, LocalCluster

    make_cluster, make_client = _untyped(LocalCluster), _untyped(Client)

    if workers < 1:
        raise ValueError(f"workers = {workers}: must be at least 1")
    with contextlib.ExitStack() as stack:
        if scheduler is None:
            where = "local Dask cluster"
            import dask

            environ = dict(dask.config.get("distributed.nanny.pre-spawn-environ", default={}) or {})
            for name in _UNSET_IN_WORKERS:
                environ.pop(name, None)
            stack.enter_context(dask.config.set({"distributed.nanny.pre-spawn-environ": environ}))
            try:
                cluster = stack.enter_context(
                    make_cluster(
                        n_workers=workers,
                        threads_per_worker=1,
                        processes=True,
                        host="127.0.0.1",
                        dashboard_address=None,
                        scheduler_kwargs=_SCHEDULER_HTTP,
                    )
                )
                client = stack.enter_context(make_client(cluster))
            except OSError as error:
                raise ClusterError(f"{where}: could not start ({error})") from None
        else:
            where = f"Dask scheduler {scheduler}"
            try:
                client = stack.enter_context(make_client(scheduler))
            except (OSError, TimeoutError, ValueError) as error:
                raise ClusterError(
                    f"{where}: cannot connect ({type(error).__name__}: {error}); check the address "
                    "(tcp://HOST:PORT) and that the scheduler is running"
                ) from None
        _check_workers(client, where)
        yield dask_mapper(client)
