"""A throw-away PostgreSQL server on 127.0.0.1 for the store tests (and for .ci/run).

``python tests/_postgres.py start DIR`` makes a cluster in DIR with Debian's ``initdb`` and
``pg_ctl`` (as the ``postgres`` user when run as root: the server refuses to run as root),
starts it on a free port of 127.0.0.1, creates a database and prints its URL;
``python tests/_postgres.py stop DIR`` stops it. Trust authentication, local only.
"""

from __future__ import annotations

import glob
import os
import shutil
import socket
import subprocess
import sys
from pathlib import Path

DATABASE = "topoclass_test"


def server_tools() -> Path | None:
    """The folder holding ``initdb`` and ``pg_ctl``, or None when PostgreSQL is missing."""
    found = shutil.which("pg_ctl")
    if found and shutil.which("initdb"):
        return Path(found).resolve().parent
    versions = sorted(glob.glob("/usr/lib/postgresql/*/bin/pg_ctl"))
    return Path(versions[-1]).parent if versions else None


def start(folder: str | os.PathLike) -> str:
    """Create and start a cluster in ``folder``; return the URL of a fresh database."""
    tools = server_tools()
    if tools is None:
        raise RuntimeError("PostgreSQL is not installed (apt-get install postgresql)")
    folder = Path(folder).absolute()
    folder.mkdir(parents=True, exist_ok=True)
    data, sockets = folder / "data", folder / "socket"
    sockets.mkdir(exist_ok=True)
    as_user = []
    if os.geteuid() == 0:
        shutil.chown(folder, "postgres")
        shutil.chown(sockets, "postgres")
        as_user = ["runuser", "-u", "postgres", "--"]
    user = "postgres" if as_user else os.environ.get("USER", "postgres")
    port = _free_port()
    _run(as_user + [str(tools / "initdb"), "-D", str(data), "-U", user, "-A", "trust",
                    "--no-sync", "-E", "UTF8"])
    options = f"-c listen_addresses=127.0.0.1 -c port={port} -k {sockets} -c fsync=off"
    _run(as_user + [str(tools / "pg_ctl"), "-D", str(data), "-l", str(folder / "server.log"),
                    "-o", options, "-w", "-t", "60", "start"])
    _run(as_user + [str(tools / "createdb"), "-h", "127.0.0.1", "-p", str(port), "-U", user,
                    DATABASE])
    return f"postgresql://{user}@127.0.0.1:{port}/{DATABASE}"


def stop(folder: str | os.PathLike) -> None:
    """Stop the cluster in ``folder`` (fast shutdown) if it runs."""
    tools = server_tools()
    data = Path(folder).absolute() / "data"
    if tools is None or not (data / "postmaster.pid").exists():
        return
    as_user = ["runuser", "-u", "postgres", "--"] if os.geteuid() == 0 else []
    _run(as_user + [str(tools / "pg_ctl"), "-D", str(data), "-m", "fast", "-w", "stop"])


def _free_port() -> int:
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        return s.getsockname()[1]


def _run(cmd: list[str]) -> None:
    done = subprocess.run(cmd, stdout=subprocess.DEVNULL, stderr=subprocess.PIPE, text=True,
                          timeout=120)
    if done.returncode != 0:
        why = " ".join(done.stderr.split())[-300:]
        raise subprocess.SubprocessError(f"{' '.join(cmd[:6])} "
                                         f"failed: {why}")


if __name__ == "__main__":
    action, where = sys.argv[1], sys.argv[2]
    if action == "start":
        print(start(where))
    elif action == "stop":
        stop(where)
    else:
        sys.exit(f"usage: {sys.argv[0]} start|stop DIR")
