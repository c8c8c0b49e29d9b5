"""The label book: a label sheet that is being filled in, one label at a time.

The sheet is the ``image,label[,group]`` CSV that ``topoclass train`` reads (paths relative to
the sheet's folder). Every change is written at once: to a temporary file in the same folder,
flushed to disk, then moved over the sheet with an atomic replace, so a reader (or a killed
server) only ever sees the old or the new sheet, never half of one. Columns the book does not
use are kept as they are. While a book is open it holds an exclusive lock (``flock``) on
``.<sheet name>.lock`` beside the sheet, so two labelling pages cannot write one sheet; the
kernel drops the lock when the process ends, however it ends.
"""

from __future__ import annotations

import csv
import os
import tempfile
from collections.abc import Sequence
from pathlib import Path

from topoclass.errors import LabelSheetError, TopoclassError
from topoclass.labels import read_labels, sheet_entry

_COLUMNS = ("image", "label", "group")


class LabelBook:
    """A label sheet open for labelling; see the module notes.

    Parameters
    ----------
    sheet : path
        The CSV file; made (with its folder) on the first label when missing.
    classes : sequence of str, optional
        Classes to offer, in this order, before the classes already on the sheet.

    Raises
    ------
    TopoclassError
        When another process holds the sheet open, or the sheet cannot be read as a
        (partial) label sheet; the message names the file and says what to do.
    """

    def __init__(self, sheet: str | Path, classes: Sequence[str] = ()):
        self.path = Path(os.path.abspath(os.path.expanduser(sheet)))
        self._lock = _SheetLock(self.path)
        self._header: list[str] = []
        self._rows: dict[str, dict[str, str]] = {}
        try:
            self._load()
        except BaseException:
            self._lock.release()
            raise
        self.classes: list[str] = []
        for name in list(classes) + [r["label"] for r in self._rows.values()]:
            self.add_class(name)

    # ---------------------------------------------------------------- reading

    def __len__(self) -> int:
        return len(self._rows)

    def label_of(self, image: str | Path) -> str | None:
        """The label of an image, or None when it has none."""
        row = self._rows.get(self.key(image))
        return row["label"] if row else None

    def group_of(self, image: str | Path) -> str | None:
        row = self._rows.get(self.key(image))
        return (row.get("group") or None) if row else None

    def row(self, image: str | Path) -> dict[str, str] | None:
        """A copy of the sheet row of an image (every column), or None."""
        row = self._rows.get(self.key(image))
        return dict(row) if row else None

    def labelled(self) -> list[tuple[Path, str, str | None]]:
        """``(absolute path, label, group or None)`` of every row, in sheet order."""
        base = self.path.parent
        return [(Path(os.path.abspath(base / k)), r["label"], r.get("group") or None)
                for k, r in self._rows.items()]

    def keys(self) -> list[str]:
        """The sheet's image entries (relative paths), in sheet order."""
        return list(self._rows)

    def key(self, image: str | Path) -> str:
        """How the sheet names an image: relative to the sheet's folder, with ``/``."""
        path = Path(image)
        if not path.is_absolute():
            path = Path.cwd() / path
        return sheet_entry(path, self.path.parent)

    # ---------------------------------------------------------------- changing

    def add_class(self, name: str) -> str:
        """Offer a class (kept in first-seen order); returns the cleaned name."""
        name = str(name).strip()
        if not name or any(c in name for c in ",\n\r\"") or name != " ".join(name.split()):
            raise TopoclassError(f"class name {name!r} for {self.path}: use a short name "
                                 "without commas, quotes or line breaks")
        known = {c.casefold(): c for c in self.classes}
        if name.casefold() in known:
            return known[name.casefold()]
        self.classes.append(name)
        return name

    def set_label(self, image: str | Path, label: str, group: str | None = None) -> None:
        """Give an image a label (and group) and write the sheet; a labelled image keeps its
        place in the sheet, a new one is added at the end."""
        label = self.add_class(label)
        group = (group or "").strip()
        if "\n" in group or "\r" in group:
            raise TopoclassError(f"{self.path}: a sample/group name cannot hold a line break")
        key = self.key(image)
        row = dict(self._rows.get(key) or dict.fromkeys(self._header, ""))
        row.update(image=key, label=label, group=group)
        self._rows[key] = row
        self._write()

    def restore(self, image: str | Path, row: dict[str, str] | None) -> None:
        """Put an image's row back as it was (``row`` from :meth:`row`; None removes it)."""
        key = self.key(image)
        if row is None:
            self._rows.pop(key, None)
        else:
            self._rows[key] = dict(row, image=key)
        self._write()

    def close(self) -> None:
        """Release the sheet's lock (the sheet is always up to date on disk)."""
        self._lock.release()

    def __enter__(self) -> LabelBook:
        return self

    def __exit__(self, *exc) -> None:
        self.close()

    # ---------------------------------------------------------------- private

    def _load(self) -> None:
        if not self.path.exists() or self.path.stat().st_size == 0:
            self._header = list(_COLUMNS)
            return
        # The same checks as training (and the same messages), apart from what a sheet in
        # progress may lack; image files that went missing since are not the page's business.
        read_labels(self.path, partial=True, check_files=False)
        with self.path.open(encoding="utf-8-sig", newline="") as fh:
            text = fh.read()
        first = next((line for line in text.splitlines() if line.strip()), "")
        delimiter = next((d for d in (",", ";", "\t") if d in first), ",")
        rows = [r for r in csv.reader(text.splitlines(), delimiter=delimiter) if any(r)]
        header = [c.strip().lower() for c in rows[0]]
        self._header = header + [c for c in _COLUMNS if c not in header]
        for cells in rows[1:]:
            cells = [c.strip() for c in cells] + [""] * (len(header) - len(cells))
            row = dict(zip(header, cells, strict=False))
            entry = row["image"]
            path = Path(entry) if Path(entry).is_absolute() else self.path.parent / entry
            key = self.key(path)
            self._rows[key] = {**dict.fromkeys(self._header, ""), **row, "image": key}

    def _write(self) -> None:
        header = list(self._header)
        if not any(r.get("group") for r in self._rows.values()):
            header.remove("group")  # no groups yet: a sheet without the column trains as is
        self.path.parent.mkdir(parents=True, exist_ok=True)
        fd, tmp = tempfile.mkstemp(dir=self.path.parent, prefix=f".{self.path.name}.",
                                   suffix=".tmp")
        try:
            with os.fdopen(fd, "w", encoding="utf-8", newline="") as fh:
                writer = csv.writer(fh, lineterminator="\n")
                writer.writerow(header)
                for row in self._rows.values():
                    writer.writerow([row.get(c, "") for c in header])
                fh.flush()
                os.fsync(fh.fileno())
            os.replace(tmp, self.path)
        except BaseException:
            Path(tmp).unlink(missing_ok=True)
            raise


class _SheetLock:
    """An exclusive ``flock`` on ``.<sheet>.lock``, released by the kernel if the process dies."""

    def __init__(self, sheet: Path):
        import fcntl

        self.path = sheet.with_name(f".{sheet.name}.lock")
        try:
            sheet.parent.mkdir(parents=True, exist_ok=True)
            self._fd: int | None = os.open(self.path, os.O_CREAT | os.O_RDWR, 0o644)
        except OSError as exc:
            raise LabelSheetError(f"{sheet}: cannot write beside the sheet ({exc.strerror}); "
                                  "choose a sheet in a folder you can write to") from None
        try:
            fcntl.flock(self._fd, fcntl.LOCK_EX | fcntl.LOCK_NB)
        except BlockingIOError:
            os.close(self._fd)
            self._fd = None
            raise TopoclassError(f"{sheet}: another labelling page has this sheet open; close "
                                 "that page's server first (Ctrl-C where it runs)") from None

    def release(self) -> None:
        if self._fd is not None:
            os.close(self._fd)  # closing the descriptor drops the flock
            self._fd = None
