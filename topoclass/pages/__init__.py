"""The one convention for every HTML page topoclass writes or serves.

A page is ``html_page(title, body, styles=..., scripts=...)``: the body is HTML made by the
caller (every value escaped with :func:`html.escape`); styles and scripts are names of files
in this package's ``assets/`` folder, inlined so that a written page opens offline with no
other file. ``base.css`` is the shared look; ``sortable.js`` sorts every ``table.sortable`` by
the ``data-value`` of the clicked column (numbers numerically with empty cells last, text
alphabetically; a second click reverses). A page with its own behaviour keeps its assets
here too (package data, never Python strings).
"""

from __future__ import annotations

import html
from collections.abc import Sequence
from functools import cache
from importlib import resources


@cache
def asset_text(name: str) -> str:
    """The text of one file of ``topoclass/pages/assets`` (cached)."""
    return resources.files(__package__).joinpath("assets", name).read_text(encoding="utf-8")


def html_page(title: str, body: str, *, styles: Sequence[str] = ("base.css",),
              scripts: Sequence[str] = ()) -> str:
    """A whole self-contained HTML document with the named assets inlined."""
    css = "".join(asset_text(name) for name in styles)
    js = "".join(f"<script>\n{asset_text(name)}</script>" for name in scripts)
    return (
        "<!DOCTYPE html><html lang='en'><head><meta charset='utf-8'>"
        "<meta name='viewport' content='width=device-width, initial-scale=1'>"
        "<link rel='icon' href='data:,'>"
        f"<title>{html.escape(title)}</title><style>\n{css}</style></head><body>"
        f"{body}{js}</body></html>\n"
    )
