"""Marked blocks in README.md: find them, rewrite them, and find figures typed outside them.

A block is the text between ``<!-- NAME:start -->`` and ``<!-- NAME:end -->`` (NAME is letters,
digits, ``-``, ``_`` and ``:``, e.g. ``out:train`` or ``accuracy``). Both markers on one line make
an inline block (part of a sentence); otherwise each marker stands alone on its line. Scripts own
the blocks (``tools/readme_figures.py`` the ``out:`` ones, ``docs/make_figures.py`` the
``pictures`` one, ``benchmarks/accuracy.py`` the ``accuracy`` one); nothing inside them is typed
by hand.

:func:`loose_figures` lists the sentences outside every block that carry a speed or accuracy
figure and cite no benchmark file, so a test can catch a number typed into the README.
"""

from __future__ import annotations

import re
from dataclasses import dataclass

_MARKER = re.compile(r"<!-- ([A-Za-z0-9_:-]+?):(start|end) -->")


@dataclass(frozen=True)
class Block:
    """One marked block: its name, whether it sits inside a line, and where its text is."""

    name: str
    inline: bool
    start: int  # offset of the first character after the start marker
    end: int  # offset of the end marker

    def text(self, document: str) -> str:
        return document[self.start:self.end]


class BlockError(ValueError):
    """README markers that do not pair up."""


def find_blocks(document: str) -> list[Block]:
    """Every marked block of ``document`` in order; raises :class:`BlockError` when markers are
    unpaired, nested, repeated, or a multi-line block's marker shares its line with other text."""
    blocks, open_name, open_at, open_match = [], None, 0, None
    seen: set[str] = set()
    for m in _MARKER.finditer(document):
        name, kind = m.group(1), m.group(2)
        line_no = document.count("\n", 0, m.start()) + 1
        if kind == "start":
            if open_name is not None:
                raise BlockError(f"README line {line_no}: block {name!r} starts inside block "
                                 f"{open_name!r}; close {open_name!r} first")
            if name in seen:
                raise BlockError(f"README line {line_no}: a second block named {name!r}; "
                                 "give each block its own name")
            open_name, open_at, open_match = name, m.end(), m
            continue
        if open_name != name:
            raise BlockError(f"README line {line_no}: end of block {name!r} without its start")
        inline = "\n" not in document[open_at:m.start()]
        if not inline:
            for mark in (open_match, m):
                if _line_of(document, mark.start()).strip() != mark.group(0):
                    raise BlockError(f"README line {line_no}: the markers of multi-line block "
                                     f"{name!r} must stand alone on their lines")
        blocks.append(Block(name, inline, open_at, m.start()))
        seen.add(name)
        open_name = None
    if open_name is not None:
        raise BlockError(f"README: block {open_name!r} is never closed; add "
                         f"<!-- {open_name}:end -->")
    return blocks


def replace_blocks(document: str, contents: dict[str, str]) -> str:
    """``document`` with the blocks named in ``contents`` rewritten; raises ``KeyError`` naming
    any name that has no block. Multi-line contents go between the marker lines."""
    blocks = {b.name: b for b in find_blocks(document)}
    missing = sorted(set(contents) - set(blocks))
    if missing:
        raise KeyError(f"README has no block named {', '.join(missing)}; add its markers first")
    out, at = [], 0
    for block in sorted((blocks[n] for n in contents), key=lambda b: b.start):
        new = contents[block.name]
        if block.inline:
            if "\n" in new:
                raise ValueError(f"inline block {block.name!r} takes one line of text")
        else:
            new = "\n" + new.strip("\n") + "\n"
        out += [document[at:block.start], new]
        at = block.end
    out.append(document[at:])
    return "".join(out)


# A figure about speed, size or accuracy: a number with a unit of time, size or ratio, a
# percentage, or a number after a metric's name. Settings (``--jobs 2``, 100 trees) do not match.
FIGURE_PATTERNS = (
    re.compile(r"\d(?:[\d.,]*\d)?\s*(?:[-–]\s*\d[\d.,]*\s*)?"
               r"(?:s|ms|µs|min|minutes?|seconds?|hours?|h)\b"),
    re.compile(r"\d(?:[\d.,]*\d)?[-\s](?:minute|second|hour)s?\b"),
    re.compile(r"\d(?:[\d.,]*\d)?\s*(?:kB|KB|MB|GB|KiB|MiB|GiB)\b"),
    re.compile(r"\d(?:[\d.,]*\d)?\s*(?:×(?!\s*\d)|x\b|times\b)"),  # not a size like 1×1
    re.compile(r"\d(?:[\d.,]*\d)?\s*%"),
    re.compile(r"(?:accuracy|macro-F1|F1|ECE|log-loss|Brier|speed-?up|faster|slower)"
               r"[^.\n]{0,12}?\d\.\d", re.IGNORECASE),
)
# A sentence that names the result file of a benchmark script may carry its figures.
CITES_BENCHMARK = re.compile(r"benchmarks/[\w./-]+\.(?:md|json|png)")


def loose_figures(document: str) -> list[str]:
    """Sentences outside every marked block that hold a speed, size or accuracy figure and cite
    no ``benchmarks/...`` result file (each with its README line number)."""
    blocks = find_blocks(document)
    # Blank the blocks (keeping line breaks) so line numbers stay true.
    chars = list(document)
    for b in blocks:
        for i in range(b.start, b.end):
            if chars[i] != "\n":
                chars[i] = " "
    text = "".join(chars)
    found = []
    for para_start, para in _paragraphs(text):
        for sent_start, sentence in _sentences(para):
            for pattern in FIGURE_PATTERNS:
                m = next((m for m in pattern.finditer(sentence)
                          if not _is_setting(sentence, m)), None)
                if m and not CITES_BENCHMARK.search(sentence):
                    line = text.count("\n", 0, para_start + sent_start + m.start()) + 1
                    found.append(f"README line {line}: {' '.join(sentence.split())[:160]}")
                    break
    return found


def _is_setting(sentence: str, match: re.Match) -> bool:
    """A default value (``1500 MB by default``, ``default 3 s``) or a time-out (``fails within
    10 s``) is a setting, not a figure."""
    after = sentence[match.end():match.end() + 14]
    before = sentence[max(0, match.start() - 12):match.start()]
    return bool(re.match(r"[\s;,)]*by default", after)
                or re.search(r"(default|within)[\s(:]*$", before))


def _line_of(document: str, offset: int) -> str:
    begin = document.rfind("\n", 0, offset) + 1
    end = document.find("\n", offset)
    return document[begin:end if end >= 0 else len(document)]


def _paragraphs(text: str):
    at = 0
    for para in re.split(r"(\n[ \t]*\n)", text):
        if para.strip() and not para.startswith("\n"):
            yield at, para
        at += len(para)


def _sentences(paragraph: str):
    # A sentence ends at ". " / ".\n" after a word (not inside 0.28 or e.g. a file name).
    at = 0
    for m in re.finditer(r"(?<=[a-z0-9\)\]`*])[.;:!?](?=\s)", paragraph):
        yield at, paragraph[at:m.end()]
        at = m.end()
    if paragraph[at:].strip():
        yield at, paragraph[at:]
