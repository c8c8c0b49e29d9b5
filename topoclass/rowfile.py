"""Append-only CSV files of result rows: ``scores.csv``, a map's ``tiles.csv`` and the like.

The one place that says how a row becomes a line (floats to 6 significant digits, CSV quoting),
how rows are grouped before they are written, how a file a crash cut short is read and resumed,
and how two runs are kept from writing one file at once (:class:`WriterLock`). Scoring
(:mod:`topoclass.scoring`), maps (:mod:`topoclass.mapping`) and the store's CSV export
(:mod:`topoclass.store`) write through it, so their files follow the same rules.
"""

from __future__ import annotations

import csv
import io
import os
import time
from collections.abc import Iterable, Iterator, Mapping, Sequence
from pathlib import Path
from typing import IO, TypeVar

import numpy as np

from topoclass.errors import TopoclassError

# Rows are scored in small chunks: one predict call per image costs the whole forest's overhead
# each time (about 0.2 s for 5 calibrated forests of 300 trees), a call for 16 images barely
# more. A chunk is written as soon as it is scored, and at the latest a few seconds after its
# first image finished, so a killed run loses only images not yet written.
CHUNK_ROWS = 16
CHUNK_SECONDS = 5.0

#: An empty lock this old cannot belong to a live run: the PID is written right after creation.
EMPTY_LOCK_SECONDS = 10.0

_T = TypeVar("_T")


def csv_line(row: Mapping[str, object], columns: Sequence[str]) -> str:
    """One CSV line (with its newline) of ``row``'s values in ``columns`` order.

    A missing key is an empty cell; floats are written with 6 significant digits, so the same
    numbers always give the same bytes.
    """
    buf = io.StringIO()
    values = []
    for c in columns:
        v = row.get(c, "")
        if isinstance(v, float | np.floating):
            v = f"{float(v):.6g}"
        values.append(v)
    csv.writer(buf, lineterminator="\n").writerow(values)
    return buf.getvalue()


def csv_header(columns: Sequence[str]) -> str:
    """The header line of a file with these columns."""
    return csv_line(dict(zip(columns, columns, strict=True)), columns)


def write_durably(fh: IO[str], rows: Iterable[Mapping[str, object]],
                  columns: Sequence[str]) -> None:
    """Append ``rows`` to the open file and flush them to disk before returning."""
    fh.write("".join(csv_line(row, columns) for row in rows))
    fh.flush()
    os.fsync(fh.fileno())


def in_chunks(items: Iterable[_T], size: int = CHUNK_ROWS,
              seconds: float = CHUNK_SECONDS) -> Iterator[list[_T]]:
    """Group an iterator into lists of at most ``size``, or what ``seconds`` collected."""
    chunk: list[_T] = []
    started = 0.0
    for item in items:
        if not chunk:
            started = time.monotonic()
        chunk.append(item)
        if len(chunk) >= size or time.monotonic() - started >= seconds:
            yield chunk
            chunk = []
    if chunk:
        yield chunk


def read_rows(path: str | Path) -> list[dict[str, str]]:
    """Rows of a result CSV as dicts (an incomplete last line, from a crash, is ignored)."""
    text = Path(path).read_text(encoding="utf-8")
    if text and not text.endswith("\n"):
        text = text[: text.rfind("\n") + 1]
    return list(csv.DictReader(io.StringIO(text)))


def reopen_checked(path: Path, columns: Sequence[str], mismatch: str) -> None:
    """Make an existing result CSV ready to append to, or raise ``TopoclassError(mismatch)``.

    The header must equal ``columns`` (parsed as CSV: a class name may hold a comma or a
    quote); half a line left by a crash mid-write is cut, so that row is written again.
    """
    text = path.read_text(encoding="utf-8")
    header = next(csv.reader(io.StringIO(text.split("\n", 1)[0])), [])
    if header != list(columns):
        raise TopoclassError(mismatch)
    if not text.endswith("\n"):
        path.write_text(text[: text.rfind("\n") + 1], encoding="utf-8")


class WriterLock:
    """An exclusive lock file ``<out>.lock`` holding the writer's PID, as a context manager.

    A lock left by a process that no longer runs (killed) is taken over, so a killed run can be
    resumed without manual clean-up; so is an empty or garbled lock older than
    :data:`EMPTY_LOCK_SECONDS` (a crash between creating the file and writing the PID).

    Parameters
    ----------
    out : Path
        The file the holder writes; the lock sits beside it.
    """

    def __init__(self, out: Path):
        self.path = out.with_name(out.name + ".lock")

    def __enter__(self) -> WriterLock:
        for _ in range(2):
            try:
                fd = os.open(self.path, os.O_CREAT | os.O_EXCL | os.O_WRONLY)
            except FileExistsError:
                if lock_is_stale(self.path):
                    self.path.unlink(missing_ok=True)
                    continue
                raise TopoclassError(
                    f"{self.path.with_suffix('')}: another topoclass run is writing this file "
                    f"(lock {self.path}); wait for it to finish or write to another file"
                ) from None
            with os.fdopen(fd, "w") as fh:
                fh.write(str(os.getpid()))
            return self
        raise TopoclassError(f"{self.path}: cannot take the output lock; remove it if no run is "
                             "active")

    def __exit__(self, *exc) -> None:
        self.path.unlink(missing_ok=True)


def lock_is_stale(path: Path) -> bool:
    """Whether the lock file at ``path`` belongs to no live run (see :class:`WriterLock`)."""
    try:
        text = path.read_text().strip()
        age = time.time() - path.stat().st_mtime
    except OSError:
        return False
    try:
        pid = int(text)
    except ValueError:
        pid = 0
    if pid <= 0:
        return age > EMPTY_LOCK_SECONDS
    try:
        os.kill(pid, 0)
    except ProcessLookupError:
        return True
    except PermissionError:
        return False
    return False
