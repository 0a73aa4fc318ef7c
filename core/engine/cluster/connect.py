"""Reach a Dask cluster, run tasks on it, and turn its failures into one clear error.

Dask is imported only inside these functions, so the core install stays lean: without the
optional packages :func:`require_dask` raises :class:`ClusterError` naming the extra
``modescope[cluster]``.
"""

from __future__ import annotations

import contextlib
import logging
import threading
import time
from typing import Callable, Iterator

from modescope.core.engine.cluster.tasks import PROGRESS_TOPIC
from modescope.core.errors import ModescopeError

__all__ = ["ClusterError", "require_dask", "open_client", "Waiter"]

# Seconds a run waits with no worker at all before it gives up (workers restarted by a nanny
# come back within a few seconds here; a cluster that scales up may take longer). Our own
# choice, no published source.
NO_WORKER_GRACE = 60.0


class ClusterError(ModescopeError):
    """The Dask cluster cannot be used: not installed, unreachable, or a worker died."""


def require_dask() -> None:
    """Check that the optional cluster packages are installed.

    Raises
    ------
    ClusterError
        If ``dask`` (with its array part) or ``distributed`` cannot be imported; the message
        names the missing package and the extra that installs it.
    """
    for name in ("dask", "dask.array", "distributed"):
        try:
            __import__(name)
        except ImportError as exc:
            raise ClusterError(
                f"the Dask engine needs the optional packages dask[array] and distributed "
                f"(missing: {name}: {exc}); install them with: pip install 'modescope[cluster]'"
            ) from None


@contextlib.contextmanager
def open_client(scheduler: str | None = None, client=None, *, connect_timeout: float = 5.0,
                local_workers: int = 2, local_processes: bool = True,
                memory_limit: str | int = "auto") -> Iterator:
    """Yield a ``distributed.Client``: the one given, one connected to ``scheduler``, or one of
    a local cluster started on loopback (closed again on exit).

    Parameters
    ----------
    scheduler : str, optional
        Address of a running scheduler, e.g. ``"tcp://10.0.0.5:8786"``.
    client : distributed.Client, optional
        Used as it is and left open (takes precedence over ``scheduler``).
    connect_timeout : float
        Seconds to wait for the scheduler before giving up.
    local_workers : int
        Workers of the local cluster, one thread each.
    local_processes : bool
        Workers in their own processes (True) or as threads of this process.
    memory_limit : str or int
        Memory limit of each local worker (``"auto"``: the machine's memory shared out).

    Raises
    ------
    ClusterError
        If the scheduler cannot be reached within ``connect_timeout`` seconds, or the local
        cluster cannot start.
    """
    require_dask()
    if client is not None:
        yield client
        return
    with _quiet_logs():
        yield from _connected(scheduler, connect_timeout, local_workers, local_processes,
                              memory_limit)


@contextlib.contextmanager
def _quiet_logs():
    """Keep distributed's own log lines (warnings, tracebacks of lost connections) off the
    terminal while we hold the client: every failure reaches the caller as a ClusterError."""
    logger = logging.getLogger("distributed")
    level = logger.level
    logger.setLevel(logging.CRITICAL)
    try:
        yield
    finally:
        logger.setLevel(level)


def _connected(scheduler, connect_timeout, local_workers, local_processes, memory_limit):
    """The body of :func:`open_client` once dask is known to be there (a generator)."""
    from distributed import Client, LocalCluster

    if scheduler is not None:
        try:
            made = Client(scheduler, timeout=connect_timeout, set_as_default=False)
        except (OSError, TimeoutError, ValueError) as exc:
            raise ClusterError(f"cannot reach the Dask scheduler at {scheduler!r} within "
                               f"{connect_timeout:g} s ({_short(exc)}); check the address and "
                               "that the scheduler is running") from None
        with contextlib.closing(made):
            yield made
        return
    try:
        cluster = LocalCluster(n_workers=local_workers, threads_per_worker=1,
                               processes=local_processes, host="127.0.0.1", protocol="tcp://",
                               dashboard_address=None, memory_limit=memory_limit,
                               silence_logs=logging.CRITICAL,
                               # no dashboard; the scheduler's small HTTP server (health,
                               # metrics) on a free loopback port instead of 8787, which
                               # another cluster on this machine may hold
                               scheduler_kwargs={"dashboard_address": "127.0.0.1:0"})
    except (OSError, TimeoutError, RuntimeError) as exc:
        raise ClusterError(f"cannot start a local Dask cluster on 127.0.0.1: "
                           f"{_short(exc)}") from None
    with cluster, Client(cluster, set_as_default=False) as made:
        yield made


def _raise_task_error(fut, what: str) -> None:
    """Raise the error of a failed task: ours and MemoryError as they are, any other one (a
    worker without Modescope, a bug) as a ClusterError naming it."""
    from distributed import KilledWorker

    exc = fut.exception()
    if isinstance(exc, (ModescopeError, MemoryError, KilledWorker)):
        raise exc
    hint = ("; is the same Modescope version installed on every worker?"
            if isinstance(exc, ImportError) else "")
    raise ClusterError(f"a task failed on a Dask worker during {what} ({_short(exc)}"
                       f"{hint}); nothing written") from exc


def _where(exc) -> str:
    """The address of the worker a KilledWorker error names."""
    worker = getattr(exc, "last_worker", None)
    return getattr(worker, "address", None) or "a worker"


def _short(exc: BaseException) -> str:
    text = str(exc).strip().splitlines()
    return f"{type(exc).__name__}: {text[0]}" if text else type(exc).__name__


class Waiter:
    """Wait for futures on ``client`` with progress from the scheduler and a cancel check.

    Workers announce every block they read (an event on :data:`PROGRESS_TOPIC`, relayed by
    the scheduler); :meth:`wait` reports them through ``report(images)`` from the calling
    thread. A worker death, a lost scheduler or no worker left becomes a :class:`ClusterError`.
    """

    def __init__(self, client, cancel: Callable[[], bool]):
        self.client, self.cancel = client, cancel
        self._lock = threading.Lock()
        self._counts: dict[str, int] = {}
        client.subscribe_topic(PROGRESS_TOPIC, self._on_event)

    def _on_event(self, event) -> None:
        message = event[1] if isinstance(event, tuple) else event
        with self._lock:
            tag = message.get("tag", "")
            self._counts[tag] = self._counts.get(tag, 0) + int(message.get("images", 0))

    def read(self, tag: str) -> int:
        """Images the workers reported for ``tag`` so far."""
        with self._lock:
            return self._counts.get(tag, 0)

    def close(self) -> None:
        """Stop listening to progress events."""
        with contextlib.suppress(Exception):
            self.client.unsubscribe_topic(PROGRESS_TOPIC)

    def wait(self, futures: list, tag: str, report: Callable[[int], None] | None = None,
             on_done: Callable[[int, object], None] | None = None,
             what: str = "a pass over the images") -> bool:
        """Wait until every future finished; return False when cancelled (futures dropped).

        Parameters
        ----------
        futures : list of distributed.Future
        tag : str
            The progress tag the tasks of these futures report under.
        report : callable, optional
            Called with the images read so far (from the workers' events).
        on_done : callable, optional
            Called as ``on_done(i, result)`` for each future ``i`` as soon as it finished
            (its result is gathered then, so the cluster can free it).
        what : str
            Words for the error message.

        Raises
        ------
        ClusterError
            If a worker died running a task, the scheduler went away, or no worker was left
            for ``NO_WORKER_GRACE`` seconds.
        """
        from distributed import KilledWorker

        pending = dict(enumerate(futures))
        last_seen, last_check, shown = time.monotonic(), 0.0, -1
        try:
            while pending:
                finished = [i for i, f in pending.items() if f.status != "pending"]
                for i in finished:
                    fut = pending.pop(i)
                    if fut.status == "error":
                        _raise_task_error(fut, what)
                    if fut.status in ("cancelled", "lost"):
                        raise ClusterError(f"the Dask cluster dropped {what} "
                                           f"({self._why_dropped()}); nothing written")
                    if on_done is not None:
                        on_done(i, fut.result())
                    fut.release()
                if report is not None and self.read(tag) != shown:
                    shown = self.read(tag)
                    report(shown)
                if not pending:
                    break
                if self.cancel():
                    self.client.cancel(list(pending.values()))
                    return False
                now = time.monotonic()
                if now - last_check > 1.0:
                    last_check = now
                    if self._workers() > 0:
                        last_seen = now
                    elif now - last_seen > NO_WORKER_GRACE:
                        raise ClusterError(f"no Dask worker left for {NO_WORKER_GRACE:g} s "
                                           f"during {what}; nothing written")
                time.sleep(0.05)
        except KilledWorker as exc:
            raise ClusterError(f"a Dask worker died during {what} (the task {exc.task!r} "
                               f"failed on {_where(exc)}; a common cause is a worker running "
                               "out of memory: a larger downscale or a smaller block size "
                               "helps); nothing written") from None
        except (OSError, TimeoutError) as exc:
            raise ClusterError(f"lost the Dask scheduler during {what} ({_short(exc)}); "
                               "nothing written") from None
        finally:
            leftover = list(pending.values())
            if leftover:
                with contextlib.suppress(Exception):
                    self.client.cancel(leftover)
        return True

    def _why_dropped(self) -> str:
        """Say why the scheduler dropped a future (its own reason names no cause here)."""
        if self.client.status not in ("running", "connecting"):
            return "the connection to the scheduler was lost"
        return ("the scheduler cancelled its tasks: a worker holding their data left the "
                "cluster, or the scheduler is closing")

    def _workers(self) -> int:
        try:
            return len(self.client.scheduler_info(n_workers=-1).get("workers", {}))
        except TypeError:                          # an older distributed without n_workers
            return len(self.client.scheduler_info().get("workers", {}))
        except (OSError, TimeoutError) as exc:
            raise ClusterError(f"lost the Dask scheduler ({_short(exc)}); nothing written") \
                from None
