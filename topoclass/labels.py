"""Label sheets: which micrograph belongs to which class (and, optionally, which group).

Two forms are read:

* a CSV file with the columns ``image,label`` and optionally ``group`` (paths relative to the
  CSV's folder, absolute paths allowed; UTF-8, with or without a byte-order mark; comma, or
  semicolon / tab as some spreadsheet programs write);
* a folder with one sub-folder per class, the images inside (searched recursively).

Everything is checked before a :class:`LabelSet` is returned, and every problem found is
reported at once in one :class:`topoclass.errors.LabelSheetError`, so that a sheet can be fixed
in one pass.
"""

from __future__ import annotations

import csv
import hashlib
import io
import os
from collections import Counter
from collections.abc import Sequence
from dataclasses import dataclass, field
from pathlib import Path
from typing import NoReturn

from topoclass.errors import LabelSheetError
from topoclass.images import IMAGE_EXTENSIONS, images_in_folder

REQUIRED_COLUMNS: tuple[str, ...] = ("image", "label")
OPTIONAL_COLUMNS: tuple[str, ...] = ("group",)
_MAX_LISTED = 25  # problems listed in full; the rest are counted


@dataclass(frozen=True)
class LabelSet:
    """Images with their class labels, checked.

    Attributes
    ----------
    images : tuple of Path
        Absolute image paths, in sheet order.
    labels : tuple of str
        Class label of each image.
    groups : tuple of str or None
        Group of each image (e.g. the membrane or anodising batch it was cut from), used to
        keep a group within one cross-validation fold; None when the sheet has no groups.
    source : Path
        The sheet (CSV file or class folder).
    sheet_hash : str
        SHA-256 of the CSV's bytes, or of the sorted listing of a class folder.
    extra : dict of str to tuple of str
        The sheet's other columns (operator, date, ...), by header name, one value per image;
        carried into the outputs that list images one per row.
    """

    images: tuple[Path, ...]
    labels: tuple[str, ...]
    groups: tuple[str, ...] | None
    source: Path
    sheet_hash: str
    extra: dict[str, tuple[str, ...]] = field(default_factory=dict)

    def __len__(self) -> int:
        return len(self.images)

    @property
    def classes(self) -> tuple[str, ...]:
        """Class labels, sorted, each once."""
        return tuple(sorted(set(self.labels)))

    @property
    def counts(self) -> dict[str, int]:
        """Number of images per class, in the order of :attr:`classes`."""
        counter = Counter(self.labels)
        return {label: counter[label] for label in self.classes}


def read_labels(
    source: str | Path, *, n_folds: int | None = None, check_files: bool = True,
    partial: bool = False,
) -> LabelSet:
    """Read and check a label sheet.

    Parameters
    ----------
    source : str or Path
        A CSV file (``image,label[,group]``) or a folder with one sub-folder per class.
    n_folds : int or None
        When given, every class must have at least this many images (this many groups when
        the sheet has groups) so that each cross-validation fold can hold one.
    check_files : bool
        Check that every image file exists.
    partial : bool
        Read a sheet that is still being filled in (as the labelling page writes it): a
        header with no rows, a single class and columns other than ``image,label,group``
        (kept by the page, ignored here) are fine. Every row is still checked.

    Returns
    -------
    LabelSet

    Raises
    ------
    LabelSheetError
        Listing every problem found (one line: a summary, then the problems separated by
        ``"; "``). The problems are also available as the ``problems`` attribute.
    """
    if n_folds is not None and n_folds < 2:
        raise ValueError(f"n_folds must be at least 2, got {n_folds}")
    source = Path(os.path.expanduser(source))
    extra: dict[str, tuple[str, ...]] = {}
    if source.is_dir():
        images, labels, groups, digest, problems = _read_folder(source)
    elif source.is_file():
        images, labels, groups, digest, problems, extra = _read_csv(source, check_files,
                                                                    partial)
    else:
        _fail(source, [f"not found, give a CSV file ({','.join(REQUIRED_COLUMNS)}[,group]) "
                       "or a folder with one sub-folder per class"])
    if images:
        problems += _check_classes(labels, groups, n_folds, partial)
    if problems:
        _fail(source, sorted(problems, key=_line_of))
    return LabelSet(
        images=tuple(images),
        labels=tuple(labels),
        groups=tuple(groups) if groups is not None else None,
        source=source,
        sheet_hash=digest,
        extra=extra,
    )


def write_labels(
    path: str | Path,
    images: Sequence[str | Path],
    labels: Sequence[str],
    groups: Sequence[str] | None = None,
) -> Path:
    """Write a label sheet that :func:`read_labels` reads back.

    Image paths inside the sheet's folder are written relative to it (with ``/``), so the
    folder can be moved as a whole; others are written as absolute paths.

    Returns
    -------
    Path
        The sheet written.
    """
    path = Path(path)
    if len(images) != len(labels) or (groups is not None and len(groups) != len(images)):
        raise ValueError("images, labels and groups must have the same length")
    base = path.parent.resolve()
    header = ["image", "label"] + (["group"] if groups is not None else [])
    path.parent.mkdir(parents=True, exist_ok=True)
    with path.open("w", encoding="utf-8", newline="") as fh:
        writer = csv.writer(fh, lineterminator="\n")
        writer.writerow(header)
        for i, (image, label) in enumerate(zip(images, labels, strict=True)):
            row = [sheet_entry(Path(image), base), str(label)]
            if groups is not None:
                row.append(str(groups[i]))
            writer.writerow(row)
    return path


def sheet_entry(image: str | Path, base: str | Path) -> str:
    """How a label sheet in folder ``base`` names ``image``: relative to it, with ``/``.

    An image outside ``base`` keeps its absolute path, so the entry never depends on the
    working directory.
    """
    absolute = Path(os.path.abspath(image))
    try:
        return absolute.relative_to(base).as_posix()
    except ValueError:
        return absolute.as_posix()


# --------------------------------------------------------------------------- CSV


def _read_csv(source: Path, check_files: bool, partial: bool = False):
    try:
        raw = source.read_bytes()
    except OSError as exc:
        _fail(source, [f"cannot be read ({exc.strerror}), check the file"])
    digest = hashlib.sha256(raw).hexdigest()
    try:
        text = raw.decode("utf-8-sig")  # a byte-order mark (as Excel writes it) is fine
    except UnicodeDecodeError as exc:
        _fail(source, [f"is not UTF-8 text (bad byte at position {exc.start}), "
                       "save it as UTF-8 (CSV UTF-8 in a spreadsheet program)"])
    if not text.strip():
        _fail(source, ["the sheet is empty, add a header line image,label and one line per "
                       "image"])
    if "\x00" in text:
        _fail(source, ["contains NUL bytes, so it is not a text CSV, save it as CSV (UTF-8)"])
    # strict: a quote left open at the end is an error, not a label running to the end
    reader = csv.reader(io.StringIO(text, newline=""), delimiter=_delimiter(text), strict=True)
    problems: list[str] = []
    images: list[Path] = []
    labels: list[str] = []
    groups: list[str] = []
    lines: list[int | None] = []
    kept: list[list[str]] = []  # the cells of every accepted row, for the extra columns
    try:
        header = None
        for row in reader:
            cells = [cell.strip() for cell in row]
            if not any(cells):
                continue
            if header is None:
                header = [cell.lower() for cell in cells]
                problems += _check_header(header)
                if problems:
                    break
                columns = {name: header.index(name) for name in header}
                continue
            before = len(images)
            _parse_row(cells, reader.line_num, header, columns, source.parent, images, labels,
                       groups, lines, problems)
            if len(images) > before:
                kept.append(cells + [""] * (len(header) - len(cells)))
    except csv.Error as exc:
        problems.append(f"line {reader.line_num}: not valid CSV ({exc}), check the quotes")
    if header is None and not problems:
        problems.append("the sheet is empty, add a header line image,label and one line per "
                        "image")
    elif not problems and not images and not partial:
        problems.append("no image lines below the header, add one line per image")
    problems += _duplicates(images, labels, groups if "group" in (header or ()) else None, lines)
    if check_files:
        for image, line in zip(images, lines, strict=True):
            if not _is_file(image):
                what = "is a folder, not an image file" if _is_dir(image) else "not found"
                problems.append(f"line {line}: image {image} {what}")
    grouped = header is not None and "group" in header
    allowed = REQUIRED_COLUMNS + OPTIONAL_COLUMNS
    extra = {name: tuple(cells[k] for cells in kept) for k, name in enumerate(header or ())
             if name not in allowed}
    return images, labels, groups if grouped else None, digest, problems, extra


def _delimiter(text: str) -> str:
    first = next((line for line in text.splitlines() if line.strip()), "")
    if "," in first:
        return ","
    for candidate in (";", "\t"):
        if candidate in first:
            return candidate
    return ","


def _check_header(header: list[str]) -> list[str]:
    problems = []
    allowed = REQUIRED_COLUMNS + OPTIONAL_COLUMNS
    for name in header:
        # Other named columns (operator, date, ...) are kept and carried into the outputs.
        if not name:
            problems.append("line 1: a column has no name, name it (columns other than "
                            f"{', '.join(allowed)} are kept as notes) or delete it")
    others = [f"'{name}'" for name in header if name and name not in allowed]
    kept = f"; {', '.join(others)} would be kept as notes" if others else ""
    for name in REQUIRED_COLUMNS:
        if name not in header:
            problems.append(f"line 1: missing required column '{name}' (the header must "
                            f"be {','.join(REQUIRED_COLUMNS)}[,group]{kept})")
    repeated = sorted(name for name, n in Counter(header).items() if n > 1 and name)
    for name in repeated:
        problems.append(f"line 1: column '{name}' appears more than once, keep one")
    return problems


def _parse_row(cells, line, header, columns, base, images, labels, groups, lines, problems):
    if len(cells) > len(header) and any(cells[len(header):]):
        problems.append(f"line {line}: {len(cells)} cells but the header has {len(header)}, "
                        "quote values that contain the separator")
        return
    cells = cells + [""] * (len(header) - len(cells))
    entry, label = cells[columns["image"]], cells[columns["label"]]
    group = cells[columns["group"]] if "group" in columns else None
    ok = True
    if not entry:
        problems.append(f"line {line}: empty image path")
        ok = False
    if not label:
        problems.append(f"line {line}: empty label, give every image a class")
        ok = False
    if group is not None and not group:
        problems.append(f"line {line}: empty group, fill in every group or drop the column")
        ok = False
    for name, value in (("image path", entry), ("label", label), ("group", group)):
        if value and ("\n" in value or "\r" in value):
            problems.append(f"line {line}: {name} contains a line break, check the quotes")
            ok = False
    if not ok:
        return
    images.append(_resolve_entry(entry, base))
    labels.append(label)
    lines.append(line)
    if group is not None:
        groups.append(group)


def _resolve_entry(entry: str, base: Path) -> Path:
    path = Path(entry)
    path = path if path.is_absolute() else base / path
    if "\\" in entry and os.sep == "/" and not _exists(path):
        # A sheet written on Windows: "scans\a.tif" means scans/a.tif
        alt = Path(entry.replace("\\", "/"))
        alt = alt if alt.is_absolute() else base / alt
        if _exists(alt):
            path = alt
    return Path(os.path.abspath(path))


def _duplicates(images, labels, groups, lines) -> list[str]:
    problems = []
    first: dict[Path, int] = {}
    for i, image in enumerate(images):
        key = image.resolve()
        if key not in first:
            first[key] = i
            continue
        j = first[key]
        same = labels[i] == labels[j] and (groups is None or groups[i] == groups[j])
        if same:
            problems.append(f"line {lines[i]}: duplicate of line {lines[j]}, delete one")
        else:
            problems.append(f"line {lines[i]}: image {image} is also on line {lines[j]} "
                            f"(label '{labels[j]}'), each image may appear once")
    return problems


# --------------------------------------------------------------------------- class folders


def _read_folder(source: Path):
    problems: list[str] = []
    class_dirs = sorted(p for p in source.iterdir() if p.is_dir() and not p.name.startswith("."))
    loose = sorted(p.name for p in source.iterdir()
                   if p.is_file() and p.suffix.lower() in IMAGE_EXTENSIONS)
    if loose:
        shown = ", ".join(loose[:5]) + (", ..." if len(loose) > 5 else "")
        problems.append(f"{len(loose)} image(s) directly in the folder, not in a class "
                        f"sub-folder ({shown}), move them into the folder of their class")
    if not class_dirs:
        problems.append("no class sub-folders, make one sub-folder per class with its images")
    images: list[Path] = []
    labels: list[str] = []
    listing: list[str] = []
    for class_dir in class_dirs:
        found = images_in_folder(class_dir)
        if not found:
            problems.append(f"class folder '{class_dir.name}' holds no images "
                            f"({' '.join(IMAGE_EXTENSIONS)}), add images or remove it")
        for path in found:
            images.append(Path(os.path.abspath(path)))
            labels.append(class_dir.name)
            listing.append(path.relative_to(source).as_posix())
    digest = hashlib.sha256("\n".join(sorted(listing)).encode("utf-8")).hexdigest()
    return images, labels, None, digest, problems


# --------------------------------------------------------------------------- whole-set checks


def _check_classes(labels, groups, n_folds, partial: bool = False) -> list[str]:
    problems = []
    counts = Counter(labels)
    if len(counts) == 1 and not partial:
        (only,) = counts
        problems.append(f"only one class ('{only}'), training needs at least two classes")
    by_lower: dict[str, list[str]] = {}
    for label in sorted(counts):
        by_lower.setdefault(label.casefold(), []).append(label)
    for spellings in by_lower.values():
        if len(spellings) > 1:
            shown = " and ".join(f"'{s}'" for s in spellings)
            problems.append(f"labels {shown} differ only in letter case, use one spelling")
    if n_folds is not None:
        for label in sorted(counts):
            if groups is not None:
                n = len({g for g, lab in zip(groups, labels, strict=True) if lab == label})
                unit = "group"
            else:
                n, unit = counts[label], "image"
            if n < n_folds:
                problems.append(f"class '{label}' has {n} {unit}{'s' if n != 1 else ''}, fewer "
                                f"than the {n_folds} cross-validation folds; "
                                + _more_folds_advice(label, n, n_folds, unit))
    return problems


def _more_folds_advice(label: str, n: int, n_folds: int, unit: str) -> str:
    """What to do when a class has fewer images (or groups) than folds."""
    more = n_folds - n
    if unit == "group":
        # Every fold must hold out one whole sample of each class: more images of the same
        # samples do not help, images of other samples do.
        add = (f"label images of {more} more sample{'s' if more != 1 else ''} (groups) of "
               f"'{label}'")
    else:
        add = f"label {more} more image{'s' if more != 1 else ''} of '{label}'"
    if n >= 2:
        return f"{add}, or use --cv {n}"
    return add + " (cross-validation needs at least 2 per class, so fewer folds cannot help)"


def _line_of(problem: str) -> int:
    # Problems of one line read in sheet order; problems of the whole sheet come last.
    head = problem.split(":", 1)[0]
    number = head.removeprefix("line ")
    return int(number) if head.startswith("line ") and number.isdigit() else 1 << 62


def _exists(path: Path) -> bool:
    try:
        return path.exists()
    except (OSError, ValueError):  # e.g. a name too long for the file system
        return False


def _is_file(path: Path) -> bool:
    try:
        return path.is_file()
    except (OSError, ValueError):
        return False


def _is_dir(path: Path) -> bool:
    try:
        return path.is_dir()
    except (OSError, ValueError):
        return False


def _fail(source: Path, problems: list[str]) -> NoReturn:
    n = len(problems)
    shown = problems[:_MAX_LISTED]
    if n > _MAX_LISTED:
        shown.append(f"... and {n - _MAX_LISTED} more")
    summary = f"{source}: {n} problem{'s' if n != 1 else ''}: "
    error = LabelSheetError(summary + "; ".join(shown))
    error.problems = tuple(problems)
    raise error
