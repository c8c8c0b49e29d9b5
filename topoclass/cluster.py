"""Per-image work on a Dask distributed cluster, results handed back to one writer.

A runner, not a pipeline stage: it knows nothing of images. :func:`open_engine` turns the
``--cluster`` text into a connected :class:`ClusterEngine` (an existing scheduler at
``tcp://HOST:PORT``, or ``local:N`` worker processes started here on 127.0.0.1 and closed at the
end); :meth:`ClusterEngine.imap` sends one task per item and yields the results **in input
order**, so the caller (the scores writer, the feature list of training) stays the single
writer and its output is the same row for row as with ``--jobs``.

Faults, as an operator running a cluster would expect them:

- a worker that dies (killed, out of memory) has its tasks run again elsewhere by the
  scheduler; an item whose task killed workers ``distributed.scheduler.allowed-failures``
  times becomes the caller's own failure value (``lost``), so one image never stops a batch;
- a lost scheduler stops the run with one :class:`~topoclass.errors.ClusterError` line; what was
  handed back before is kept by the caller (``--resume`` finishes the batch);
- an exception raised inside a task is a bug and is raised here unchanged.

Needs the optional extra: ``pip install "topoclass[cluster]"``.
"""

from __future__ import annotations

import logging
import re
from collections.abc import Callable, Iterable, Iterator, Sequence
from concurrent.futures import CancelledError
from dataclasses import dataclass
from typing import Any

from topoclass.errors import ClusterError, TopoclassError

#: How long to wait for a scheduler to answer before giving up (seconds).
CONNECT_SECONDS = 10.0

_INSTALL = 'install the cluster extra: pip install "topoclass[cluster]"'
_TCP = re.compile(r"^tcp://(?P<host>\[[0-9A-Fa-f:.]+\]|[A-Za-z0-9_.-]+):(?P<port>\d{1,5})$")
_LOCAL = re.compile(r"^local:(?P<n>\d+)$")


@dataclass(frozen=True)
class ClusterSpec:
    """Where the work goes: a scheduler's address, or how many local worker processes."""

    address: str | None = None
    local_workers: int | None = None

    def __str__(self) -> str:
        return self.address if self.address else f"local:{self.local_workers}"


def parse_cluster(text: str) -> ClusterSpec:
    """Read ``tcp://HOST:PORT`` (a running scheduler) or ``local:N`` (N worker processes).

    Raises
    ------
    TopoclassError
        When the text is neither form; the message shows both.
    """
    text = str(text).strip()
    tcp, local = _TCP.match(text), _LOCAL.match(text)
    if tcp and 0 < int(tcp["port"]) < 65536:
        return ClusterSpec(address=text)
    if local and int(local["n"]) >= 1:
        return ClusterSpec(local_workers=int(local["n"]))
    raise TopoclassError(
        f"--cluster {text!r}: give tcp://HOST:PORT of a running Dask scheduler (e.g. "
        "tcp://10.0.0.5:8786) or local:N to start N worker processes on this machine"
    )


class ClusterEngine:
    """A connected Dask client; use as a context manager (:func:`open_engine` does).

    Parameters
    ----------
    spec : ClusterSpec or str
        Where the work goes (:func:`parse_cluster` reads a string).
    connect_seconds : float
        How long to wait for the scheduler.
    """

    def __init__(self, spec: ClusterSpec | str, *, connect_seconds: float | None = None):
        self.spec = parse_cluster(spec) if isinstance(spec, str) else spec
        self.connect_seconds = float(CONNECT_SECONDS if connect_seconds is None
                                     else connect_seconds)
        self.client = None
        self._cluster = None

    # -- life cycle ---------------------------------------------------------------------------

    def __enter__(self) -> ClusterEngine:
        distributed = _import_distributed()
        if self.spec.local_workers is not None:
            # One thread per worker: each task limits BLAS/OpenMP to one thread as well, so N
            # workers use N cores. Everything listens on 127.0.0.1 only.
            self._cluster = distributed.LocalCluster(
                n_workers=self.spec.local_workers, threads_per_worker=1, processes=True,
                host="127.0.0.1", dashboard_address=_dashboard_address(),
                silence_logs=logging.CRITICAL,  # shutdown chatter is not news
            )
            self.client = distributed.Client(self._cluster, set_as_default=False)
            return self
        try:
            self.client = distributed.Client(self.spec.address, timeout=self.connect_seconds,
                                             set_as_default=False)
        except (OSError, TimeoutError) as exc:
            raise ClusterError(
                f"cannot reach a Dask scheduler at {self.spec.address} within "
                f"{self.connect_seconds:g} s ({_reason(exc)}); start one there with `dask "
                "scheduler` and workers with `dask worker ADDRESS`, or check the address"
            ) from None
        return self

    def __exit__(self, *exc) -> None:
        self.close()

    def close(self) -> None:
        """Close the client, and the local cluster if this engine started it."""
        if self.client is not None:
            self.client.close()
            self.client = None
        if self._cluster is not None:
            self._cluster.close()
            self._cluster = None

    # -- facts --------------------------------------------------------------------------------

    @property
    def dashboard(self) -> str | None:
        """The scheduler's dashboard URL, when it serves one (it needs bokeh)."""
        if self.client is None:
            return None
        try:
            return self.client.dashboard_link
        except KeyError:  # no dashboard on this scheduler
            return None

    def n_threads(self) -> int:
        """Worker threads the scheduler has right now (at least 1)."""
        return max(1, sum(self.client.nthreads().values())) if self.client else 1

    def describe(self) -> str:
        """One line for the operator: where, how many workers, the dashboard."""
        workers = len(self.client.scheduler_info().get("workers", {})) if self.client else 0
        where = "local cluster on 127.0.0.1" if self._cluster is not None else self.spec.address
        board = f"; dashboard {self.dashboard}" if self.dashboard else ""
        if not workers:
            return (f"cluster: {where} has no workers yet; the images wait until one connects "
                    f"(`dask worker {self.spec}`){board}")
        return f"cluster: {where}, {workers} worker(s), {self.n_threads()} thread(s){board}"

    # -- work ---------------------------------------------------------------------------------

    def imap(
        self,
        fn: Callable[..., Any],
        items: Iterable[Sequence[Any]],
        *,
        lost: Callable[..., Any] | None = None,
        window: int | None = None,
    ) -> Iterator[Any]:
        """``fn(*item)`` for each item on the cluster, yielded in input order.

        Parameters
        ----------
        fn : callable
            Picklable; runs on a worker (shipped with the task).
        items : iterable of argument tuples
        lost : callable, optional
            ``lost(*item, reason)`` gives the value for an item whose task the cluster gave up
            on (it killed workers too often). Without it, that ends the run with a
            :class:`ClusterError`.
        window : int, optional
            Tasks in flight ahead of the oldest unfinished one (default 8 per worker thread,
            at least 64), which bounds the client's memory for results waiting their turn.
        """
        if self.client is None:
            raise RuntimeError("ClusterEngine.imap outside its `with` block")
        distributed = _import_distributed()
        items = list(items)
        window = window or max(64, 8 * self.n_threads())
        futures: dict[int, Any] = {}
        finished: dict[int, Any] = {}
        running = distributed.as_completed(loop=self.client.loop)
        index_of: dict[str, int] = {}
        submitted = 0
        given = 0
        try:
            while given < len(items):
                while submitted < len(items) and submitted < given + window:
                    f = self.client.submit(fn, *items[submitted], pure=False)
                    futures[submitted], index_of[f.key] = f, submitted
                    running.add(f)
                    submitted += 1
                if given not in finished:
                    f = next(running)
                    i = index_of.pop(f.key)
                    finished[i] = self._outcome(f, items[i], lost, distributed)
                    del futures[i]
                    f.release()
                while given in finished:
                    yield finished.pop(given)
                    given += 1
        except (CancelledError, OSError, TimeoutError, StopIteration) as exc:
            # Only a lost scheduler gets here: tasks of a live cluster finish or fail.
            raise ClusterError(
                f"lost the Dask scheduler {self.spec} after {given} of {len(items)} results "
                f"({_reason(exc)}); what was finished is kept: start the scheduler again and "
                "rerun (scoring: with --resume)"
            ) from None
        finally:
            for f in futures.values():
                f.release()

    def _outcome(self, future, item, lost, distributed):
        status = future.status
        if status == "error":
            exc = future.exception()
            if isinstance(exc, distributed.KilledWorker) and lost is not None:
                return lost(*item, "a cluster worker died each time it measured this item "
                            "(out of memory?)")
            if isinstance(exc, distributed.KilledWorker):
                raise ClusterError(f"the cluster gave up on {item!r}: {_reason(exc)}") from None
            raise exc  # a bug inside the task: fail loudly, unchanged
        if status == "cancelled":
            raise CancelledError(_cancel_reason(future))
        return future.result()


def open_engine(cluster: str | ClusterSpec | None, *,
                connect_seconds: float | None = None) -> ClusterEngine | _NoEngine:
    """A context manager: a connected :class:`ClusterEngine`, or (for None) nothing to run on.

    The ``with`` value is the engine, or None when ``cluster`` is None, so callers can write
    ``with open_engine(option) as engine: score_images(..., engine=engine)``.
    """
    if cluster is None:
        return _NoEngine()
    wait = CONNECT_SECONDS if connect_seconds is None else connect_seconds
    return ClusterEngine(cluster, connect_seconds=wait)


def worker_name() -> str:
    """The address of the Dask worker this runs on, or "" outside a worker."""
    try:
        from distributed import get_worker
    except ImportError:
        return ""
    try:
        return str(get_worker().address)
    except ValueError:  # not running inside a worker
        return ""


# --------------------------------------------------------------------------------------------
# private helpers


class _NoEngine:
    def __enter__(self) -> None:
        return None

    def __exit__(self, *exc) -> None:
        return None


def _import_distributed():
    try:
        import distributed
    except ImportError:
        raise TopoclassError(f"--cluster needs Dask distributed, which is not installed; "
                             f"{_INSTALL}") from None
    return distributed


def _dashboard_address() -> str | None:
    """A free port on 127.0.0.1 for the dashboard when bokeh is installed, else none."""
    try:
        import bokeh  # noqa: F401
    except ImportError:
        return None
    return "127.0.0.1:0"


def _reason(exc: BaseException) -> str:
    text = " ".join(str(exc).split()) or type(exc).__name__
    return text if len(text) <= 160 else text[:157] + "..."


def _cancel_reason(future) -> str:
    try:
        return f"task {future.key} cancelled"
    except AttributeError:
        return "task cancelled"

