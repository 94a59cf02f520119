"""Engines that run the tasks of a batch job: in this process, or on a Dask cluster.

The job's loops are written once against :class:`Engine`; the engine is chosen once, when the
run starts (:func:`make_engine`), and never changes the algorithm: which algorithm runs is an
option of the job (:attr:`~invert.batch.job.BatchJob.parallel_in_time`).
"""

from __future__ import annotations

from typing import Any, Protocol, runtime_checkable

__all__ = ["Engine", "Future", "LocalEngine", "DaskEngine", "make_engine", "ENGINES"]


@runtime_checkable
class Future(Protocol):
    """A submitted task: ``result()`` waits for it and returns its value (or raises)."""

    def result(self) -> Any:
        """Return the task's value."""
        ...


@runtime_checkable
class Engine(Protocol):
    """Where tasks run (the contract of every engine).

    Attributes
    ----------
    name : str
        The engine's name (``"local"``, ``"dask"``), reported in the summary.
    in_flight : int
        Tasks worth keeping submitted before waiting for the oldest (0: the engine runs a task
        when it is submitted, so waiting earns nothing).

    Methods
    -------
    submit(fn, *args)
        Run ``fn(*args)``; returns a :class:`Future`. ``fn`` and ``args`` must pickle (an
        engine may run them in another process); ``fn`` must not rely on state kept between
        calls (each call may see a fresh copy of its arguments).
    gather(futures)
        Their results, in order.
    close()
        Release what the engine started (idempotent).
    """

    name: str
    in_flight: int

    def submit(self, fn, /, *args) -> Future:
        """Run ``fn(*args)``."""
        ...

    def gather(self, futures) -> list:
        """Return the results of ``futures`` in order."""
        ...

    def close(self) -> None:
        """Release the engine's resources."""
        ...


class _Done:
    """A task already run: its value, or the exception it raised."""

    def __init__(self, fn, args):
        try:
            self._value, self._error = fn(*args), None
        except Exception as exc:  # noqa: BLE001 - raised again by result(), like a future
            self._value, self._error = None, exc

    def result(self):
        if self._error is not None:
            raise self._error
        return self._value


class LocalEngine:
    """Run every task at once, in this process (objects passed by reference, not copied)."""

    name = "local"
    in_flight = 0

    def submit(self, fn, /, *args):
        """Run ``fn(*args)`` now; the returned future holds the value."""
        return _Done(fn, args)

    def gather(self, futures):
        """Return the results of ``futures`` in order."""
        return [f.result() for f in futures]

    def close(self):
        """Nothing to release."""

    def __enter__(self):
        return self

    def __exit__(self, *exc):
        self.close()


def _stop_http(dask_scheduler=None, dask_worker=None):
    """Stop a dask node's HTTP server (run on the node's event loop)."""
    node = dask_scheduler if dask_scheduler is not None else dask_worker
    if getattr(node, "http_server", None) is not None:
        node.http_server.stop()


def _nbytes(obj, depth=4):
    """Approximate size in bytes of ``obj``, looking into containers and plain objects.

    ``dask.sizeof`` counts a dataclass holding arrays (a filter segment) as a few bytes, so the
    arrays reachable through containers and object attributes are added up here.
    """
    from dask.sizeof import sizeof

    if depth == 0 or isinstance(obj, (str, bytes, int, float, complex, bool, type(None))):
        return sizeof(obj)
    if isinstance(obj, dict):
        return sum(_nbytes(v, depth - 1) for v in obj.values())
    if isinstance(obj, (list, tuple)):
        return sum(_nbytes(v, depth - 1) for v in obj)
    fields = getattr(obj, "__dict__", None)
    if fields is None and hasattr(obj, "__slots__"):
        fields = {k: getattr(obj, k, None) for k in obj.__slots__}
    if fields and not hasattr(obj, "nbytes"):
        return sum(_nbytes(v, depth - 1) for v in fields.values())
    return sizeof(obj)


class DaskEngine:
    """Run tasks on a ``dask.distributed`` cluster.

    Parameters
    ----------
    scheduler : str, optional
        Address of an existing scheduler; else a LocalCluster is started (and closed by
        :meth:`close`) with its scheduler and workers in this process, talking over dask's
        ``inproc://`` transport: it opens no network port (no dashboard either), so no other
        process, local or remote, can connect to it and run code in it. Tasks and results
        are then passed by reference, as on the local engine.
    n_workers : int, default=2
        Workers of the LocalCluster (one thread each); also sets :attr:`in_flight`.

    Attributes
    ----------
    address : str
        The scheduler's address (``inproc://...`` for the engine's own cluster); reported in
        the summary.
    """

    name = "dask"

    def __init__(self, scheduler=None, *, n_workers=2):
        from dask.distributed import Client, LocalCluster

        self.scheduler = scheduler
        self.n_workers = n_workers
        self.in_flight = 2 * max(n_workers, 1)
        self._cluster = None
        if scheduler:
            self._client = Client(scheduler)
        else:
            # in-process transport: no listener at all, unreachable from other processes
            self._cluster = LocalCluster(n_workers=n_workers, threads_per_worker=1,
                                         processes=False, protocol="inproc://",
                                         dashboard_address="127.0.0.1:0",
                                         worker_dashboard_address="127.0.0.1:0",
                                         scheduler_kwargs={"dashboard": False})
            self._client = Client(self._cluster)
            # the scheduler and workers always start an HTTP server (health, metrics): stop
            # them, on their event loop, so that nothing listens at all
            self._client.run_on_scheduler(_stop_http)
            self._client.run(_stop_http)
        self.address = self._client.scheduler.address

    @property
    def workers(self) -> int:
        """Worker threads of the cluster now (how many tasks can run at once)."""
        return int(sum(self._client.nthreads().values()))

    #: Arguments larger than this (bytes, by ``dask.sizeof``) are scattered before a submit.
    scatter_bytes = 1 << 20

    def submit(self, fn, /, *args):
        """Submit ``fn(*args)`` to the cluster (never cached: ``pure=False``).

        An argument larger than :attr:`scatter_bytes` (a filtered segment handed back to the
        smoother, a chunk of frames) is scattered to the cluster first and passed as a future:
        embedded in the task it would make a graph of tens of MiB, which the scheduler must
        unpickle and which dask warns about ("Sending large graph").
        """
        args = [self._client.scatter([a], hash=False)[0] if _nbytes(a) > self.scatter_bytes
                else a for a in args]
        return self._client.submit(fn, *args, pure=False)

    def gather(self, futures):
        """Return the results of ``futures`` in order."""
        return self._client.gather(list(futures))

    def close(self):
        """Close the client, and the cluster when this engine started it."""
        if self._client is not None:
            self._client.close()
            self._client = None
        if self._cluster is not None:
            self._cluster.close()
            self._cluster = None

    def __enter__(self):
        return self

    def __exit__(self, *exc):
        self.close()


#: Engine name -> class (the CLI's ``--engine`` choices).
ENGINES = {"local": LocalEngine, "dask": DaskEngine}


def make_engine(name, *, scheduler=None, n_workers=2):
    """Start the engine called ``name``.

    Parameters
    ----------
    name : {"local", "dask"}
    scheduler : str, optional
        Dask only: address of an existing scheduler.
    n_workers : int, default=2
        Dask only: workers of the LocalCluster started when no scheduler is given.

    Returns
    -------
    Engine
    """
    if name not in ENGINES:
        raise ValueError(f"The 'engine' parameter of batch must be one of "
                         f"{tuple(ENGINES)}. Got {name!r} instead.")
    if name == "dask":
        return DaskEngine(scheduler, n_workers=n_workers)
    return LocalEngine()
