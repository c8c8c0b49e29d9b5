"""Worker processes end when the process that started them dies.

joblib's worker processes block waiting for the next task; when their parent is killed
(``kill -9``, an out-of-memory kill, a closed terminal) nothing tells them, and they live on
for the pool's idle timeout. Each task shipped to a pool therefore calls :func:`end_with_parent`
first: in a direct child of the process that made the task, it starts (once per process) a
daemon thread that ends the process as soon as it is re-parented, which on POSIX is what
happens when the parent dies.
"""

from __future__ import annotations

import os
import socket
import threading
import time

#: How often a worker looks at its parent, in seconds.
POLL_SECONDS = 0.25

_watching = False
_lock = threading.Lock()


def pool_owner() -> tuple[str, int]:
    """Who is starting a pool: (host name, process id), to pass to :func:`end_with_parent`."""
    return socket.gethostname(), os.getpid()


def end_with_parent(owner: tuple[str, int] | None) -> None:
    """In a worker process, exit as soon as ``owner`` (its parent) is gone.

    Does nothing in the owner itself (``jobs=1``), and nothing in a process that is not the
    owner's direct child on the same host (a cluster worker, say): ending those is their
    scheduler's job.
    """
    global _watching
    if owner is None or _watching:
        return
    host, pid = owner
    if os.getpid() == pid or os.getppid() != pid or socket.gethostname() != host:
        return
    with _lock:
        if _watching:
            return
        _watching = True
        threading.Thread(target=_watch, args=(pid,), name="topoclass-parent-watch",
                         daemon=True).start()


def _watch(parent: int) -> None:
    while True:
        time.sleep(POLL_SECONDS)
        if os.getppid() != parent:
            # The parent is gone and nobody will read this worker's results: leave at once,
            # without running exit handlers that could wait on the dead parent's pipes.
            os._exit(1)
